"""Plans whose energy budget binds, on the dense path (control/mpc/_budget_sqp.py), against exact answers and the
cone program."""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.mpc._budget import _RollingBudget
from stimsteer.control.mpc._budget_sqp import _Windows, applies, solve_budgeted
from stimsteer.sysid import StateSpaceModel

TIGHT = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12}


def test_projection_onto_a_ball_is_exact():
    # min ½‖x − c‖² s.t. ‖x‖² <= E: the projection c·√E/‖c‖ when ‖c‖² > E (common practice, no source: the KKT
    # conditions of a ball constraint, x = c / (1 + 2μ) with ‖x‖² = E)
    c, E = np.array([3.0, -4.0]), 4.0
    budget = _RollingBudget(E, 1, 1, None)
    windows = _Windows([budget], [np.zeros(0)], 1, 2)
    x, _lam, mu = solve_budgeted(np.eye(2), -c, None, np.full(2, -10.0), np.full(2, 10.0), c.copy(), windows)
    np.testing.assert_allclose(x, c * np.sqrt(E) / np.linalg.norm(c), rtol=0, atol=1e-12)
    # μ of the row g = ‖x‖²/E: 1 + 2μ/E = ‖c‖/√E
    np.testing.assert_allclose(mu, [E * (np.linalg.norm(c) / np.sqrt(E) - 1) / 2], rtol=1e-10)


def test_a_weighted_load_is_left_to_the_cone_program():
    plain = _RollingBudget(1.0, 3, 4, None)
    weighted = _RollingBudget(1.0, 3, 4, None, linear=[1.0, 0.5], name="charge", unit="nC")
    assert applies([plain]) and not applies([plain, weighted]) and not applies([])


@pytest.fixture(scope="module")
def controller():
    rng = np.random.default_rng(11)
    A = rng.normal(size=(3, 3))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.normal(size=(3, 2)), C=rng.normal(size=(2, 3)), D=rng.normal(size=(2, 2)),
                            past_steps=3)
    # windows of 8 samples over a horizon of 6 with a slew limit: windows reaching into the past and the ramp after
    lim = StimLimits(amplitude_min_ua=[-1.0, 0.0], amplitude_max_ua=[1.0, 2.0], slew_max_ua=[0.4, 0.6],
                     energy_budget_ua2=0.8, energy_window_steps=8)
    return model, ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=0.05,
                                            solver_options=TIGHT).fit()


def test_binding_budget_plans_equal_the_cone_program(controller):
    model, ctrl = controller
    rng = np.random.default_rng(3)
    n_budget = 0
    for i in range(6):
        u = np.abs(rng.uniform(0.0, 0.3, size=(10, 2)))
        y = model.simulate(u, x0=rng.normal(size=3))
        target = [4.0 * (-1) ** i, 3.0]
        a = ctrl.plan(u, y, target=target)
        b = ctrl.plan(u, y, target=target, use_fast_path=False)
        assert a.ok and b.ok and "cvxpy" not in a.solver and b.solver.endswith("(cvxpy)")
        n_budget += a.solver.endswith("+ budget SQP")
        np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-6)
        assert a.energy_window_max_ua2 <= 0.8 * (1 + 1e-9)
        assert not any(v for v in ctrl.limits_.violations(a.inputs, u[-1], energy_window_steps=8, history=u).values())
    assert n_budget >= 4  # the budget binds on most of these plans


def test_the_cone_program_is_built_only_where_a_plan_needs_it(controller):
    model, _ = controller
    lim = StimLimits(amplitude_min_ua=[-1.0, 0.0], amplitude_max_ua=[1.0, 2.0], slew_max_ua=[0.4, 0.6],
                     energy_budget_ua2=0.8, energy_window_steps=8)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=0.05).fit()
    u = np.full((10, 2), 0.2)
    y = model.simulate(u)
    plan = ctrl.plan(u, y, target=[4.0, 3.0])
    assert plan.solver.endswith("+ budget SQP")
    assert "not built" in repr(ctrl.problem_)  # the dense path needed no cvxpy problem
    assert ctrl.problem_.is_dpp() and "not built" not in repr(ctrl.problem_)  # built at its first use
    assert ctrl.plan(u, y, target=[4.0, 3.0], use_fast_path=False).ok
