"""The base classes on every estimator and predictor of sysid: settings from the constructor, clone, stale fits,
and the fitted attributes of the Predictor contract (scikit-learn developer guide, "Rolling your own estimator")."""

import numpy as np
import pytest
from sklearn.base import clone

from stimsteer.sysid import (HankelPredictor, InvalidParameterError, LinearPredictor, LsqPredictor, NotFittedError,
                             Predictor, RidgeArx, Session, SessionScaler, StateSpaceForm, StateSpaceModel, SubspaceId)

TRUE = StateSpaceModel(A=[[0.8, 0.3], [0.0, 0.5]], B=[[0.0, 0.5], [1.0, 0.0]], C=[[1.0, 0.5], [0.2, 1.0]])

PREDICTORS = {
    "RidgeArx": (lambda: RidgeArx(output_lags=2, input_lags=2, alphas=(1e-3,)), "output_lags", 3),
    "SubspaceId": (lambda: SubspaceId(past_steps=5, future_steps=5), "order", 1),
    "LsqPredictor": (lambda: LsqPredictor(past_steps=5, horizon_steps=6, alphas=(1e-3,)), "past_steps", 4),
    "HankelPredictor": (lambda: HankelPredictor(past_steps=5, horizon_steps=6, regularizer="l2", lambdas_g=(1e-2,)),
                        "lambda_y", 10.0),
}


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(5)
    u = rng.standard_normal((1200, 2))
    y = np.concatenate([TRUE.simulate(u[k * 200:(k + 1) * 200]) for k in range(6)])
    return Session(u=u, y=y + 0.01 * rng.standard_normal(y.shape), sample_rate_hz=100.0,
                   trials=[(k * 200, (k + 1) * 200) for k in range(6)], input_names=["a", "b"],
                   input_units=["uA", "uA"], output_names=["c", "d"], output_units=["mV", "mV"])


def test_the_scaler_clones_and_reports_its_settings():
    scaler = SessionScaler(with_mean=False)
    twin = clone(scaler)
    assert type(twin) is SessionScaler and twin.get_params(deep=True) == {"with_mean": False, "with_scale": True}
    assert repr(twin) == "SessionScaler(with_mean=False)"
    with pytest.raises(InvalidParameterError, match="no setting 'mean'"):
        twin.set_params(mean=True)


@pytest.mark.parametrize("name", PREDICTORS)
def test_every_predictor_has_the_fitted_attributes_of_the_contract(name, session):
    est = PREDICTORS[name][0]().fit(session)
    assert isinstance(est, Predictor) and isinstance(est, LinearPredictor) and est.has_linear_maps
    assert (est.n_inputs_, est.n_outputs_) == (2, 2) and est.past_steps_ >= 1
    assert est.input_names_ == ("a", "b") and est.output_names_ == ("c", "d")
    assert est.input_units_ == ("uA", "uA") and est.output_units_ == ("mV", "mV")
    u_rest, y_rest = est.rest_window()
    assert u_rest.shape == (est.past_steps_, 2) and y_rest.shape == (est.past_steps_, 2)
    assert clone(est).get_params() == est.get_params()
    if name in ("RidgeArx", "SubspaceId"):
        assert isinstance(est, StateSpaceForm)


@pytest.mark.parametrize("name", PREDICTORS)
def test_a_setting_changed_after_fit_asks_for_a_new_fit(name, session):
    make, setting, value = PREDICTORS[name]
    est = make().fit(session)
    window = session.u[:6], session.y[:6], session.u[6:9]
    est.set_params(**{setting: value})
    with pytest.raises(NotFittedError, match=f"settings {setting} of this {name} changed after it was fitted"):
        est.predict(*window)
    fresh = make().set_params(**{setting: value}).fit(session)
    np.testing.assert_array_equal(est.fit(session).predict(*window), fresh.predict(*window))


@pytest.mark.parametrize("name", PREDICTORS)
def test_predict_is_predict_many_of_one_window(name, session):
    est = PREDICTORS[name][0]().fit(session)
    up, yp, uf = session.u[:6], session.y[:6], session.u[6:9]
    np.testing.assert_array_equal(est.predict(up, yp, uf), est.predict_many(up[None], yp[None], uf[None])[0])
