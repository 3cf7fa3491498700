"""Tests of stimsteer.control.mpc: build-once DPP problems, fast path = cvxpy path, hard limits, fallbacks."""

import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sklearn.base import clone

from stimsteer.control._energy_windows import window_energies
from stimsteer.control.cli import CAUTION
from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import (
    DataPredictiveController,
    ModelPredictiveController,
    Plan,
    condensed_prediction,
    controller_for,
)
from stimsteer.sysid import PredictionMaps, Session, StateSpaceModel
from stimsteer.sysid.exceptions import InvalidParameterError, LimitsError, NotFittedError, SessionError


def _model(rng, n=3, m=2, p=2, radius=0.85, D=False):
    A = rng.normal(size=(n, n))
    A *= radius / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(n, m)), C=rng.normal(size=(p, n)),
                           D=rng.normal(size=(p, m)) if D else None, past_steps=n)


def _limits(**kw):
    base = dict(amplitude_min_ua=[-1.0, 0.0], amplitude_max_ua=[1.0, 2.0], slew_max_ua=[0.4, 0.6])
    base.update(kw)
    return StimLimits(**base)


def _past(rng, model, T=None, scale=0.3):
    T = model.past_steps if T is None else T
    u = rng.uniform(-scale, scale, size=(T, model.n_inputs))
    u[:, 1] = np.abs(u[:, 1])
    y = model.simulate(u, x0=rng.normal(size=model.n_states))
    return u, y


def _assert_inside(plan, lim):
    lo, hi = lim.input_bounds()
    assert np.all(plan.inputs >= lo) and np.all(plan.inputs <= hi)
    assert lim.violations(plan.inputs, plan.last_input) == {"amplitude": 0, "slew": 0, "energy_budget": 0}


# ------------------------------------------------------------------------------------------------ construction
def test_problem_is_built_once_and_is_dpp(rng):
    model = _model(rng)
    for form in ("condensed", "sparse"):
        ctrl = ModelPredictiveController(model=model, limits=_limits(output_max=[0.5, np.inf]), horizon_steps=5,
                                         terminal_weight="riccati", formulation=form).fit()
        assert ctrl.problem_.is_dpp()
        problem = ctrl.problem_
        u, y = _past(rng, model)
        ctrl.plan(u, y, target=[0.3, -0.2])
        ctrl.plan(u, y, target=[0.1, 0.2], use_fast_path=False)
        assert ctrl.problem_ is problem


def test_constructor_only_stores_and_get_params_round_trips(rng):
    model, lim = _model(rng), _limits()
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=-3, target_kind="nonsense")
    params = ctrl.get_params()
    assert params["horizon_steps"] == -3 and params["model"] is model
    clone = ModelPredictiveController(**params)
    assert clone.get_params() == params
    assert "ModelPredictiveController(" in repr(ctrl)
    with pytest.raises(NotFittedError, match="call ModelPredictiveController.fit"):
        ctrl.plan(np.zeros((3, 2)), np.zeros((3, 2)), target=[0, 0])


def test_fitting_twice_gives_the_same_plan_and_inputs_are_untouched(rng):
    model = _model(rng)
    u, y = _past(rng, model)
    u0, y0 = u.copy(), y.copy()
    ctrl = ModelPredictiveController(model=model, limits=_limits(), horizon_steps=4)
    a = ctrl.fit().plan(u, y, target=[0.5, 0.5])
    b = ctrl.fit().plan(u, y, target=[0.5, 0.5])
    np.testing.assert_array_equal(a.inputs, b.inputs)
    np.testing.assert_array_equal(u, u0)
    np.testing.assert_array_equal(y, y0)


@pytest.mark.parametrize(
    "kw, match",
    [
        (dict(horizon_steps=0), "horizon_steps must be a positive integer"),
        (dict(horizon_steps=2.5), "horizon_steps must be a positive integer"),
        (dict(target_kind="outputs"), "target_kind must be"),
        (dict(formulation="dense"), "formulation must be"),
        (dict(terminal_weight="lqr"), "terminal_weight must be None, 'riccati'"),
        (dict(output_weight=-1.0), "output_weight must be a non-negative"),
        (dict(input_weight=np.array([[1.0, 2.0], [0.0, 1.0]])), "must be symmetric"),
        (dict(input_weight=np.array([[1.0, 0.0], [0.0, -1.0]])), "positive semidefinite"),
        (dict(output_penalty=0.0), "output_penalty must be positive"),
        (dict(limits="limits.toml"), "limits must be a StimLimits"),
        (dict(model="model.h5"), "model must have a state-space form"),
    ],
)
def test_bad_settings_are_refused_at_fit(rng, kw, match):
    args = dict(model=_model(rng), limits=_limits(), horizon_steps=3)
    args.update(kw)
    with pytest.raises(InvalidParameterError, match=match):
        ModelPredictiveController(**args).fit()


def test_limits_for_other_inputs_are_refused(rng):
    lim = _limits(input_names=("a", "b"))
    with pytest.raises(LimitsError, match="do not match the model's inputs"):
        ModelPredictiveController(model=_model(rng), limits=lim, horizon_steps=3).fit()


def test_session_with_other_channels_is_refused(rng):
    s = Session(u=np.zeros((10, 1)), y=np.zeros((10, 2)), sample_rate_hz=1.0)
    with pytest.raises(SessionError, match="the session has 1 inputs"):
        ModelPredictiveController(model=_model(rng), limits=_limits(), horizon_steps=3).fit(s)


@pytest.mark.parametrize(
    "u_shape, y_shape, target, last, match",
    [
        ((2, 2), (3, 2), [0, 0], None, "u_past needs at least 3 samples"),
        ((3, 1), (3, 2), [0, 0], None, r"u_past must have shape \(n_past, 2\)"),
        ((3, 2), (3, 2), [0, 0, 0], None, "one value per output"),
        ((3, 2), (3, 2), np.zeros((2, 2)), None, "target trajectory must have shape"),
        ((3, 2), (3, 2), [np.nan, 0], None, "NaN or infinite"),
        ((3, 2), (3, 2), [0, 0], [1.0], "last_input must be 2 finite values"),
    ],
)
def test_bad_plan_arguments_are_refused(rng, u_shape, y_shape, target, last, match):
    ctrl = ModelPredictiveController(model=_model(rng), limits=_limits(), horizon_steps=4).fit()
    with pytest.raises(SessionError, match=match):
        ctrl.plan(np.zeros(u_shape), np.zeros(y_shape), target=target, last_input=last)


