"""Soft output bounds that take slack, solved exactly on the dense path (stimsteer.control.mpc._exact_penalty).

Outside checks: a two-variable problem solved by hand (common practice, no source: the ℓ1 penalty's subgradient
condition), and the cvxpy problem of the same controller solved by Clarabel (Goulart P. J., Chen Y. (2024),
"Clarabel: an interior-point solver for conic programs with quadratic objectives", arXiv:2405.12762; another
algorithm, on the formulation with the slack variable): the dense answer's objective is never above Clarabel's
(beyond rounding) and its inputs agree to Clarabel's own accuracy.
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.mpc._exact_penalty import ExactPenaltyQP
from stimsteer.sysid import HankelPredictor, Session, StateSpaceModel

pytest.importorskip("daqp")

TIGHT = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12}


def test_two_variables_by_hand():
    # min ½‖x − (2, 2)‖² + w·max(0, x1 + x2 − 1) + 4·max(0, −0.5 − x1), x2 <= 1.2 hard: with w = 1 the first row is
    # broken (x = c − w(1, 1) = (1, 1), x1 + x2 = 2 > 1); with w = 3 it is held at x = (0.5, 0.5), multiplier 1.5
    H, A = np.eye(2), np.array([[1.0, 1.0], [1.0, 0.0]])
    lo, hi = np.array([-1e30, -1e30, -1e30, -0.5]), np.array([1e30, 1.2, 1.0, 1e30])
    qp = ExactPenaltyQP(H, A, True, soft=[2, 3], slack_col=[0, 1], slack_coef=[1.0, 1.0], n_slack=2)
    x = qp.solve(-np.array([2.0, 2.0]), lo, hi, q_t=[1.0, 4.0])
    np.testing.assert_allclose(x, [1.0, 1.0], atol=1e-12)
    np.testing.assert_allclose(qp.slack_, [1.0, 0.0], atol=1e-12)
    x = qp.solve(-np.array([2.0, 2.0]), lo, hi, q_t=[3.0, 4.0])
    np.testing.assert_allclose(x, [0.5, 0.5], atol=1e-12)
    np.testing.assert_allclose(qp.lam[2], 1.5, atol=1e-12)
    # the hard row binds and the lower soft row breaks: min ½(x1 + 3)² + ½(x2 − 2)² + 0.5·max(0, −0.5 − x1)
    x = qp.solve(np.array([3.0, -2.0]), lo, hi, q_t=[3.0, 0.5])
    np.testing.assert_allclose(x, [-2.5, 1.2], atol=1e-12)
    np.testing.assert_allclose(qp.slack_, [0.0, 2.0], atol=1e-12)


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(21)
    A = rng.normal(size=(4, 4))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(4, 2)), C=rng.normal(size=(3, 4)), past_steps=3)


def _limits(energy_budget=None):
    # narrow amplitudes: the output bounds (one above, one below) cannot be held from the pasts below
    return StimLimits(amplitude_min_ua=[-0.3, -0.3], amplitude_max_ua=[0.3, 0.3], slew_max_ua=[0.2, 0.2],
                      output_min=[-np.inf, -0.2, -np.inf], output_max=[0.2, np.inf, np.inf],
                      energy_budget_ua2=energy_budget, energy_window_steps=4 if energy_budget else None)


def _objective_matches(a, b):
    """The dense plan's objective is Clarabel's or lower (rounding), and its inputs Clarabel's to its accuracy."""
    fa, fb = a.cost_terms["total"], b.cost_terms["total"]
    assert fa <= fb + 1e-9 * abs(fb), (fa, fb)
    assert abs(fa - fb) <= 1e-7 * abs(fb), (fa, fb)
    np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-5)


@pytest.mark.parametrize("budget", [None, 0.15])  # 0.15: binding on 5 of the 6 plans
def test_bounds_that_cannot_be_held_are_softened_exactly(model, budget, monkeypatch):
    ctrl = ModelPredictiveController(model=model, limits=_limits(budget), horizon_steps=8, input_weight=1e-2,
                                     output_penalty=30.0, solver_options=TIGHT).fit()
    fast = ctrl._fast
    monkeypatch.setattr(fast._osqp, "solve", lambda *a: pytest.fail("OSQP was asked"))
    rng = np.random.default_rng(4)
    n_slack, u_scale = 0, 0.3 if budget is None else 0.05  # a past inside the budget (else no plan can meet it)
    for _ in range(6):
        u, y = rng.uniform(-u_scale, u_scale, size=(6, 2)), rng.normal(size=(3, 3)) * 3.0
        target = rng.normal(size=3) * 2.0
        a = ctrl.plan(u, y, target=target, use_fast_path=True)
        b = ctrl.plan(u, y, target=target, use_fast_path=False)
        assert a.ok and b.ok and "cvxpy" not in a.solver
        _objective_matches(a, b)
        n_slack += bool(np.max(a.output_slack) > 1e-3)
        if budget is not None:
            assert a.energy_window_max_ua2 <= budget * (1 + 1e-9)
    assert n_slack >= 2 and fast.n_exact_ >= 2  # the bounds took slack, solved by the exact QP


def test_deepc_soft_bounds_in_its_reduced_weights(model):
    u = np.random.default_rng(2).uniform(-1, 1, size=(300, 2))
    y = model.simulate(u) + 1e-3 * np.random.default_rng(3).normal(size=(300, 3))
    pred = HankelPredictor(past_steps=3, horizon_steps=6).fit(Session(u=u, y=y, sample_rate_hz=100.0))
    ctrl = DataPredictiveController(predictor=pred, limits=_limits(), input_weight=1e-2, output_penalty=30.0,
                                    solver_options=TIGHT).fit()
    rng = np.random.default_rng(8)
    for _ in range(3):
        up, yp = rng.uniform(-0.3, 0.3, size=(3, 2)), rng.normal(size=(3, 3))
        a = ctrl.plan(up, yp, target=[2.0, -2.0, 0.0], use_fast_path=True)
        b = ctrl.plan(up, yp, target=[2.0, -2.0, 0.0], use_fast_path=False)
        assert a.ok and b.ok and "cvxpy" not in a.solver
        _objective_matches(a, b)
    assert ctrl._fast.n_exact_ >= 1
