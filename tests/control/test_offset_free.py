"""Offset-free tracking (stimsteer.control.mpc.offset_free): zero steady-state error under a constant output
disturbance in closed loop, for the model route (state-space MPC) and the direct route (DeePC on a Hankel
predictor, SPC on least-squares maps); a drifting offset tracked; hard limits untouched.

Outside checks: the offset-free property of an integrating output-disturbance model (Muske & Badgwell 2002,
J. Process Control 12:617, Sec. 3; Pannocchia & Rawlings 2003, AIChE J. 49:426, Sec. 3: as many integrating
disturbances as outputs give zero offset at steady state); a plain regulator without a disturbance model keeps an
offset equal to the unmodelled disturbance (same sources, their motivating example); an alpha-beta (ramp) filter
follows a linear drift with less lag than a constant-offset filter (common practice, no source).
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.mpc.offset_free import OffsetFreeController
from stimsteer.sysid import Session, StateSpaceModel
from stimsteer.sysid.exceptions import InvalidParameterError, SessionError

DIST = np.array([0.3, -0.2])


class _DisturbedPlant:
    """A noise-free state-space plant whose measured output carries an extra disturbance d(k)."""

    def __init__(self, model, d):
        self.model, self.d = model, d
        self.n_inputs, self.n_outputs, self.sample_rate_hz = model.n_inputs, model.n_outputs, 100.0
        self.reset()

    def reset(self, seed=None, x0=None):
        self.x, self.k = np.zeros(self.model.n_states), 0

    def step(self, u):
        y = self.model.C @ self.x + self.model.D @ u + self.d(self.k)
        self.x = self.model.A @ self.x + self.model.B @ u
        self.k += 1
        return y


@pytest.fixture(scope="module")
def system():
    rng = np.random.default_rng(11)
    n, m, p = 3, 2, 2
    A = rng.normal(size=(n, n))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.normal(size=(n, m)), C=rng.normal(size=(p, n)), past_steps=n)
    x = np.linalg.solve(np.eye(n) - A, model.B @ np.array([0.5, -0.4]))
    u = rng.uniform(-1, 1, size=(400, m))
    session = Session(u=u, y=model.simulate(u), sample_rate_hz=100.0, input_names=model.input_names,
                      output_names=model.output_names)
    return model, model.C @ x, session


LIM = StimLimits(amplitude_min_ua=[-3.0, -3.0], amplitude_max_ua=[3.0, 3.0], slew_max_ua=[0.5, 0.5])


def _controllers(system):
    from stimsteer.sysid.datadriven import HankelPredictor, LsqPredictor

    model, _, session = system
    yield "model", ModelPredictiveController(model=model, limits=LIM, horizon_steps=10, input_weight=1e-2).fit()
    deepc = HankelPredictor(past_steps=3, horizon_steps=8, lambdas_g=(1e-6,)).fit(session)
    yield "deepc", DataPredictiveController(predictor=deepc, limits=LIM, input_weight=1e-2).fit()
    lsq = LsqPredictor(past_steps=3, horizon_steps=8).fit(session)
    yield "spc", DataPredictiveController(predictor=lsq, limits=LIM, input_weight=1e-2).fit()


@pytest.mark.parametrize("route", ["model", "deepc", "spc"])
def test_constant_output_disturbance_leaves_no_steady_error(system, route):
    model, r, _ = system
    ctrl = dict(_controllers(system))[route]
    plant = _DisturbedPlant(model, lambda k: DIST)
    plain = run_closed_loop(ctrl, plant, n_steps=200, target=r)
    # the plain regulator keeps an offset of the order of the unmodelled disturbance (Muske & Badgwell 2002)
    assert np.abs(plain.tracking_error[-20:]).max() > 0.2 * np.abs(DIST).min()
    free = OffsetFreeController(ctrl)
    res = run_closed_loop(free, plant, n_steps=200, target=r)
    assert np.abs(res.tracking_error[-20:]).max() < 1e-6  # zero at steady state (Pannocchia & Rawlings 2003)
    assert res.violations == {"amplitude": 0, "slew": 0, "energy_budget": 0, "output_bounds": 0}
    # the estimate converged to the disturbance (the model route's model is exact)
    if route == "model":
        np.testing.assert_allclose(free.disturbance_, DIST, atol=1e-6)


def test_loop_runner_selects_offset_free_tracking(system):
    model, r, _ = system
    ctrl = dict(_controllers(system))["model"]
    res = run_closed_loop(ctrl, _DisturbedPlant(model, lambda k: DIST), n_steps=200, target=r,
                          offset_free="constant")
    assert np.abs(res.tracking_error[-20:]).max() < 1e-6
    assert res.disturbance_estimate.shape == (200, 2)
    np.testing.assert_allclose(res.disturbance_estimate[-1], DIST, atol=1e-6)
    with pytest.raises(InvalidParameterError, match="offset_free"):
        run_closed_loop(ctrl, _DisturbedPlant(model, lambda k: DIST), n_steps=5, target=r, offset_free="cubic")


def test_drifting_offset_is_tracked_and_the_ramp_model_lags_less(system):
    model, r, _ = system
    ctrl = dict(_controllers(system))["model"]
    slope = np.array([0.002, -0.001])
    plant = _DisturbedPlant(model, lambda k: slope * k)
    plain = np.abs(run_closed_loop(ctrl, plant, n_steps=300, target=r).tracking_error[-20:]).max()
    const = np.abs(run_closed_loop(OffsetFreeController(ctrl), plant, n_steps=300,
                                   target=r).tracking_error[-20:]).max()
    ramp = np.abs(run_closed_loop(OffsetFreeController(ctrl, disturbance_model="ramp"), plant, n_steps=300,
                                  target=r).tracking_error[-20:]).max()
    assert plain > 0.3  # the drift has grown to 0.6 by the end: a plain regulator follows none of it
    assert const < 0.02 * plain and ramp < 0.5 * const


def test_hard_limits_hold_when_the_disturbance_asks_for_more_than_they_allow(system):
    model, r, _ = system
    ctrl = dict(_controllers(system))["model"]
    plant = _DisturbedPlant(model, lambda k: np.array([30.0, -30.0]))  # far beyond what ±3 µA can offset
    res = run_closed_loop(OffsetFreeController(ctrl), plant, n_steps=80, target=r)
    assert res.violations["amplitude"] == res.violations["slew"] == 0
    assert np.all(np.abs(res.inputs) <= 3.0 + 1e-12)


def test_bad_settings_and_targets_are_refused(system):
    model, r, _ = system
    ctrl = dict(_controllers(system))["model"]
    with pytest.raises(InvalidParameterError, match="disturbance_model"):
        OffsetFreeController(ctrl, disturbance_model="cubic")
    with pytest.raises(InvalidParameterError, match="disturbance_gain"):
        OffsetFreeController(ctrl, disturbance_gain=0.0)
    with pytest.raises(InvalidParameterError, match="target_gain"):
        OffsetFreeController(ctrl, target_gain=2.0)
    state = ModelPredictiveController(model=model, limits=LIM, horizon_steps=5, target_kind="state").fit()
    with pytest.raises(InvalidParameterError, match="output target"):
        OffsetFreeController(state)
    with pytest.raises(SessionError, match="output target"):
        OffsetFreeController(ctrl).plan(np.zeros((3, 2)), np.zeros((3, 2)), target=np.zeros(5))


def test_reset_forgets_the_estimates(system):
    model, r, _ = system
    free = OffsetFreeController(dict(_controllers(system))["model"])
    a = run_closed_loop(free, _DisturbedPlant(model, lambda k: DIST), n_steps=30, target=r)
    b = run_closed_loop(free, _DisturbedPlant(model, lambda k: DIST), n_steps=30, target=r)
    np.testing.assert_allclose(a.inputs, b.inputs, atol=1e-7)


class _PlanClock:
    """Seconds that move by 0.1 ms per plan and not otherwise."""

    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


class _Timed:
    """A controller whose plans take 0.1 ms of ``clock``'s time."""

    def __init__(self, inner, clock):
        self._c, self._clock = inner, clock

    def __getattr__(self, name):
        return getattr(self._c, name)

    def plan(self, *args, **kw):
        self._clock.t += 1e-4
        return self._c.plan(*args, **kw)


def test_live_runner_tracks_offset_free_and_records_it(system):
    from stimsteer.control.realtime import run_live

    model, r, _ = system
    ctrl = dict(_controllers(system))["model"]
    clock = _PlanClock()  # time moves only with the plans (0.1 ms each): no deadline passes, whatever the load
    ctrl = _Timed(ctrl, clock)
    run = run_live(ctrl, _DisturbedPlant(model, lambda k: DIST), n_steps=200, target=r, pace="none",
                   offset_free="constant", calibration_steps=2, clock=clock)
    s = run.session
    start = s.metadata["warmup_samples"]
    y = s.y[start:start + 200]
    assert np.abs(y[-20:] - r).max() < 1e-6
    assert run.summary["offset_free"]["disturbance_model"] == "constant"
    np.testing.assert_allclose(run.summary["offset_free"]["disturbance_estimate"], DIST, atol=1e-6)
    assert run.summary["unchecked_inputs"] == 0
    assert not any(run.summary["delivered_violations"].values())
    assert run.summary["counts"]["overrun"] == 0 and run.summary["counts"]["planned"] == 200