def test_nan_in_the_past_window_is_refused(rng):
    ctrl = ModelPredictiveController(model=_model(rng), limits=_limits(), horizon_steps=4).fit()
    y = np.zeros((3, 2))
    y[-1, 0] = np.nan
    with pytest.raises(SessionError, match="y_past holds NaN"):
        ctrl.plan(np.zeros((3, 2)), y, target=[0, 0])


def test_state_target_shape_is_checked(rng):
    ctrl = ModelPredictiveController(model=_model(rng), limits=_limits(), horizon_steps=4, target_kind="state").fit()
    with pytest.raises(SessionError, match="a state target must be 3 finite values"):
        ctrl.plan(np.zeros((3, 2)), np.zeros((3, 2)), target=[0.0, 1.0])


# ------------------------------------------------------------------------------------------------ prediction
def test_condensed_prediction_matches_simulation(rng):
    model = _model(rng, n=4, m=2, p=3, D=True)
    N = 6
    Gy, Phi_y, Gx, Phi_x = condensed_prediction(model, N)
    u, x0 = rng.normal(size=(N, 2)), rng.normal(size=4)
    y, X = model.simulate(u, x0=x0, return_states=True)
    np.testing.assert_allclose(Gy @ u.reshape(-1) + Phi_y @ x0, y.reshape(-1), atol=1e-12)
    np.testing.assert_allclose(Gx @ u.reshape(-1) + Phi_x @ x0, X[1:].reshape(-1), atol=1e-12)


def test_plan_predicts_what_the_model_simulates(rng):
    model = _model(rng)
    u, y = _past(rng, model)
    ctrl = ModelPredictiveController(model=model, limits=_limits(), horizon_steps=6).fit()
    plan = ctrl.plan(u, y, target=[1.0, -1.0])
    np.testing.assert_allclose(plan.predicted_outputs, model.predict(u, y, plan.inputs), atol=1e-10)
    assert isinstance(plan, Plan) and plan.caution == CAUTION and plan.ok
    assert plan.inputs.shape == (6, 2) and plan.target.shape == (6, 2)
    with pytest.raises(ValueError):
        plan.inputs[0, 0] = 1.0  # read-only


# ------------------------------------------------------------------------------------------------ fast = cvxpy
def _compare_paths(ctrl, u, y, target, atol=1e-5):
    a = ctrl.plan(u, y, target=target, use_fast_path=False)
    b = ctrl.plan(u, y, target=target, use_fast_path=True)
    assert a.ok and b.ok, (a.message, b.message)
    assert ("OSQP" in b.solver or "DAQP" in b.solver) and "cvxpy" in a.solver  # the fast path: OSQP or dense DAQP
    np.testing.assert_allclose(a.inputs, b.inputs, atol=atol)
    assert a.cost_terms["total"] == pytest.approx(b.cost_terms["total"], rel=1e-6, abs=1e-9)
    for key in ("amplitude_min", "amplitude_max", "slew"):
        np.testing.assert_array_equal(a.active_limits[key], b.active_limits[key])
    return a, b


@pytest.mark.parametrize("form", ["condensed", "sparse"])
def test_fast_path_gives_the_same_plan_as_cvxpy(rng, form):
    model = _model(rng, n=4, m=2, p=3)
    lim = _limits(output_max=[0.4, np.inf, 0.3], output_min=[-np.inf, -0.2, -np.inf])
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=8, input_weight=0.1,
                                     terminal_weight="riccati", formulation=form).fit()
    u, y = _past(rng, model, T=6)
    target = rng.normal(size=(8, 3))
    a, _ = _compare_paths(ctrl, u, y, target)
    assert any(a.active_limits[k].any() for k in ("amplitude_min", "amplitude_max", "slew"))


def test_fast_path_gives_the_same_plan_for_a_state_target(rng):
    model = _model(rng)
    ctrl = ModelPredictiveController(model=model, limits=_limits(), horizon_steps=6, target_kind="state",
                                     state_weight=[1.0, 2.0, 0.5], terminal_weight="riccati").fit()
    u, y = _past(rng, model)
    _compare_paths(ctrl, u, y, np.array([1.0, -0.5, 2.0]))


def test_sparse_and_condensed_formulations_agree(rng):
    model = _model(rng)
    u, y = _past(rng, model)
    plans = [ModelPredictiveController(model=model, limits=_limits(energy_budget_ua2=1.5), horizon_steps=7,
                                       formulation=f, input_weight=0.05).fit().plan(u, y, target=[2.0, 2.0])
             for f in ("condensed", "sparse")]
    assert all(p.ok for p in plans)
    np.testing.assert_allclose(plans[0].inputs, plans[1].inputs, atol=1e-5)


# ------------------------------------------------------------------------------------------------ limits
def test_energy_budget_is_a_hard_cone_constraint(rng):
    model = _model(rng)
    u, y = _past(rng, model)
    lim = _limits(energy_budget_ua2=0.5)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=1e-4).fit()
    plan = ctrl.plan(u, y, target=[5.0, 5.0])
    # the budget binds, so the budget-free fast QP's answer is refused and the dense budget iteration solves the
    # problem with it; the cone program (the plain path) is its reference
    assert plan.ok and plan.solver.endswith("+ budget SQP")
    assert np.sum(plan.inputs**2) <= 0.5 * (1 + 1e-9)
    assert plan.active_limits["energy_budget"]
    _assert_inside(plan, lim)
    cone = ctrl.plan(u, y, target=[5.0, 5.0], use_fast_path=False)
    assert cone.ok and cone.solver.endswith("(cvxpy)")
    # the same optimum: the last input moves no output here (D = 0), so the cost is nearly flat in it and the
    # interior-point answer leaves it at 8e-3 where the exact optimum is 0; the costs agree to rounding
    cost, ref = plan.cost_terms["total"], cone.cost_terms["total"]
    assert cost <= ref * (1 + 1e-10) and cost >= ref * (1 - 1e-9)
    np.testing.assert_allclose(plan.inputs[:-1], cone.inputs[:-1], atol=1e-5)


