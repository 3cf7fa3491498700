"""The estimator contract (tests/test_contract.py, after scikit-learn's developer guide and Buitinck et al. 2013,
"API design for machine learning software") for the routes of the nonlinear / time-varying / ensemble issue."""

import inspect
import warnings

import numpy as np
import pytest
from sklearn.base import clone

from stimsteer.control import LinearNetworkPlant, random_network, record_session
from stimsteer.sysid import (BootstrapEnsemble, HammersteinArx, LiftedPredictor, NotFittedError, RecursiveRidgeArx)
from stimsteer.sysid.protocols import Predictor

ESTIMATORS = {
    "LiftedPredictor": (lambda: LiftedPredictor(past_steps=2, feature_grid=(0, 8), bandwidths=(1.0,),
                                                alphas=(1e-4,)), {"alphas": (1e-2,)}),
    "HammersteinArx": (lambda: HammersteinArx(past_steps=2, n_knots=5), {"n_knots": 6}),
    "RecursiveRidgeArx": (lambda: RecursiveRidgeArx(output_lags=2, input_lags=2, forgetting=0.995),
                          {"forgetting": 0.99}),
    "BootstrapEnsemble": (lambda: BootstrapEnsemble(method="arx", method_settings={
        "output_lags": 2, "input_lags": 2, "delay_samples": 0, "alphas": (1e-3,)}, n_members=3), {"n_members": 4}),
}


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(11)
    plant = LinearNetworkPlant(random_network(4, density=0.5, seed=11), B=rng.normal(size=(4, 2)) * 0.1,
                               C=rng.normal(size=(3, 4)), measurement_noise_std=0.01, sample_rate_hz=100.0)
    return record_session(plant, rng.normal(size=(1200, 2)), trials=[(k * 200, (k + 1) * 200) for k in range(6)],
                          seed=11)


def _window(session, k=5, n=6):
    return session.u[:k], session.y[:k], session.u[k:k + n]


@pytest.mark.parametrize("name", ESTIMATORS)
def test_the_new_routes_keep_the_estimator_contract(name, session):
    make, change = ESTIMATORS[name]
    est = make()
    assert not [a for a in vars(est) if a.endswith("_") and not a.startswith("_")]
    names = [p for p in inspect.signature(type(est).__init__).parameters if p != "self"]
    assert list(est.get_params(deep=False)) == names
    assert all(p.kind == p.KEYWORD_ONLY for p in inspect.signature(type(est).__init__).parameters.values()
               if p.name != "self")
    with pytest.raises(NotFittedError, match=type(est).__name__):
        est.predict(*_window(session))
    before = session.content_hash()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert est.fit(session) is est
        assert session.content_hash() == before
        first = est.predict(*_window(session))
        assert first.shape == (6, session.n_outputs) and np.all(np.isfinite(first))
        np.testing.assert_array_equal(first, est.fit(session).predict(*_window(session)))
        np.testing.assert_array_equal(clone(est).fit(session).predict(*_window(session)), first)
    assert isinstance(est, Predictor) and type(est).__name__ in repr(est)
    many = est.predict_many(*(a[None] for a in _window(session)))
    np.testing.assert_allclose(many[0], first, rtol=1e-12, atol=1e-12)
    u_rest, y_rest = est.rest_window()
    assert u_rest.shape[1] == session.n_inputs and y_rest.shape[1] == session.n_outputs
    est.set_params(**change)
    with pytest.raises(NotFittedError, match="fit"):
        est.predict(*_window(session))
