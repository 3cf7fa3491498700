"""A model sequence over the horizon: each segment is its model's prediction; time-varying maps plan through it."""

import numpy as np
import pytest

from stimsteer.control import StimLimits, controller_for
from stimsteer.sysid import InvalidParameterError, Session
from stimsteer.sysid.recursive import RecursiveRidgeArx
from stimsteer.sysid.switched import ModelSequence


def _fit(a, b, seed):
    rng = np.random.default_rng(seed)
    u = rng.normal(size=(600, 1))
    y = np.zeros((600, 1))
    for k in range(1, 600):
        y[k] = a * y[k - 1] + b * u[k]
    s = Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, 300), (300, 600)])
    return RecursiveRidgeArx(output_lags=1, input_lags=1, alpha=1e-9).fit(s)


@pytest.fixture(scope="module")
def pair():
    return _fit(0.8, 0.5, 1), _fit(0.5, 1.5, 2)


def test_each_segment_is_its_models_prediction_from_the_window_before_it(pair):
    a, b = pair
    seq = ModelSequence(models=[a, b], switch_steps=[4]).fit()
    up, yp, uf = np.zeros((1, 1)), np.array([[1.0]]), np.ones((10, 1))
    y = seq.predict(up, yp, uf)
    first = a.predict(up, yp, uf[:4])
    np.testing.assert_allclose(y[:4], first, atol=1e-12)
    np.testing.assert_allclose(y[4:], b.predict(uf[3:4], first[-1:], uf[4:]), atol=1e-12)
    # known by construction: y_k = a y_{k-1} + b u_k with (0.8, 0.5) then (0.5, 1.5)
    ref, v = [], 1.0
    for k in range(10):
        v = (0.8 * v + 0.5) if k < 4 else (0.5 * v + 1.5)
        ref.append(v)
    np.testing.assert_allclose(y[:, 0], ref, atol=1e-6)


def test_the_time_varying_maps_reproduce_the_prediction_and_plan_within_limits(pair):
    seq = ModelSequence(models=list(pair), switch_steps=[5]).fit()
    up, yp, uf = np.zeros((2, 1)), np.array([[0.3], [0.2]]), np.linspace(-1, 1, 12)[:, None]
    np.testing.assert_allclose(seq.prediction_maps(2, 12).apply(up, yp, uf), seq.predict(up, yp, uf), atol=1e-10)
    lim = StimLimits(amplitude_min_ua=-0.4, amplitude_max_ua=0.6, n_inputs=1)
    plan = controller_for(seq, lim, horizon_steps=12).plan(up, yp, target=np.array([1.0]))
    assert plan.ok and not any(lim.violations(plan.inputs).values())
    np.testing.assert_allclose(plan.predicted_outputs, seq.predict(up, yp, plan.inputs), atol=1e-6)


def test_switch_steps_must_fit_the_models(pair):
    with pytest.raises(InvalidParameterError, match="increasing horizon steps"):
        ModelSequence(models=list(pair), switch_steps=[0]).fit()
    with pytest.raises(InvalidParameterError, match="len\\(models\\) - 1 = 1"):
        ModelSequence(models=list(pair), switch_steps=[2, 3]).fit()