def test_a_budget_that_does_not_bind_keeps_the_fast_answer_which_equals_the_cone_program(rng):
    # a convex problem whose constraint is inactive at the optimum of the problem without it has that same optimum
    # (Boyd & Vandenberghe 2004, Convex Optimization, sec. 5.5: complementary slackness with a zero multiplier)
    model = _model(rng)
    u, y = _past(rng, model)
    lim = _limits(energy_budget_ua2=1e6)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=0.1).fit()
    # the cone program is solved by an interior-point method, the QP by OSQP: equal to their tolerances
    plain, fast = _compare_paths(ctrl, u, y, np.array([0.2, -0.1]), atol=1e-4)
    assert fast.solver in ("OSQP (reused)", "DAQP (dense, warm)") and not fast.active_limits["energy_budget"]
    _assert_inside(fast, lim)


def test_charge_density_bound_is_reported_as_its_own_limit():
    model = StateSpaceModel(A=[[0.5]], B=[[1.0, 1.0]], C=[[1.0]], D=[[1.0, 1.0]], past_steps=1)
    # areas 1 and 1e-8 cm², 1000 µs: I_max = sqrt(10**1.75 · A) / 1000 µs (Shannon 1992 solved for Q, Q = I·PW):
    # about 7,500 µA (above the declared 1 µA) and 0.75 µA (below the declared 2 µA)
    lim = _limits(pulse_width_us=1000.0, electrode_area_cm2=[1.0, 1e-8], slew_max_ua=None)
    cap = lim.charge_bound_ua()[1]
    assert cap == pytest.approx(np.sqrt(10**1.75 * 1e-8) / 1000.0 * 1e6)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=3, input_weight=1e-6).fit()
    plan = ctrl.plan(np.zeros((1, 2)), np.zeros((1, 1)), target=[100.0])  # far above reach: both inputs at max
    np.testing.assert_allclose(plan.inputs, [[1.0, cap]] * 3, rtol=1e-7)
    assert plan.active_limits["charge_density"][:, 1].all() and not plan.active_limits["charge_density"][:, 0].any()
    assert plan.active_limits["amplitude_max"][:, 0].all() and not plan.active_limits["amplitude_max"][:, 1].any()


def test_soft_output_bound_reports_its_slack(rng):
    model = StateSpaceModel(A=[[0.5]], B=[[1.0]], C=[[1.0]], past_steps=1)
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=1, output_max=[-2.0])
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=3).fit()
    # the past leaves the state at 0 and |u| <= 1 keeps y above -2 (y_1 >= -1, y_2 >= -1.5): the bound cannot hold
    plan = ctrl.plan(np.zeros((1, 1)), np.zeros((1, 1)), target=[0.0])
    assert plan.ok and plan.slack_total > 0
    np.testing.assert_allclose(plan.output_slack[:, 0], np.maximum(plan.predicted_outputs[:, 0] + 2.0, 0))
    # u_0 and u_1 act on y_1 and y_2 and are pushed to their lower bound; u_2 acts on no planned output
    np.testing.assert_allclose(plan.inputs[:, 0], [-1.0, -1.0, 0.0], atol=1e-6)
    assert plan.cost_terms["output_penalty"] == pytest.approx(1e4 * plan.slack_total)
    assert any("output bound on y0" in line for line in plan.active_summary())


def test_last_input_outside_bounds_is_reported_and_falls_back(rng):
    model = _model(rng)
    lim = _limits()
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=4).fit()
    u, y = _past(rng, model)
    plan = ctrl.plan(u, y, target=[0.0, 0.0], last_input=[3.0, 0.0])
    assert plan.status == "infeasible" and plan.fallback and not plan.ok
    assert "slew window of input 'u0'" in plan.message and "safe fallback" in plan.message
    np.testing.assert_allclose(plan.inputs[:, 0], [1.0, 0.6, 0.2, 0.0])
    assert lim.violations(plan.inputs)["amplitude"] == 0


def test_energy_conflict_is_reported_with_the_least_energy_sequence(rng):
    model = _model(rng)
    lim = _limits(energy_budget_ua2=0.1)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=4).fit()
    u, y = _past(rng, model)
    plan = ctrl.plan(u, y, target=[0.0, 0.0], last_input=[1.0, 2.0])
    assert plan.status == "infeasible" and "energy budget" in plan.message
    np.testing.assert_allclose(plan.inputs, lim.safe_inputs(4, [1.0, 2.0]))


def test_a_failing_solver_gives_the_fallback_with_the_reason(rng):
    model = _model(rng)
    ctrl = ModelPredictiveController(model=model, limits=_limits(), horizon_steps=4, solver="SCS",
                                     solver_options={"max_iters": 1}).fit()
    u, y = _past(rng, model)
    plan = ctrl.plan(u, y, target=[3.0, 3.0], use_fast_path=False)
    assert plan.fallback and plan.status in ("failed", "infeasible")
    assert "SCS" in plan.message or "breaks a hard limit" in plan.message
    _assert_inside(plan, _limits())


def test_projection_clips_tolerance_level_excess_only(rng):
    model = _model(rng)
    lim = _limits()
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=3).fit()
    lb, ub, _ = ctrl._step_bounds(np.zeros(2))
    ctrl._hist = None if ctrl._budget is None else ctrl._budget.history(np.zeros((1, 2)))  # planned from rest
    safe = lim.safe_inputs(3, np.zeros(2))
    near = np.array([[0.4 + 1e-7, 0.0], [0.8, 0.5], [1.0 + 1e-8, 0.5]])
    u, why = ctrl._project(near, lb, ub, np.zeros(2), safe)
    assert why == "" and lim.violations(u, np.zeros(2)) == {"amplitude": 0, "slew": 0, "energy_budget": 0}
    u, why = ctrl._project(near + 0.1, lb, ub, np.zeros(2), safe)
    assert u is None and "breaks a hard limit" in why


