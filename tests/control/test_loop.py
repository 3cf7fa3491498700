"""Tests of stimsteer.control.loop: receding-horizon runs against plants, records and error paths."""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.loop import LoopResult, run_closed_loop
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.exceptions import LimitsError, NotFittedError, SessionError


class _ModelPlant:
    """The smallest object with the plant interface: a noise-free StateSpaceModel stepped sample by sample."""

    def __init__(self, model):
        self.model, self.n_inputs, self.n_outputs = model, model.n_inputs, model.n_outputs
        self.sample_rate_hz, self.input_names, self.output_names = 1.0, model.input_names, model.output_names
        self.reset()

    def reset(self, seed=None, x0=None):
        self.x = np.zeros(self.model.n_states) if x0 is None else np.asarray(x0, float)

    def step(self, u_k):
        y = self.model.C @ self.x + self.model.D @ u_k
        self.x = self.model.A @ self.x + self.model.B @ u_k
        return y


def _model(rng, n=3, m=2, p=2):
    A = rng.normal(size=(n, n))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(n, m)), C=rng.normal(size=(p, n)), past_steps=n)


LIM = StimLimits(amplitude_min_ua=[-1.0, -1.0], amplitude_max_ua=[1.0, 1.0], slew_max_ua=[0.3, 0.3])


def _reachable_target(model, u_ss):
    """Steady-state output of a constant input (inside the limits), so exact tracking is possible."""
    x = np.linalg.solve(np.eye(model.n_states) - model.A, model.B @ u_ss)
    return model.C @ x


def test_noise_free_loop_reaches_a_reachable_target_without_violations(rng):
    model = _model(rng)
    target = _reachable_target(model, np.array([0.9, -0.8]))
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=10, input_weight=1e-6,
                                     terminal_weight="riccati").fit()
    res = run_closed_loop(ctrl, _ModelPlant(model), n_steps=60, target=target)
    assert isinstance(res, LoopResult) and res.n_steps == 60
    assert res.violations == {"amplitude": 0, "slew": 0, "energy_budget": 0, "output_bounds": 0}
    np.testing.assert_allclose(res.outputs[-5:], np.tile(target, (5, 1)), atol=1e-3)
    assert res.limit_use["slew"] > 0  # the first moves ramp up at the slew limit
    assert res.energy_ua2 == pytest.approx(float(np.sum(res.inputs**2)))
    np.testing.assert_allclose(res.tracking_error, res.outputs - res.targets)
    assert res.solve_time_s.shape == (60,) and set(res.statuses) <= {"optimal", "optimal_inaccurate"}
    assert res.summary()["n_fallback"] == 0


def test_loop_on_a_noisy_network_plant_respects_limits_and_is_reproducible(rng):
    model = _model(rng)
    plant = LinearNetworkPlant(model.A, model.B, model.C, process_noise_std=0.05, measurement_noise_std=0.05)
    lim = StimLimits(amplitude_min_ua=[-1.0, 0.0], amplitude_max_ua=[1.0, 0.5], slew_max_ua=[0.2, 0.1],
                     energy_budget_ua2=3.0, output_max=[0.2, np.inf])
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=8, input_weight=1e-3).fit()
    a = run_closed_loop(ctrl, plant, n_steps=25, target=np.array([1.0, -1.0]), seed=7)
    b = run_closed_loop(ctrl, plant, n_steps=25, target=np.array([1.0, -1.0]), seed=7)
    assert a.violations["amplitude"] == a.violations["slew"] == a.violations["energy_budget"] == 0
    np.testing.assert_allclose(a.inputs, b.inputs, atol=1e-8)
    np.testing.assert_array_equal(a.outputs[:5], b.outputs[:5])
    assert a.seed == 7


def test_fast_and_cvxpy_loops_apply_the_same_inputs(rng):
    model = _model(rng)
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=6, input_weight=0.01).fit()
    traj = np.column_stack([np.sin(np.arange(40) / 4), np.cos(np.arange(40) / 5)])
    a = run_closed_loop(ctrl, _ModelPlant(model), n_steps=30, target=traj, use_fast_path=True)
    b = run_closed_loop(ctrl, _ModelPlant(model), n_steps=30, target=traj, use_fast_path=False)
    np.testing.assert_allclose(a.inputs, b.inputs, atol=1e-5)
    np.testing.assert_array_equal(a.targets, traj[:30])


