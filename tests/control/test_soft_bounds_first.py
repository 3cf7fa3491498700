"""Soft output bounds on the dense fast path (stimsteer.control.mpc.fastqp._DenseSoftQP): the dense QP with the
output bounds held hard is kept where its multipliers price each bound within its penalty, else the exact penalty
QP solves the problem with the slack (OSQP only where that does not settle). DeePC's g-space problem goes the same
way after its equalities are eliminated.

Outside check: plans equal the cvxpy problem solved by CLARABEL (an interior-point solver, another algorithm) with
tight tolerances, to 1e-6, whether a bound binds or not (common practice, no source: KKT conditions; an exact penalty
above the constraint's multiplier leaves the constraint hard).
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.mpc.fastqp import _DenseSoftQP
from stimsteer.sysid import HankelPredictor, LsqPredictor, Session, StateSpaceModel

pytest.importorskip("daqp")

TIGHT = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12}


def _limits(ymax, energy_budget=None):
    return StimLimits(amplitude_min_ua=[-2.0, -2.0], amplitude_max_ua=[2.0, 2.0], slew_max_ua=[0.5, 0.5],
                      output_max=[ymax, np.inf, np.inf], energy_budget_ua2=energy_budget)


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(21)
    A = rng.normal(size=(4, 4))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(4, 2)), C=rng.normal(size=(3, 4)), past_steps=3)


@pytest.fixture(scope="module")
def session(model):
    u = np.random.default_rng(2).uniform(-1, 1, size=(400, 2))
    y = model.simulate(u) + 1e-3 * np.random.default_rng(3).normal(size=(400, 3))
    return Session(u=u, y=y, sample_rate_hz=100.0)


def _count_osqp(ctrl, monkeypatch):
    calls = []
    inner = ctrl._fast._osqp.solve
    monkeypatch.setattr(ctrl._fast._osqp, "solve", lambda *a: calls.append(1) or inner(*a))
    return calls


def _controller(kind, model, session, limits, output_penalty=1e4):
    if kind == "model":
        return ModelPredictiveController(model=model, limits=limits, horizon_steps=8, input_weight=1e-2,
                                         output_penalty=output_penalty, solver_options=TIGHT).fit()
    if kind == "linear_maps":
        pred = LsqPredictor(past_steps=3, horizon_steps=8, alphas=(1e-8,)).fit(session)
    else:  # DeePC on the Hankel predictor's blocks; zero weight on two outputs leaves its g-space Hessian singular
        pred = HankelPredictor(past_steps=3, horizon_steps=8).fit(session)
    return DataPredictiveController(predictor=pred, limits=limits, input_weight=1e-2, output_penalty=output_penalty,
                                    output_weight=[1.0, 0.0, 0.0] if kind == "deepc" else 1.0,
                                    solver_options=TIGHT).fit()


@pytest.mark.parametrize("kind", ["model", "linear_maps", "deepc"])
def test_soft_bounds_plans_equal_cvxpy_whether_the_bound_binds_or_not(model, session, kind, monkeypatch):
    rng = np.random.default_rng(2)
    ctrl = _controller(kind, model, session, _limits(0.5))
    assert isinstance(ctrl._fast, _DenseSoftQP)
    calls = _count_osqp(ctrl, monkeypatch)
    seen = {True: 0, False: 0}
    for i in range(16):
        u, y = rng.uniform(-0.3, 0.3, size=(3, 2)), rng.normal(size=(3, 3)) * 0.1
        target = np.array([3.0 if i % 2 else 0.1, 0.2, -0.1])  # the first output's bound is 0.5
        n_before = len(calls)
        a = ctrl.plan(u, y, target=target, use_fast_path=True)
        b = ctrl.plan(u, y, target=target, use_fast_path=False)
        assert a.ok and b.ok and a.solver.startswith("DAQP")
        np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-6)
        seen[bool(np.any(b.active_limits["output_bounds"]))] += 1
        if np.max(b.output_slack) <= 1e-6:  # no slack at the optimum: the dense answer, bounds held hard
            assert len(calls) == n_before
    assert seen[True] >= 3 and seen[False] >= 3


def test_a_bound_priced_above_its_penalty_goes_to_the_exact_penalty_qp(model, session, monkeypatch):
    # with a small penalty the optimum takes slack: the dense answer with the bound held hard is not it; the exact
    # penalty QP (stimsteer.control.mpc._exact_penalty) solves it, OSQP is not asked
    ctrl = _controller("model", model, session, _limits(0.5), output_penalty=1e-3)
    calls = _count_osqp(ctrl, monkeypatch)
    a = ctrl.plan(np.zeros((3, 2)), np.zeros((3, 3)), target=[5.0, 0.0, 0.0], use_fast_path=True)
    b = ctrl.plan(np.zeros((3, 2)), np.zeros((3, 3)), target=[5.0, 0.0, 0.0], use_fast_path=False)
    assert a.ok and len(calls) == 0 and ctrl._fast.n_exact_ == 1
    assert np.max(a.predicted_outputs[:, 0]) > 0.5 + 1e-3  # the slack is used
    assert a.cost_terms["total"] <= b.cost_terms["total"] * (1 + 1e-9)
    np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-5)


@pytest.mark.parametrize("kind, budget", [("model", 0.6), ("deepc", 0.06)])  # binding on some of the plans
def test_with_an_energy_budget_the_dense_answer_is_kept_where_the_budget_does_not_bind_else_iterated(model, session, kind,
                                                                                            budget):
    ctrl = _controller(kind, model, session, _limits(0.5, energy_budget=budget))
    assert isinstance(ctrl._fast, _DenseSoftQP)
    rng = np.random.default_rng(5)
    paths = set()
    for i in range(10):
        u, y = rng.uniform(-0.05, 0.05, size=(8, 2)), rng.normal(size=(3, 3)) * 0.1
        target = np.array([3.0 if i % 2 else 0.05, 0.0, 0.0])
        a = ctrl.plan(u, y, target=target, use_fast_path=True)
        b = ctrl.plan(u, y, target=target, use_fast_path=False)
        assert a.ok and b.ok
        paths.add("budget SQP" in a.solver)  # where the budget binds, the dense budget iteration (_budget_sqp)
        assert "cvxpy" not in a.solver
        # the same optimum: the cost to rounding; the inputs as close as the cone solver's answer on the directions
        # the cost barely sees (DeePC's, 1.6e-4 here under a binding budget)
        assert abs(a.cost_terms["total"] - b.cost_terms["total"]) <= 1e-9 * abs(b.cost_terms["total"])
        np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-3 if "budget SQP" in a.solver else 1e-5)
        assert a.energy_window_max_ua2 <= budget * (1 + 1e-9)
    assert paths == {True, False}  # both: the budget binds on some plans and not on others


@pytest.mark.parametrize("kind", ["model", "deepc"])
def test_a_copied_or_pickled_controller_plans_as_the_original(model, session, kind):
    # the dense solver and OSQP hold extension modules that cannot be pickled: a copy sets its problems up afresh
    import copy
    import pickle

    ctrl = _controller(kind, model, session, _limits(0.5))
    u, y = np.full((3, 2), 0.1), np.full((3, 3), 0.05)
    plans = [ctrl.plan(u, y, target=[t, 0.2, -0.1], use_fast_path=True) for t in (0.1, 3.0)]
    for twin in (copy.deepcopy(ctrl), pickle.loads(pickle.dumps(ctrl))):
        for t, plan in zip((0.1, 3.0), plans):
            again = twin.plan(u, y, target=[t, 0.2, -0.1], use_fast_path=True)
            assert again.ok and again.solver == plan.solver
            np.testing.assert_allclose(again.inputs, plan.inputs, rtol=0, atol=1e-6)