# ------------------------------------------------------------------------------------------------ direct route
class _Lsq:
    """A fitted linear predictor (the LinearPredictor protocol, nothing else) built from a known model: its maps
    are the model's exact multi-step maps (the subspace predictive control of a noise-free system)."""

    has_linear_maps = True

    def __init__(self, model, past, horizon):
        self.past_steps_, self.max_horizon_steps_ = past, horizon
        self.n_inputs_, self.n_outputs_ = model.n_inputs, model.n_outputs
        self.input_names_, self.output_names_ = model.input_names, model.output_names
        self._model = model
        m, p = model.n_inputs, model.n_outputs
        cols = []
        for j in range((m + p) * past):  # the predictor is linear in the past: probe it column by column
            b = np.zeros((m + p) * past)
            b[j] = 1.0
            cols.append(model.predict(b[:m * past].reshape(past, m), b[m * past:].reshape(past, p),
                                      np.zeros((horizon, m))).reshape(-1))
        self._Kp = np.array(cols).T
        self._Kf = condensed_prediction(model, horizon)[0]

    def prediction_maps(self, past_steps, horizon_steps):
        assert past_steps == self.past_steps_
        m, p, N = self.n_inputs_, self.n_outputs_, horizon_steps
        return PredictionMaps(P=self._Kp[:p * N], F=self._Kf[:p * N, :m * N], c=np.zeros(p * N),
                              past_steps=past_steps, horizon_steps=N)

    def predict(self, u_past, y_past, u_future):
        return self.prediction_maps(self.past_steps_, len(u_future)).apply(u_past, y_past, u_future)

    def predict_many(self, u_past, y_past, u_future):
        return np.stack([self.predict(a, b, c) for a, b, c in zip(u_past, y_past, u_future)])

    def rest_window(self):
        return np.zeros((self.past_steps_, self.n_inputs_)), np.zeros((self.past_steps_, self.n_outputs_))


def test_spc_controller_equals_the_indirect_one_with_the_same_predictor(rng):
    model = _model(rng)
    lim = _limits(output_max=[0.5, np.inf])
    spc = DataPredictiveController(predictor=_Lsq(model, 3, 6), limits=lim, input_weight=0.1).fit()
    ind = ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=0.1).fit()
    assert spc.method_ == "spc" and spc.problem_.is_dpp() and spc.horizon_steps_ == 6
    u, y = _past(rng, model)
    for fast in (True, False):
        a = spc.plan(u, y, target=[1.0, -1.0], use_fast_path=fast)
        b = ind.plan(u, y, target=[1.0, -1.0], use_fast_path=fast)
        np.testing.assert_allclose(a.inputs, b.inputs, atol=1e-5)
        np.testing.assert_allclose(a.predicted_outputs, b.predicted_outputs, atol=1e-5)


def test_direct_controller_refuses_other_objects_and_long_horizons(rng):
    model = _model(rng)
    not_a_predictor = type("P", (), {"past_steps_": 2})()
    with pytest.raises(InvalidParameterError, match=r"needs a predictor with data_blocks\(\) .* which has no predict"):
        DataPredictiveController(predictor=not_a_predictor, limits=_limits()).fit()
    with pytest.raises(InvalidParameterError, match="exceeds the predictor's horizon of 6"):
        DataPredictiveController(predictor=_Lsq(model, 3, 6), limits=_limits(), horizon_steps=7).fit()


def test_direct_controller_needs_a_fitted_predictor_or_a_session():
    from stimsteer.sysid.datadriven import LsqPredictor

    with pytest.raises(NotFittedError, match="pass a session"):
        DataPredictiveController(predictor=LsqPredictor(past_steps=2, horizon_steps=3), limits=_limits()).fit()


def _noise_free_session(rng, model, T=300):
    u = rng.uniform(-1, 1, size=(T, model.n_inputs))
    return Session(u=u, y=model.simulate(u), sample_rate_hz=100.0, input_names=model.input_names,
                   output_names=model.output_names)


@pytest.fixture
def deepc_setup(rng):
    from stimsteer.sysid.datadriven import HankelPredictor

    model = _model(rng)
    session = _noise_free_session(rng, model)
    pred = HankelPredictor(past_steps=3, horizon_steps=6, lambdas_g=(1e-6,))
    return model, session, pred


def test_deepc_fits_an_unfitted_predictor_on_a_copy(deepc_setup, rng):
    model, session, pred = deepc_setup
    ctrl = DataPredictiveController(predictor=pred, limits=_limits(), horizon_steps=4).fit(session)
    assert getattr(pred, "blocks_", None) is None  # the caller's predictor is untouched
    assert ctrl.method_ == "deepc" and ctrl.problem_.is_dpp()
    u, y = _past(rng, model)
    plan = ctrl.plan(u, y, target=[0.5, 0.5])
    assert plan.ok and plan.inputs.shape == (4, 2)
    assert {"past_consistency", "regularizer"} <= set(plan.cost_terms)


def test_deepc_fast_path_gives_the_same_plan_as_cvxpy(deepc_setup, rng):
    model, session, pred = deepc_setup
    lim = _limits(output_max=[0.5, np.inf])
    ctrl = DataPredictiveController(predictor=pred.fit(session), limits=lim, input_weight=1.0).fit()
    u, y = _past(rng, model)
    # OSQP's polishing does not take on DeePC's equality-heavy QP, so the paths agree to ADMM tolerance
    a, _ = _compare_paths(ctrl, u, y, np.array([1.0, 0.5]), atol=2e-4)
    assert a.active_limits["output_bounds"].any()