def test_state_target_loop_reports_output_targets_of_the_model(rng):
    model = _model(rng)
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=6, target_kind="state").fit()
    x_star = np.array([0.2, -0.1, 0.05])
    res = run_closed_loop(ctrl, _ModelPlant(model), n_steps=5, target=x_star)
    np.testing.assert_allclose(res.targets, np.tile(model.C @ x_star, (5, 1)))


def test_warmup_inputs_fill_the_past_window(rng):
    model = _model(rng)
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=4).fit()
    warm = np.full((5, 2), 0.5)
    res = run_closed_loop(ctrl, _ModelPlant(model), n_steps=3, target=np.zeros(2), warmup_inputs=warm)
    np.testing.assert_array_equal(res.warmup_inputs, warm)
    assert abs(res.inputs[0] - 0.5).max() <= 0.3 + 1e-12  # slew counted from the last warm-up input


def test_bad_loop_arguments_are_refused(rng):
    model = _model(rng)
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=4)
    with pytest.raises(NotFittedError, match="not fitted"):
        run_closed_loop(ctrl, _ModelPlant(model), n_steps=3, target=np.zeros(2))
    ctrl.fit()
    plant = _ModelPlant(model)
    with pytest.raises(SessionError, match="n_steps must be at least 1"):
        run_closed_loop(ctrl, plant, n_steps=0, target=np.zeros(2))
    with pytest.raises(SessionError, match="the plant has 1 inputs"):
        other = _ModelPlant(StateSpaceModel(A=[[0.5]], B=[[1.0]], C=[[1.0], [1.0]]))
        run_closed_loop(ctrl, other, n_steps=3, target=np.zeros(2))
    with pytest.raises(SessionError, match=r"must have shape \(>= 12, 2\)"):
        run_closed_loop(ctrl, plant, n_steps=9, target=np.zeros((10, 2)))
    with pytest.raises(SessionError, match="one value per output"):
        run_closed_loop(ctrl, plant, n_steps=3, target=np.zeros(3))
    with pytest.raises(SessionError, match="warmup_inputs must have shape"):
        run_closed_loop(ctrl, plant, n_steps=3, target=np.zeros(2), warmup_inputs=np.zeros((1, 2)))
    with pytest.raises(LimitsError, match="outside the amplitude window"):
        run_closed_loop(ctrl, plant, n_steps=3, target=np.zeros(2), warmup_inputs=np.full((3, 2), 2.0))
    with pytest.raises(SessionError, match="NaN or infinite"):
        run_closed_loop(ctrl, plant, n_steps=2, target=np.full((5, 2), np.nan))
    state = ModelPredictiveController(model=model, limits=LIM, horizon_steps=4, target_kind="state").fit()
    with pytest.raises(SessionError, match=r"a state target must have shape \(3,\)"):
        run_closed_loop(state, plant, n_steps=2, target=np.zeros(2))


def test_a_data_controller_runs_the_loop_and_set_params_asks_for_a_new_fit(rng):
    # the loop reads only what every controller declares (target_kind_, past_steps_, limits_, ...): here the
    # linear-map controller of a least-squares predictor fitted on noise-free data of the plant
    from stimsteer.control.mpc import controller_for
    from stimsteer.sysid import LsqPredictor, Session

    model = _model(rng)
    u = rng.uniform(-1, 1, size=(400, 2))
    session = Session(u=u, y=model.simulate(u), sample_rate_hz=1.0)
    pred = LsqPredictor(past_steps=3, horizon_steps=8, alphas=(1e-8,)).fit(session)
    ctrl = controller_for(pred, LIM, input_weight=1e-6)
    assert ctrl.target_kind_ == "output" and ctrl.method_ == "spc"
    target = _reachable_target(model, np.array([0.5, -0.4]))
    res = run_closed_loop(ctrl, _ModelPlant(model), n_steps=40, target=target)
    assert res.violations == {"amplitude": 0, "slew": 0, "energy_budget": 0, "output_bounds": 0}
    np.testing.assert_allclose(res.outputs[-3:], np.tile(target, (3, 1)), atol=1e-2)
    ctrl.set_params(input_weight=1e-3)
    with pytest.raises(NotFittedError, match="input_weight of this DataPredictiveController changed after it was "
                                             "fitted"):
        run_closed_loop(ctrl, _ModelPlant(model), n_steps=2, target=target)
