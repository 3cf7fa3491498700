"""One contract over every public estimator, predictor, scaler and controller (DEVELOPERS.md; sysid/protocols.py).

The habits are scikit-learn's (scikit-learn developer guide, "Developing scikit-learn estimators"; Buitinck et al.
2013, "API design for machine learning software"): the constructor only stores, ``get_params``/``set_params`` come
from its signature so ``sklearn.base.clone`` rebuilds an equal unfitted object, ``fit`` returns ``self``, unfitted
use raises ``NotFittedError`` naming the class, fitting twice gives the same numbers, inputs are untouched, and
``repr`` works. Ours on top: settings changed by ``set_params`` after ``fit`` make the object refuse to be used
until it is fitted again, and every predictor keeps the written predictor contract (``prediction_maps`` reproduce
``predict`` for the linear ones).
"""

import inspect

import numpy as np
import pytest
from sklearn.base import clone

from stimsteer.control import (DataPredictiveController, LinearNetworkPlant, ModelPredictiveController, StimLimits,
                               random_network, record_session)
from stimsteer.sysid import (METHODS, HankelPredictor, LsqPredictor, NotFittedError, RidgeArx, SessionScaler,
                             StateSpaceModel, SubspaceId, make_estimator)
from stimsteer.sysid.protocols import LinearPredictor, Predictor, StateSpaceForm


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(11)
    plant = LinearNetworkPlant(random_network(4, density=0.5, seed=11), B=rng.normal(size=(4, 2)) * 0.1,
                               C=rng.normal(size=(3, 4)), measurement_noise_std=0.01, sample_rate_hz=100.0)
    u = rng.normal(size=(1600, 2))
    return record_session(plant, u, trials=[(k * 200, (k + 1) * 200) for k in range(8)], seed=11)


# every estimator, with small settings, and a setting to change after fit
ESTIMATORS = {
    "RidgeArx": (lambda: RidgeArx(output_lags=2, input_lags=2, alphas=(1e-3, 1e-1)), {"output_lags": 3}),
    "SubspaceId": (lambda: SubspaceId(past_steps=5, future_steps=5), {"past_steps": 6}),
    "LsqPredictor": (lambda: LsqPredictor(past_steps=5, horizon_steps=6), {"past_steps": 4}),
    "HankelPredictor-l2": (lambda: HankelPredictor(past_steps=5, horizon_steps=6, regularizer="l2"),
                           {"past_steps": 4}),
    "HankelPredictor-projection": (lambda: HankelPredictor(past_steps=5, horizon_steps=6, regularizer="projection"),
                                   {"past_steps": 4}),
}


def _window(session, k=5, n=6):
    return session.u[:k], session.y[:k], session.u[k:k + n]


def _stores_only(est):
    """The constructor stored its settings under their own names and nothing else."""
    assert not [a for a in vars(est) if a.endswith("_") and not a.startswith("_")], "constructor set fitted state"
    names = [p for p in inspect.signature(type(est).__init__).parameters if p != "self"]
    assert list(est.get_params(deep=False)) == names
    for p in inspect.signature(type(est).__init__).parameters.values():
        assert p.name == "self" or p.kind == p.KEYWORD_ONLY, f"{p.name} is not keyword-only"


@pytest.mark.parametrize("name", ESTIMATORS)
def test_estimator_contract(name, session):
    make, change = ESTIMATORS[name]
    est = make()
    _stores_only(est)
    params = est.get_params()
    cls = type(est).__name__
    assert cls in repr(est)
    with pytest.raises(NotFittedError, match=cls):
        est.predict(*_window(session))
    before = session.content_hash()
    assert est.fit(session) is est
    assert session.content_hash() == before
    first = est.predict(*_window(session))
    assert first.shape == (6, session.n_outputs) and np.all(np.isfinite(first))
    np.testing.assert_array_equal(first, est.fit(session).predict(*_window(session)))
    twin = clone(est)
    assert type(twin) is type(est) and twin.get_params().keys() == params.keys()
    assert not [a for a in vars(twin) if a.endswith("_") and not a.startswith("_")]
    np.testing.assert_array_equal(twin.fit(session).predict(*_window(session)), first)
    # settings changed after fit: the fitted state no longer matches them, so it refuses until refitted
    est.set_params(**change)
    with pytest.raises(NotFittedError, match="fit"):
        est.predict(*_window(session))
    est.fit(session)
    assert est.predict(*_window(session, k=8)).shape == (6, session.n_outputs)