def test_deepc_fallback_predicts_with_the_predictor(deepc_setup, rng):
    model, session, pred = deepc_setup
    pred.fit(session)
    ctrl = DataPredictiveController(predictor=pred, limits=_limits(), input_weight=0.1).fit()
    u, y = _past(rng, model)
    plan = ctrl.plan(u, y, target=[1.0, 1.0], last_input=[5.0, 0.0])
    assert plan.fallback
    np.testing.assert_allclose(plan.predicted_outputs, pred.predict(u, y, plan.inputs))


def test_bad_past_slack_weight_is_refused(deepc_setup):
    model, session, pred = deepc_setup
    with pytest.raises(InvalidParameterError, match="past_slack_weight must be > 0"):
        DataPredictiveController(predictor=pred.fit(session), limits=_limits(), past_slack_weight=-1.0).fit()


# ------------------------------------------------------------------------------------------------ property
def _property_controllers(rng):
    """A few small controllers (built once, re-solved per example), with and without each kind of limit."""
    m1 = _model(rng, n=3, m=2, p=2)
    m2 = _model(rng, n=2, m=3, p=1, D=True, radius=1.05)  # unstable: plans must still respect the limits
    from stimsteer.sysid.datadriven import HankelPredictor

    lim1 = _limits(output_max=[0.2, np.inf])
    lim3 = _limits()  # no output bounds: the DeePC fast path with g minimised out
    deepc = HankelPredictor(past_steps=3, horizon_steps=4, lambdas_g=(1e-4,)).fit(_noise_free_session(rng, m1))
    lim2 = StimLimits(amplitude_min_ua=[-2.0, -0.5, 0.0], amplitude_max_ua=[2.0, 0.5, 3.0],
                      slew_max_ua=[0.3, np.inf, 0.7], energy_budget_ua2=4.0, pulse_width_us=200.0,
                      electrode_area_cm2=[1.0, 1.0, 1e-7])
    # DeePC on its reduced form (the projection regulariser, here at any size) on noisy data (an invertible factor)
    from stimsteer.control.mpc import _deepc_elimination

    noisy = _noise_free_session(rng, m1)
    noisy = noisy.replace(y=noisy.y + 0.05 * rng.normal(size=noisy.y.shape))
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(_deepc_elimination, "REDUCED_MIN_COLUMNS", 0)
        lim4 = _limits(output_max=[0.2, np.inf], energy_budget_ua2=2.0)
        reduced = DataPredictiveController(predictor=HankelPredictor(past_steps=3, horizon_steps=4).fit(noisy),
                                           limits=lim4, input_weight=1e-2).fit()
    assert reduced._reduced is not None
    return [
        (reduced, lim4),
        (ModelPredictiveController(model=m1, limits=lim1, horizon_steps=4, input_weight=1e-3).fit(), lim1),
        (ModelPredictiveController(model=m1, limits=lim1.aligned(m1.input_names, m1.output_names),
                                   horizon_steps=3, terminal_weight="riccati", formulation="sparse").fit(), lim1),
        (ModelPredictiveController(model=m2, limits=lim2, horizon_steps=4).fit(), lim2),
        (DataPredictiveController(predictor=_Lsq(m1, 3, 4), limits=lim1, input_weight=1e-2).fit(), lim1),
        (DataPredictiveController(predictor=deepc, limits=lim3, input_weight=1e-2).fit(), lim3),
    ]


