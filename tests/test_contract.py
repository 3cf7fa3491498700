"""One contract over every estimator and controller (STYLE.md; the scikit-learn estimator habits).

The constructor only stores, ``fit`` returns ``self``, unfitted use raises ``NotFittedError`` naming the class,
fitting twice gives the same numbers, inputs are untouched, ``repr`` works and ``sklearn.base.clone`` rebuilds
an equal unfitted object (scikit-learn developer guide, "Rolling your own estimator").
"""

import numpy as np
import pytest
from sklearn.base import clone

from stimsteer.control import (DataPredictiveController, LinearNetworkPlant, ModelPredictiveController, StimLimits,
                               random_network, record_session)
from stimsteer.sysid import HankelPredictor, LsqPredictor, NotFittedError, RidgeArx, SubspaceId


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(11)
    plant = LinearNetworkPlant(random_network(4, density=0.5, seed=11), B=rng.normal(size=(4, 2)) * 0.1,
                               C=rng.normal(size=(3, 4)), measurement_noise_std=0.01, sample_rate_hz=100.0)
    u = rng.normal(size=(1600, 2))
    return record_session(plant, u, trials=[(k * 200, (k + 1) * 200) for k in range(8)], seed=11)


ESTIMATORS = {
    "RidgeArx": lambda: RidgeArx(output_lags=2, input_lags=2, alphas=(1e-3, 1e-1)),
    "SubspaceId": lambda: SubspaceId(past_steps=5, future_steps=5),
    "LsqPredictor": lambda: LsqPredictor(past_steps=5, horizon_steps=6),
    "HankelPredictor": lambda: HankelPredictor(past_steps=5, horizon_steps=6, regularizer="l2"),
}


def _window(session, k=5, n=6):
    return session.u[:k], session.y[:k], session.u[k:k + n]


@pytest.mark.parametrize("name", ESTIMATORS)
def test_estimator_contract(name, session):
    est = ESTIMATORS[name]()
    params = est.get_params()
    assert not [a for a in vars(est) if a.endswith("_") and not a.startswith("_")], "constructor set fitted state"
    assert name in repr(est)
    with pytest.raises(NotFittedError, match=name):
        est.predict(*_window(session))
    before = session.content_hash()
    assert est.fit(session) is est
    assert session.content_hash() == before
    first = est.predict(*_window(session))
    assert first.shape == (6, session.n_outputs) and np.all(np.isfinite(first))
    again = est.fit(session).predict(*_window(session))
    np.testing.assert_array_equal(first, again)
    twin = clone(est)
    assert type(twin) is type(est) and twin.get_params() == params
    assert repr(est)


@pytest.mark.parametrize("kind", ["model", "data"])
def test_controller_contract(kind, session):
    limits = StimLimits(n_inputs=2, amplitude_min_ua=-1.0, amplitude_max_ua=1.0, slew_max_ua=0.5)
    if kind == "model":
        model = SubspaceId(past_steps=5, future_steps=5).fit(session).model_
        make = lambda: ModelPredictiveController(model=model, limits=limits, horizon_steps=6)  # noqa: E731
        cls = "ModelPredictiveController"
    else:
        pred = HankelPredictor(past_steps=5, horizon_steps=6, regularizer="l2").fit(session)
        make = lambda: DataPredictiveController(predictor=pred, limits=limits)  # noqa: E731
        cls = "DataPredictiveController"
    ctrl = make()
    assert cls in repr(ctrl)
    u_past, y_past, _ = _window(session)
    target = np.ones((6, session.n_outputs))
    with pytest.raises(NotFittedError, match=cls):
        ctrl.plan(u_past, y_past, target=target)
    assert ctrl.fit() is ctrl
    plan = ctrl.plan(u_past, y_past, target=target)
    again = make().fit().plan(u_past, y_past, target=target)
    np.testing.assert_allclose(plan.inputs, again.inputs, atol=1e-9)
    assert np.all(np.abs(plan.inputs) <= 1.0)
    assert ctrl.get_params()["limits"] is limits
