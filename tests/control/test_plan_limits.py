"""The fused limit work of a plan (control/mpc/_verify.py) decides and reports exactly as the reference functions.

Each check of a plan is now made once per plan with constants computed at fit; these tests hold the fused versions
to the reference they replace (``StimLimits.safe_inputs``, ``StimLimits.violations``, the budget's own window
loads), on random inputs that break and keep the limits, so the checks are as strict as before.
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.mpc import _budget
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.sysid import StateSpaceModel

_MODEL = StateSpaceModel(A=[[0.8, 0.1], [0.0, 0.7]], B=[[1.0, 0.2], [0.0, 0.5]], C=[[1.0, 0.0], [0.3, 1.0]],
                         past_steps=2)


def _controller(**limits):
    lim = StimLimits(**{"amplitude_min_ua": [-4.0, 0.0], "amplitude_max_ua": [5.0, 3.0], **limits})
    return ModelPredictiveController(model=_MODEL, limits=lim, horizon_steps=6).fit()


@pytest.fixture(scope="module")
def budgeted():
    return _controller(slew_max_ua=[1.5, 0.7], energy_budget_ua2=30.0, energy_window_steps=8)


def test_the_fallback_is_safe_inputs_bit_for_bit(budgeted):
    rng = np.random.default_rng(0)
    checks, lim = budgeted._checks, budgeted.limits_
    # inside reach of the amplitude window (the fast path) and far outside it (safe_sequence itself)
    for last in [*rng.uniform(-6, 6, (40, 2)), np.array([20.0, -9.0]), np.array([0.0, 0.0])]:
        assert np.array_equal(checks.fallback(last), lim.safe_inputs(budgeted.horizon_steps_, last))


def test_the_fallback_without_a_slew_limit_is_safe_inputs():
    ctrl = _controller(energy_budget_ua2=30.0)
    for last in (np.array([3.0, 1.0]), np.array([-7.0, 9.0])):
        assert np.array_equal(ctrl._checks.fallback(last), ctrl.limits_.safe_inputs(6, last))


def _numpy_slew_clip(u, lb, ub, slew):
    """The projection's sequential slew clip as numpy wrote it before (the reference of the plain-float one)."""
    prev = u[0]
    for k in range(1, u.shape[0]):
        u[k] = np.clip(u[k], np.maximum(lb[k], prev - slew), np.minimum(ub[k], prev + slew))
        prev = u[k]
    return u


def test_the_slew_clip_in_plain_floats_is_numpys_bit_for_bit(budgeted):
    rng = np.random.default_rng(3)
    checks = budgeted._checks
    lb, ub = checks.lb, checks.ub
    grid = np.array([-4.0, -1.5, -0.7, 0.0, 0.7, 1.5, 3.0, 5.0])  # steps landing exactly on bounds and slew edges
    for trial in range(300):
        u = rng.uniform(-6, 6, lb.shape) if trial % 2 else rng.choice(grid, lb.shape)
        if trial % 5 == 0:
            u[:, 1] = -0.0  # signed zeros keep their sign where numpy keeps it
        ref = _numpy_slew_clip(np.clip(u, lb, ub), lb, ub, checks.slew)
        got = checks._slew_clip(np.clip(u, lb, ub), lb, ub)
        assert np.array_equal(got, ref) and np.array_equal(np.signbit(got), np.signbit(ref))


def test_the_fused_final_check_counts_what_violations_counts(budgeted):
    """Random sequences, most of them beyond some limit: the fused check finds a violation exactly when
    ``StimLimits.violations`` counts one, with the same counts (the reference check it replaces)."""
    rng = np.random.default_rng(1)
    lim, checks = budgeted.limits_, budgeted._checks
    found = 0
    for scale in (0.05, 0.3, 1.0, 3.0):
        for _ in range(60):
            u = rng.uniform(-scale * 4, scale * 4, (6, 2))
            last = rng.uniform(-2, 2, 2)
            if scale < 0.1:  # inside every limit, up to the slew of the first step
                u, last = np.abs(u), np.abs(u[0])
            budgeted._set_history(rng.uniform(-1, 1, (7, 2)))
            ref = {k: v for k, v in lim.violations(u, last, energy_window_steps=budgeted.energy_window_steps_,
                                                   history=budgeted._u_all).items() if v}
            assert checks.violations(budgeted, u, last) == ref
            found += bool(ref)
    assert 0 < found < 240  # both verdicts were exercised


def test_a_plan_reports_the_loads_of_its_own_inputs_computed_once_per_plan(budgeted, monkeypatch):
    """The plan's largest window and its limit reports read the loads the final check computed, so a plan that
    needs no blend computes the loads of its answer once (it was four times, plus the guard and the solve)."""
    calls = []
    original = _budget._RollingBudget.energies

    def counted(self, u, hist, past=None):
        calls.append(past is None)
        return original(self, u, hist, past)

    monkeypatch.setattr(_budget._RollingBudget, "energies", counted)
    u_past, y_past = np.zeros((8, 2)), np.zeros((2, 2))
    plan = budgeted.plan(u_past, y_past, target=[0.5, 0.2])
    assert plan.ok
    # the guard (the fallback), the fast path's budget test, the answer's acceptance (the same bytes: kept), the
    # projected answer
    assert len(calls) <= 4
    fresh = original(budgeted._budget, plan.inputs, budgeted._hist)
    assert plan.energy_window_max_ua2 == float(np.max(fresh))
    assert plan.active_limits["energy_budget"] == bool(np.max(fresh) >= budgeted._budget.budget * (1 - 1e-6))


def test_a_blended_plan_reports_the_loads_of_the_blend(budgeted):
    # a past that leaves little budget: the answer is blended towards the fallback, and the plan reports the blend
    u_past = np.tile([1.5, 0.8], (8, 1))
    plan = budgeted.plan(u_past, np.zeros((2, 2)), target=[40.0, 20.0])
    assert not plan.fallback
    fresh = budgeted._budget.energies(np.array(plan.inputs), budgeted._hist)
    assert plan.energy_window_max_ua2 == float(np.max(fresh)) <= 30.0 * (1 + 1e-9)
    assert budgeted.limits_.violations(plan.inputs, plan.last_input, energy_window_steps=8,
                                       history=u_past)["energy_budget"] == 0


def test_the_loop_on_its_buffers_plans_from_the_windows_it_applied(budgeted):
    """The loop writes applied inputs and measured outputs in place and hands each plan views of its windows: the
    plans see what a loop built from lists gave them (every plan checked here against one made from copies)."""
    plant = LinearNetworkPlant(A=_MODEL.A, B=_MODEL.B, C=_MODEL.C, measurement_noise_std=0.01, seed=3)
    loop = run_closed_loop(budgeted, plant, n_steps=12, target=[1.0, 0.4], seed=5)
    U = np.vstack([loop.warmup_inputs, loop.inputs])
    Y = np.vstack([loop.warmup_outputs, loop.outputs])
    budgeted.reset()
    n_w = loop.warmup_inputs.shape[0]
    for k in range(12):
        now = n_w + k
        plan = budgeted.plan(U[max(0, now - 7):now].copy(), Y[now - 2:now].copy(), target=[1.0, 0.4],
                             last_input=U[now - 1].copy())
        assert np.array_equal(plan.inputs[0], loop.inputs[k])
    assert loop.violations["amplitude"] == loop.violations["slew"] == loop.violations["energy_budget"] == 0