@pytest.mark.slow
def test_no_plan_sample_ever_exceeds_a_hard_limit(rng):
    ctrls = _property_controllers(rng)
    outcomes = {"ok": 0, "infeasible": 0, "failed": 0}

    @settings(max_examples=1000, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(
        which=st.integers(0, len(ctrls) - 1),
        past_scale=st.floats(1e-3, 1e3),
        target_scale=st.floats(0.0, 1e4),
        frac=st.lists(st.floats(-1.5, 1.5), min_size=3, max_size=3),
        fast=st.booleans(),
        draw_seed=st.integers(0, 2**32 - 1),
    )
    def check(which, past_scale, target_scale, frac, fast, draw_seed):
        ctrl, lim = ctrls[which]
        g = np.random.default_rng(draw_seed)
        m, p, T = ctrl.n_inputs_, ctrl.n_outputs_, ctrl.past_steps_
        u = g.normal(scale=past_scale, size=(T, m))
        y = g.normal(scale=past_scale, size=(T, p))
        lo, hi = lim.input_bounds()
        # |frac| > 1 puts the last applied input outside the amplitude window (the guarded infeasible case)
        last = np.where(np.asarray(frac[:m]) >= 0, np.asarray(frac[:m]) * hi, -np.asarray(frac[:m]) * lo)
        plan = ctrl.plan(u, y, target=g.normal(scale=target_scale + 1e-9, size=p), last_input=last,
                         use_fast_path=fast)
        assert np.all(plan.inputs >= lo) and np.all(plan.inputs <= hi)  # always, exactly
        assert plan.caution == CAUTION
        counts = lim.violations(plan.inputs, last)
        inside = np.all((last >= lo) & (last <= hi))
        if inside:
            assert counts["slew"] == 0
        energy_conflict = "energy budget" in plan.message
        W = ctrl.energy_window_steps_
        if inside and not energy_conflict and W is not None:
            assert counts["energy_budget"] == 0
            # every budget window ending in the plan, the random past counted as applied (rolling windows)
            assert np.all(window_energies(plan.inputs, W, history=u) <= lim.energy_budget_ua2 * (1 + 1e-9))
        if energy_conflict:  # the least-energy sequence (and its ramp to zero) already breaks a window
            safe = lim.safe_inputs(ctrl.horizon_steps_ + W - 1, last)
            assert np.max(window_energies(safe, W, history=u)) > lim.energy_budget_ua2
        outcomes["ok" if plan.ok else plan.status if plan.status != "optimal" else "failed"] += 1

    check()
    assert outcomes["ok"] > 0 and outcomes["infeasible"] > 0


@pytest.mark.parametrize("past_weight", [None, np.inf])
def test_deepc_eliminated_fast_path_gives_the_same_plan_as_cvxpy(deepc_setup, rng, past_weight):
    model, session, pred = deepc_setup
    ctrl = DataPredictiveController(predictor=pred.fit(session), limits=_limits(), input_weight=1.0,
                                    past_slack_weight=past_weight, horizon_steps=5).fit()
    # no output bounds and soft past outputs: g is minimised out in closed form; with hard past outputs on exact
    # data the KKT matrix is singular (Yp is rank-deficient given Up) and the g-space fast path is used
    assert (ctrl._elim is not None) == (past_weight is None)
    u, y = _past(rng, model)
    # Clarabel stops within its tolerance on DeePC's flat g-directions: the costs agree to 1e-9, inputs to 1e-4
    a, b = _compare_paths(ctrl, u, y, np.array([1.0, 0.5]), atol=1e-4)
    np.testing.assert_allclose(b.predicted_outputs, a.predicted_outputs, atol=1e-5)
    assert b.cost_terms.keys() == a.cost_terms.keys()


@pytest.mark.parametrize("bound, input_only", [(50.0, True), (0.5, False)])
def test_deepc_with_output_bounds_answers_from_the_input_only_qp_where_its_outputs_keep_them(
        deepc_setup, rng, bound, input_only):
    model, session, pred = deepc_setup
    lim = _limits(output_max=[bound, np.inf], energy_budget_ua2=50.0)
    ctrl = DataPredictiveController(predictor=pred.fit(session), limits=lim, input_weight=1.0).fit()
    assert ctrl._elim is not None and ctrl._fast_u is not ctrl._fast  # both QPs: input-only and g-space
    calls = []
    for name in ("_fast_u", "_fast"):  # count which QP answered (the g-space one only where a bound would break)
        qp = getattr(ctrl, name)
        for meth in ("solve", "solve_budgeted"):
            setattr(qp, meth, (lambda f, n: lambda *a, **k: calls.append(n) or f(*a, **k))(getattr(qp, meth), name))
    u, y = _past(rng, model)
    plan = ctrl.plan(u, y, target=[1.0, 0.5])
    assert plan.ok and ("_fast" in calls) != input_only and calls[0] == "_fast_u"
    ref = DataPredictiveController(predictor=pred, limits=lim, input_weight=1.0).fit()
    ref._fast_u = None  # the g-space QP alone, as before the input-only QP answered
    old = ref.plan(u, y, target=[1.0, 0.5])
    np.testing.assert_allclose(plan.inputs, old.inputs, atol=1e-8)
    np.testing.assert_allclose(plan.predicted_outputs, old.predicted_outputs, atol=1e-8)
    assert plan.cost_terms["total"] == pytest.approx(old.cost_terms["total"], rel=1e-10)
    assert plan.active_limits["output_bounds"].any() != input_only


def test_weights_must_be_finite_and_riccati_must_exist(rng):
    with pytest.raises(InvalidParameterError, match="input_weight must be finite"):
        ModelPredictiveController(model=_model(rng), limits=_limits(), horizon_steps=3, input_weight=np.nan).fit()
    # (A, B) not stabilisable: the unstable mode 2.0 is not driven by the input, so no Riccati solution exists
    model = StateSpaceModel(A=np.diag([2.0, 0.5]), B=[[0.0, 0.0], [1.0, 1.0]], C=np.eye(2))
    with pytest.raises(InvalidParameterError, match="no stabilising solution"):
        ModelPredictiveController(model=model, limits=_limits(), horizon_steps=3, terminal_weight="riccati").fit()


def test_output_offset_of_the_model_is_honoured(rng):
    base = _model(rng)
    off = np.array([5.0, -3.0])
    model = base.replace(info={"output_offset": off})
    u, y_dev = _past(rng, base)
    assert np.array_equal(controller_for(model, _limits(), horizon_steps=2).output_offset, off)
    y = y_dev + off  # the recording rests at the offset
    lim = _limits(output_max=[5.2, np.inf])
    plans = []
    for form in ("condensed", "sparse"):
        ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=5, formulation=form,
                                         input_weight=0.1, output_offset=off).fit()
        plans += [ctrl.plan(u, y, target=off + [0.5, 0.2], use_fast_path=f) for f in (True, False)]
    ref = ModelPredictiveController(model=base, limits=_limits(output_max=[0.2, np.inf]), horizon_steps=5,
                                    input_weight=0.1).fit()
    # each path against the same path without the offset: the dense path's exact optimum sits on the bound of
    # an input that Clarabel's answer leaves 5e-4 inside (its objective is 2e-10 higher, within its tolerance)
    expected = [ref.plan(u, y_dev, target=[0.5, 0.2], use_fast_path=f) for f in (True, False)] * 2
    for plan, expected in zip(plans, expected):  # an active soft bound (penalty 1e4): compare to 1e-4
        np.testing.assert_allclose(plan.inputs, expected.inputs, atol=1e-4)
        np.testing.assert_allclose(plan.predicted_outputs, expected.predicted_outputs + off, atol=1e-4)
    with pytest.raises(InvalidParameterError, match="output_offset must be 2 finite values"):
        ModelPredictiveController(model=base, limits=lim, horizon_steps=3, output_offset=[1.0]).fit()


def test_controller_for_picks_the_route(rng):
    model = _model(rng)
    assert isinstance(controller_for(model, _limits(), horizon_steps=3), ModelPredictiveController)
    assert controller_for(_Lsq(model, 3, 4), _limits()).method_ == "spc"
    with pytest.raises(InvalidParameterError, match="give horizon_steps"):
        controller_for(model, _limits())


def test_reset_needs_a_fitted_controller(rng):
    ctrl = ModelPredictiveController(model=_model(rng), limits=_limits(), horizon_steps=3)
    with pytest.raises(NotFittedError):
        ctrl.reset()
    assert ctrl.fit().reset() is ctrl


