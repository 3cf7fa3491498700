"""Soft output bounds on the dense fast path (stimsteer.control.mpc.condensed._SoftBoundsFirst): the dense QP
without the bounds is kept only where its predicted outputs stay strictly inside them, else OSQP solves the problem
with the slack.

Outside check: plans equal the cvxpy problem solved by CLARABEL (an interior-point solver, another algorithm) with
tight tolerances, to 1e-6, whether a bound binds or not (common practice, no source: a relaxation whose optimum is
feasible for the original problem is optimal for it).
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.mpc.condensed import _SoftBoundsFirst
from stimsteer.sysid import LsqPredictor, Session, StateSpaceModel

pytest.importorskip("daqp")

TIGHT = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12}


def _limits(ymax):
    return StimLimits(amplitude_min_ua=[-2.0, -2.0], amplitude_max_ua=[2.0, 2.0], slew_max_ua=[0.5, 0.5],
                      output_max=[ymax, np.inf, np.inf])


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(21)
    A = rng.normal(size=(4, 4))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(4, 2)), C=rng.normal(size=(3, 4)), past_steps=3)


def _count_osqp(ctrl, monkeypatch):
    calls = []
    inner = ctrl._fast._osqp.solve
    monkeypatch.setattr(ctrl._fast._osqp, "solve", lambda *a: calls.append(1) or inner(*a))
    return calls


@pytest.mark.parametrize("kind", ["model", "linear_maps"])
def test_soft_bounds_plans_equal_cvxpy_whether_the_bound_binds_or_not(model, kind, monkeypatch):
    rng = np.random.default_rng(2)
    if kind == "model":
        ctrl = ModelPredictiveController(model=model, limits=_limits(0.5), horizon_steps=8, input_weight=1e-2,
                                         solver_options=TIGHT).fit()
    else:
        u = rng.uniform(-1, 1, size=(400, 2))
        pred = LsqPredictor(past_steps=3, horizon_steps=8, alphas=(1e-8,)).fit(
            Session(u=u, y=model.simulate(u), sample_rate_hz=100.0))
        ctrl = DataPredictiveController(predictor=pred, limits=_limits(0.5), input_weight=1e-2,
                                        solver_options=TIGHT).fit()
    assert isinstance(ctrl._fast, _SoftBoundsFirst)
    calls = _count_osqp(ctrl, monkeypatch)
    seen = {True: 0, False: 0}
    for i in range(16):
        u, y = rng.uniform(-0.3, 0.3, size=(3, 2)), rng.normal(size=(3, 3)) * 0.1
        target = np.array([3.0 if i % 2 else 0.1, 0.2, -0.1])  # the first output's bound is 0.5
        n_before = len(calls)
        a = ctrl.plan(u, y, target=target, use_fast_path=True)
        b = ctrl.plan(u, y, target=target, use_fast_path=False)
        assert a.ok and b.ok
        np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-6)
        binds = bool(np.any(b.active_limits["output_bounds"]))
        seen[binds] += 1
        # binding: the dense answer crossed the bound and OSQP solved with the slack; else the dense answer is kept
        assert (len(calls) > n_before) == binds
    assert seen[True] >= 3 and seen[False] >= 3


def test_the_dense_answer_is_refused_when_it_touches_the_bound(model, monkeypatch):
    # a target exactly at the bound would leave the dense answer on it: OSQP decides (strict inequality)
    ctrl = ModelPredictiveController(model=model, limits=_limits(0.5), horizon_steps=8, input_weight=1e-2).fit()
    calls = _count_osqp(ctrl, monkeypatch)
    plan = ctrl.plan(np.zeros((3, 2)), np.zeros((3, 3)), target=[5.0, 0.0, 0.0])
    assert plan.ok and len(calls) == 1
    assert np.all(plan.predicted_outputs[:, 0] <= 0.5 + 1e-3)  # soft, with a large penalty: (nearly) held


def test_with_an_energy_budget_the_soft_bounds_stay_with_osqp(model):
    # the budget's binding test is a threshold on the fast answer: answers equal to rounding must not take
    # different paths, so the OSQP problem with the slack is kept as it was
    from stimsteer.control.mpc.fastqp import _FastQP

    lim = StimLimits(amplitude_min_ua=[-2.0, -2.0], amplitude_max_ua=[2.0, 2.0], slew_max_ua=[0.5, 0.5],
                     output_max=[0.5, np.inf, np.inf], energy_budget_ua2=10.0)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=8, input_weight=1e-2).fit()
    assert type(ctrl._fast) is _FastQP