@pytest.mark.parametrize("name", ESTIMATORS)
def test_every_predictor_keeps_the_written_contract(name, session):
    est = ESTIMATORS[name][0]().fit(session)
    assert isinstance(est, Predictor)
    for attr in ("input_names_", "output_names_", "input_units_", "output_units_"):
        assert len(getattr(est, attr)) == (session.n_inputs if attr.startswith("input") else session.n_outputs)
    assert est.output_units_ == tuple(session.output_units)
    up, yp, uf = _window(session, k=8, n=4)
    many = est.predict_many(up[None], yp[None], uf[None])
    np.testing.assert_allclose(many[0], est.predict(up, yp, uf), rtol=1e-12, atol=1e-12)
    assert est.has_linear_maps and isinstance(est, LinearPredictor)
    maps = est.prediction_maps(8, 4)
    np.testing.assert_allclose(maps.apply(up, yp, uf), est.predict(up, yp, uf), rtol=1e-9, atol=1e-10)
    u_rest, y_rest = est.rest_window()
    assert u_rest.shape == (est.past_steps_, session.n_inputs) and y_rest.shape == (est.past_steps_, session.n_outputs)


def test_a_given_state_space_model_is_a_linear_predictor(session):
    # a model object (no fit, changed with replace()): it keeps the predictor contract, not the estimator one
    model = SubspaceId(past_steps=5, future_steps=5).fit(session).model_
    assert isinstance(model, Predictor) and isinstance(model, LinearPredictor) and isinstance(model, StateSpaceForm)
    up, yp, uf = _window(session, k=5, n=6)
    np.testing.assert_allclose(model.prediction_maps(5, 6).apply(up, yp, uf), model.predict(up, yp, uf),
                               rtol=1e-9, atol=1e-10)
    many = model.predict_many(up[None], yp[None], uf[None])[0]
    np.testing.assert_allclose(many, model.predict(up, yp, uf), rtol=1e-12, atol=1e-12)
    assert model.output_units_ == tuple(session.output_units) and model.max_horizon_steps_ is None


@pytest.mark.parametrize("key", sorted(METHODS))
def test_every_registered_method_builds_a_contract_estimator(key):
    est = make_estimator(*key, {"past_steps": 4}, horizon_steps=5)
    _stores_only(est)
    assert type(clone(est)) is type(est)


def test_the_scaler_keeps_the_estimator_contract(session):
    sc = SessionScaler()
    _stores_only(sc)
    with pytest.raises(NotFittedError, match="SessionScaler"):
        sc.transform(session)
    before = session.content_hash()
    assert sc.fit(session) is sc and session.content_hash() == before
    first = sc.transform(session).y
    np.testing.assert_array_equal(first, sc.fit(session).transform(session).y)
    assert type(clone(sc)) is SessionScaler and "SessionScaler" in repr(sc)
    sc.set_params(with_scale=False)
    with pytest.raises(NotFittedError, match="fit"):
        sc.transform(session)


def _controller(kind, session, limits):
    if kind == "model":
        model = SubspaceId(past_steps=5, future_steps=5).fit(session).model_
        return lambda: ModelPredictiveController(model=model, limits=limits, horizon_steps=6)
    pred = HankelPredictor(past_steps=5, horizon_steps=6, regularizer="l2").fit(session)
    return lambda: DataPredictiveController(predictor=pred, limits=limits)


@pytest.mark.parametrize("kind", ["model", "data"])
def test_controller_contract(kind, session):
    limits = StimLimits(n_inputs=2, amplitude_min_ua=-1.0, amplitude_max_ua=1.0, slew_max_ua=0.5)
    make = _controller(kind, session, limits)
    ctrl = make()
    _stores_only(ctrl)
    cls = type(ctrl).__name__
    assert cls in repr(ctrl)
    u_past, y_past, _ = _window(session)
    target = np.ones((6, session.n_outputs))
    with pytest.raises(NotFittedError, match=cls):
        ctrl.plan(u_past, y_past, target=target)
    assert ctrl.fit() is ctrl
    assert ctrl.problem_.is_dpp()
    plan = ctrl.plan(u_past, y_past, target=target)
    np.testing.assert_allclose(plan.inputs, make().fit().plan(u_past, y_past, target=target).inputs, atol=1e-9)
    # clone gives unfitted copies of estimator settings (scikit-learn's rule): a cloned data controller refits its
    # predictor on the session
    twin = clone(ctrl).fit(session)
    np.testing.assert_allclose(plan.inputs, twin.plan(u_past, y_past, target=target).inputs, atol=1e-9)
    assert np.all(np.abs(plan.inputs) <= 1.0)
    assert ctrl.get_params()["limits"] is limits
    ctrl.set_params(input_weight=1e-2)
    with pytest.raises(NotFittedError, match="fit"):
        ctrl.plan(u_past, y_past, target=target)