# ------------------------------------------------------------------------------------------------ output offsets
@pytest.mark.parametrize("kind", ["lsq", "hankel"])
@pytest.mark.parametrize("fast", [True, False])
def test_a_centred_direct_predictor_plans_in_recorded_units(rng, kind, fast):
    # The same data recorded on a baseline: a predictor built with centre_outputs must give the plan of the
    # predictor built from the centred data (same inputs), with outputs, target and output bounds in recorded
    # units. The reference is the centred session planned with the target and bounds shifted by hand.
    from stimsteer.sysid.datadriven import HankelPredictor, LsqPredictor

    model = _model(rng)
    clean = _noise_free_session(rng, model)
    base = np.array([25.0, -8.0])  # invented baseline offsets
    shifted = clean.replace(y=clean.y + base)
    make = (lambda **kw: LsqPredictor(past_steps=3, horizon_steps=6, alphas=(1e-8,), **kw)) if kind == "lsq" else \
        (lambda **kw: HankelPredictor(past_steps=3, horizon_steps=6, lambdas_g=(1e-6,), **kw))
    centred = make(centre_outputs=True).fit(shifted)
    off = centred.output_offset_
    np.testing.assert_allclose(off, shifted.y.mean(0), rtol=1e-12)
    ref_pred = make().fit(clean.replace(y=shifted.y - off))
    u, y0 = _past(rng, model)
    y = y0 + base
    np.testing.assert_allclose(centred.predict(u, y, u[:4]), ref_pred.predict(u, y - off, u[:4]) + off,
                               rtol=0, atol=1e-9)
    target = np.array([1.0, 0.5]) + base
    ymax = np.array([0.6, np.inf])
    ctrl = DataPredictiveController(predictor=centred, limits=_limits(output_max=ymax + base), input_weight=0.5,
                                    horizon_steps=5).fit()
    ref = DataPredictiveController(predictor=ref_pred, limits=_limits(output_max=ymax + base - off),
                                   input_weight=0.5, horizon_steps=5).fit()
    a = ctrl.plan(u, y, target=target, use_fast_path=fast)
    b = ref.plan(u, y - off, target=target - off, use_fast_path=fast)
    assert a.ok and b.ok
    np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-6)
    np.testing.assert_allclose(a.predicted_outputs, b.predicted_outputs + off, rtol=0, atol=1e-6)
    np.testing.assert_allclose(a.target, np.tile(target, (5, 1)), rtol=0, atol=1e-12)
    np.testing.assert_array_equal(a.active_limits["output_bounds"], b.active_limits["output_bounds"])
    assert a.active_limits["output_bounds"].any()  # the bound binds: its shift matters
    u_rest, y_rest = centred.rest_window()
    assert not u_rest.any() and np.allclose(y_rest, off)


# ------------------------------------------------------------------------------------------------ the contract
@pytest.mark.parametrize("kind", ["condensed", "sparse", "deepc", "deepc_l1", "linear_maps"])
def test_every_formulation_builds_a_dpp_problem(rng, kind):
    # DPP (cvxpy's disciplined parametrised programming) is what lets a plan only assign Parameter values
    from stimsteer.sysid import HankelPredictor, LsqPredictor

    model = _model(rng)
    lim = _limits(output_max=[0.5, np.inf], energy_budget_ua2=50.0)
    if kind in ("condensed", "sparse"):
        ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=4, formulation=kind,
                                         terminal_weight="riccati").fit()
    else:
        session = _noise_free_session(rng, model)
        pred = (LsqPredictor(past_steps=3, horizon_steps=4) if kind == "linear_maps" else
                HankelPredictor(past_steps=3, horizon_steps=4, lambdas_g=(1e-3,),
                                regularizer="l1" if kind == "deepc_l1" else "projection"))
        ctrl = DataPredictiveController(predictor=pred, limits=lim).fit(session)
        assert ctrl.method_ == ("spc" if kind == "linear_maps" else "deepc")
    assert ctrl.problem_.is_dpp()
    u, y = _past(rng, model)
    assert ctrl.plan(u, y, target=[0.3, -0.2]).ok


class _OnlyLinearMaps:
    """A predictor that offers the LinearPredictor protocol and nothing else, by wrapping a fitted LsqPredictor:
    no data blocks, no state-space form, none of the least-squares predictor's own attributes."""

    has_linear_maps = True

    def __init__(self, inner):
        self._inner = inner
        self.past_steps_, self.max_horizon_steps_ = inner.past_steps_, inner.max_horizon_steps_
        self.n_inputs_, self.n_outputs_ = inner.n_inputs_, inner.n_outputs_
        self.input_names_, self.output_names_ = inner.input_names_, inner.output_names_

    def prediction_maps(self, past_steps, horizon_steps):
        return self._inner.prediction_maps(past_steps, horizon_steps)

    def predict(self, u_past, y_past, u_future):
        return self._inner.predict(u_past, y_past, u_future)

    def predict_many(self, u_past, y_past, u_future):
        return self._inner.predict_many(u_past, y_past, u_future)

    def rest_window(self):
        return self._inner.rest_window()


@pytest.mark.parametrize("centre", [False, True])
def test_a_predictor_with_only_linear_maps_gets_the_controller_of_the_least_squares_predictor(rng, centre):
    from stimsteer.sysid import LsqPredictor

    model = _model(rng)
    session = _noise_free_session(rng, model)
    if centre:  # the maps' constant c then carries the offset
        session = session.replace(y=session.y + [25.0, -8.0])
    lsq = LsqPredictor(past_steps=3, horizon_steps=6, alphas=(1e-8,), centre_outputs=centre).fit(session)
    toy = _OnlyLinearMaps(lsq)
    lim = _limits(output_max=[0.6 + (25.0 if centre else 0.0), np.inf])
    a = controller_for(lsq, lim, horizon_steps=5, input_weight=0.5)
    b = controller_for(toy, lim, horizon_steps=5, input_weight=0.5)
    assert type(b) is DataPredictiveController and b.method_ == a.method_ == "spc" and b.problem_.is_dpp()
    u, y = _past(rng, model)
    y = y + ([25.0, -8.0] if centre else 0.0)
    for fast in (True, False):
        pa = a.plan(u, y, target=np.array([1.0, 0.5]) + (y[-1] if centre else 0.0), use_fast_path=fast)
        pb = b.plan(u, y, target=np.array([1.0, 0.5]) + (y[-1] if centre else 0.0), use_fast_path=fast)
        assert pa.ok and pb.ok
        np.testing.assert_allclose(pb.inputs, pa.inputs, rtol=0, atol=1e-9)
        np.testing.assert_allclose(pb.predicted_outputs, pa.predicted_outputs, rtol=0, atol=1e-9)
        assert pb.cost_terms == pytest.approx(pa.cost_terms, rel=1e-9, abs=1e-12)


