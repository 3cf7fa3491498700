"""The Riccati terminal cost with a non-zero target: the plan equals the LQR tracking law for any horizon.

Source: Rawlings J.B., Mayne D.Q., Diehl M.M. (2017), Model Predictive Control: Theory, Computation, and Design,
2nd ed., ch. 1 (the infinite-horizon LQR from the discrete algebraic Riccati equation, dynamic programming, and the
steady-state target calculation of Sec. 1.5). The gain comes from scipy.linalg.solve_discrete_are; the steady state
from a least-squares solve written here (not the controller's own code).
"""

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc.model import ModelPredictiveController
from stimsteer.sysid import StateSpaceModel


def _model(rng, n=4, m=2, p=3, d=False):
    A = rng.standard_normal((n, n))
    A *= 0.85 / np.max(np.abs(np.linalg.eigvals(A)))
    D = 0.2 * rng.standard_normal((p, m)) if d else None
    return StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)), D=D)


def _lqr_tracking(model, Q, R, r):
    """u = u_s - K (x - x_s): K from the DARE, (x_s, u_s) minimising |C x + D u - r|²_Q + |u|²_R at equilibrium."""
    A, B, C, D = (np.asarray(M) for M in (model.A, model.B, model.C, model.D))
    n, m = B.shape
    P = sla.solve_discrete_are(A, B, C.T @ Q @ C, R + D.T @ Q @ D, s=C.T @ Q @ D)
    K = np.linalg.solve(R + D.T @ Q @ D + B.T @ P @ B, B.T @ P @ A + D.T @ Q @ C)
    # equilibria x = (I - A)^-1 B u: minimise over u alone (A is stable, so I - A is invertible)
    Gu = C @ np.linalg.solve(np.eye(n) - A, B) + D
    us = np.linalg.solve(Gu.T @ Q @ Gu + R, Gu.T @ Q @ r)
    xs = np.linalg.solve(np.eye(n) - A, B @ us)
    return us, xs, K


@pytest.mark.parametrize("with_d", [False, True])
@pytest.mark.parametrize("horizon", [1, 2, 5, 15])
def test_first_move_equals_the_lqr_tracking_law_for_any_horizon(rng, horizon, with_d):
    model = _model(rng, d=with_d)
    limits = StimLimits(amplitude_min_ua=-1e6, amplitude_max_ua=1e6, n_inputs=2)
    ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=horizon, terminal_weight="riccati",
                                     input_weight=0.05, fast_path=False,
                                     solver_options={"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12,
                                                     "tol_feas": 1e-12}).fit()
    r = np.array([1.5, -0.7, 0.4])
    past = max(ctrl.past_steps_, 1)
    u_past, y_past = rng.standard_normal((past, 2)), rng.standard_normal((past, 3))
    plan = ctrl.plan(u_past, y_past, target=r)
    x0 = model.estimate_state(u_past, y_past)
    us, xs, K = _lqr_tracking(model, 1.0 * np.eye(3), 0.05 * np.eye(2), r)
    np.testing.assert_allclose(plan.inputs[0], us - K @ (x0 - xs), rtol=1e-6, atol=1e-6)
    ss = ctrl.steady_state(r)
    np.testing.assert_allclose(ss.u, us, atol=1e-9)
    assert not ss.exact  # three outputs from two inputs: no equilibrium holds an arbitrary target


def test_first_move_no_longer_depends_on_the_horizon_with_a_non_zero_target(rng):
    # What was measured: with x_T = C⁺ r the first move changed with N. With the steady-state centre it does not.
    model = _model(rng)
    limits = StimLimits(amplitude_min_ua=-1e6, amplitude_max_ua=1e6, n_inputs=2)
    r = np.array([1.0, 0.5, -0.5])
    firsts = []
    for N in (2, 8):
        ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=N, terminal_weight="riccati",
                                         input_weight=0.05, fast_path=False).fit()
        past = max(ctrl.past_steps_, 1)
        firsts.append(ctrl.plan(np.zeros((past, 2)), np.ones((past, 3)), target=r).inputs[0])
    np.testing.assert_allclose(firsts[0], firsts[1], atol=1e-6)
    Cp = np.linalg.pinv(np.asarray(model.C))
    assert np.linalg.norm(Cp @ r - ctrl.steady_state(r).x) > 1e-2  # C⁺r is not the equilibrium


def test_steady_state_is_exact_when_inputs_can_hold_the_target(rng):
    model = _model(rng, n=3, m=2, p=2)
    limits = StimLimits(amplitude_min_ua=-1e6, amplitude_max_ua=1e6, n_inputs=2)
    ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=4, terminal_weight="riccati",
                                     input_weight=1e-9, fast_path=False).fit()
    ss = ctrl.steady_state([0.3, -0.2])
    assert ss.exact and ss.exact_residual < 1e-10
    np.testing.assert_allclose(np.asarray(model.A) @ ss.x + np.asarray(model.B) @ ss.u, ss.x, atol=1e-12)
    np.testing.assert_allclose(ss.tracked, [0.3, -0.2], atol=1e-6)


def test_steady_state_needs_the_riccati_terminal_cost(rng):
    from stimsteer.sysid import InvalidParameterError

    model = _model(rng)
    limits = StimLimits(amplitude_min_ua=-1e6, amplitude_max_ua=1e6, n_inputs=2)
    ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=4).fit()
    with pytest.raises(InvalidParameterError, match="riccati"):
        ctrl.steady_state([1.0, 0.0, 0.0])


@pytest.mark.parametrize("horizon", [1, 4, 12])
def test_state_target_first_move_equals_the_lqr_tracking_law(rng, horizon):
    # Rawlings, Mayne, Diehl (2017), ch. 1: state tracking with Q on x - x_t, the DARE gain, and the steady target
    # minimising |x_s - x_t|²_Q + |u_s|²_R over the equilibria (solved here by least squares in u_s).
    model = _model(rng)
    A, B = np.asarray(model.A), np.asarray(model.B)
    limits = StimLimits(amplitude_min_ua=-1e6, amplitude_max_ua=1e6, n_inputs=2)
    ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=horizon, terminal_weight="riccati",
                                     target_kind="state", input_weight=0.05, fast_path=False,
                                     solver_options={"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12,
                                                     "tol_feas": 1e-12}).fit()
    xt = rng.standard_normal(4)
    past = max(ctrl.past_steps_, 1)
    u_past, y_past = rng.standard_normal((past, 2)), rng.standard_normal((past, 3))
    plan = ctrl.plan(u_past, y_past, target=xt)
    x0 = model.estimate_state(u_past, y_past)
    P = sla.solve_discrete_are(A, B, np.eye(4), 0.05 * np.eye(2))
    K = np.linalg.solve(0.05 * np.eye(2) + B.T @ P @ B, B.T @ P @ A)
    G = np.linalg.solve(np.eye(4) - A, B)
    us = np.linalg.solve(G.T @ G + 0.05 * np.eye(2), G.T @ xt)
    xs = G @ us
    np.testing.assert_allclose(plan.inputs[0], us - K @ (x0 - xs), rtol=1e-6, atol=1e-6)