def test_an_object_without_any_capability_is_refused_with_what_it_lacks(rng):
    class Forecaster:  # predicts, but declares no linear maps, no blocks, no state-space form
        has_linear_maps = False

        def predict(self, u_past, y_past, u_future):
            return np.zeros((len(u_future), 2))

    for obj, missing in ((Forecaster(), "which has no predict_many(), rest_window(), prediction_maps()"),
                         (object(), "which has no predict(), predict_many()")):
        with pytest.raises(InvalidParameterError, match=r"controller_for needs a predictor with state_space_model\(\)"
                           r".*" + re.escape(missing)):
            controller_for(obj, _limits(), horizon_steps=3)
        with pytest.raises(InvalidParameterError, match=re.escape(missing)):
            DataPredictiveController(predictor=obj, limits=_limits()).fit()
    lsq_like = _Lsq(_model(rng), 3, 4)
    lsq_like.has_linear_maps = False  # an affine-looking object that says it is not
    with pytest.raises(InvalidParameterError, match="whose has_linear_maps is False"):
        controller_for(lsq_like, _limits())


@pytest.mark.parametrize("kind", ["model", "data"])
def test_clone_rebuilds_an_unfitted_controller_that_plans_the_same(rng, kind, deepc_setup):
    model, session, pred = deepc_setup
    if kind == "model":
        ctrl = ModelPredictiveController(model=model, limits=_limits(), horizon_steps=4, input_weight=0.1,
                                         terminal_weight="riccati")
    else:  # clone copies the (unfitted) predictor too, as scikit-learn does for nested estimators
        ctrl = DataPredictiveController(predictor=pred, limits=_limits(), horizon_steps=4, input_weight=0.1)
    twin = clone(ctrl)
    assert type(twin) is type(ctrl) and twin is not ctrl
    assert twin.get_params(deep=False).keys() == ctrl.get_params(deep=False).keys()
    assert twin.horizon_steps == 4 and twin.input_weight == 0.1
    u, y = _past(rng, model)
    with pytest.raises(NotFittedError, match=f"call {type(ctrl).__name__}.fit"):
        twin.plan(u, y, target=[0.5, 0.5])
    a = ctrl.fit(session).plan(u, y, target=[0.5, 0.5])
    b = twin.fit(session).plan(u, y, target=[0.5, 0.5])
    np.testing.assert_allclose(b.inputs, a.inputs, rtol=0, atol=1e-12)


def test_set_params_after_fit_asks_for_a_new_fit(rng):
    model = _model(rng)
    u, y = _past(rng, model)
    ctrl = ModelPredictiveController(model=model, limits=_limits(), horizon_steps=4).fit()
    assert ctrl.set_params(horizon_steps=6) is ctrl and ctrl.get_params()["horizon_steps"] == 6
    with pytest.raises(NotFittedError, match=r"horizon_steps of this ModelPredictiveController changed after it was "
                                             r"fitted.*call ModelPredictiveController.fit\(...\) again"):
        ctrl.plan(u, y, target=[0.5, 0.5])
    with pytest.raises(NotFittedError, match="fit"):
        ctrl.reset()
    assert ctrl.fit().plan(u, y, target=[0.5, 0.5]).inputs.shape == (6, 2)
    with pytest.raises(InvalidParameterError, match="has no setting 'horizon'"):
        ctrl.set_params(horizon=3)


def test_any_state_space_form_is_a_model(rng):
    # a fitted estimator with state_space_model() plans as its realisation does
    from stimsteer.sysid import RidgeArx

    model = _model(rng)
    est = RidgeArx(output_lags=3, input_lags=3, alphas=(1e-8,)).fit(_noise_free_session(rng, model))
    a = ModelPredictiveController(model=est, limits=_limits(), horizon_steps=5).fit()
    b = ModelPredictiveController(model=est.state_space_model(), limits=_limits(), horizon_steps=5).fit()
    assert a.model is est and a.model_.n_states == b.model_.n_states and a.past_steps_ == est.past_steps_
    u, y = _past(rng, model, T=a.past_steps_)
    np.testing.assert_array_equal(a.plan(u, y, target=[0.4, 0.1]).inputs, b.plan(u, y, target=[0.4, 0.1]).inputs)


def test_the_plan_folder_workflow_lives_in_the_command_layer():
    # the numerics do not import the file workflow; its old import path still resolves to it
    import stimsteer.control.mpc as mpc
    from stimsteer.control.commands import plan as command

    assert mpc.plan_to_folder is command.plan_to_folder and mpc.write_plan is command.write_plan
    assert mpc.PlanRun is command.PlanRun
    with pytest.raises(AttributeError, match="no attribute 'plot_plan'"):
        mpc.plot_plan  # noqa: B018


def test_a_predictor_without_a_horizon_needs_one_from_the_controller(rng):
    model = _model(rng)
    anyhorizon = _Lsq(model, 3, 6)
    anyhorizon.max_horizon_steps_ = None  # the protocol's "any horizon"
    with pytest.raises(InvalidParameterError, match="predicts over any horizon.*give horizon_steps"):
        DataPredictiveController(predictor=anyhorizon, limits=_limits()).fit()
    assert DataPredictiveController(predictor=anyhorizon, limits=_limits(), horizon_steps=4).fit().horizon_steps_ == 4
