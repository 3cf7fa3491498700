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


def test_a_plan_made_at_once_is_the_dataclasss_plan():
    """``_made`` writes the instance dict in one pass; ``Plan(...)`` (the dataclass's own constructor) is the
    reference: the same fields, in the same order, the same objects, deferred fields left deferred."""
    from stimsteer.control.mpc.plan import Plan, _Deferred, _made

    values = dict(inputs=np.ones((3, 2)), predicted_outputs=_Deferred(lambda: np.zeros((3, 1))), target=np.zeros((3, 1)),
                  target_kind="output", cost_terms=_Deferred(dict), active_limits={"slew": np.zeros((3, 2), bool)},
                  output_slack=np.zeros((3, 1)), step_bounds=(np.zeros((3, 2)), np.ones((3, 2))),
                  last_input=np.zeros(2), solver="s", status="optimal", message="", fallback=False, solve_time_s=0.1,
                  input_names=("a", "b"), output_names=("y",), energy_window_steps=4)
    made, ref = _made(**values), Plan(**values)
    assert list(made.__dict__) == list(ref.__dict__)
    assert all(made.__dict__[k] is ref.__dict__[k] for k in ref.__dict__)  # (deferred ones unread on both)
    assert made.caution == ref.caution and made.broken_limits == () and made.ok
    with pytest.raises(TypeError, match="no field"):
        _made(**values, colour="red")
    with pytest.raises(TypeError, match="needs the field 'inputs'"):
        _made(**{k: v for k, v in values.items() if k != "inputs"})


def test_step_bounds_are_the_where_of_the_slew_window(budgeted):
    """Reference: the step-0 window as ``np.where`` of the slew and amplitude windows (the inputs whose slew window
    misses the amplitude window keep the amplitude window), for last inputs inside reach and beyond it."""
    checks, rng = budgeted._checks, np.random.default_rng(4)
    for last in [*rng.uniform(-8, 8, (60, 2)), np.array([7.0, 0.0]), np.array([-6.0, 4.0])]:
        lb, ub = np.tile(checks.lo, (6, 1)), np.tile(checks.hi, (6, 1))
        lo0, hi0 = np.maximum(lb[0], last - checks.slew), np.minimum(ub[0], last + checks.slew)
        broken = lo0 > hi0
        lb[0], ub[0] = np.where(broken, lb[0], lo0), np.where(broken, ub[0], hi0)
        got = checks.step_bounds(last)
        assert np.array_equal(got[0], lb) and np.array_equal(got[1], ub) and np.array_equal(got[2], broken)


def test_window_loads_of_a_past_written_in_place_are_computed_anew():
    """The applied past's part of the windows is kept only for a read-only history (a plan's own, from
    ``history``); a writable one changed in place between two checks gets the windows of its new values
    (brute-force window sums, common practice, no source)."""
    W, N = 4, 5
    b = _budget._RollingBudget(50.0, W, N, None)
    rng = np.random.default_rng(9)
    u = rng.normal(size=(N, 2))

    def brute(hist):
        seq = np.concatenate([hist, np.sum(u**2, axis=1)])
        return np.array([seq[j - W + 1:j + 1].sum() for j in range(W - 1, seq.size)])

    hist = rng.uniform(size=W - 1)
    np.testing.assert_allclose(b.energies(u, hist), brute(hist), rtol=1e-12)
    hist[:] = rng.uniform(2, 3, size=W - 1)
    np.testing.assert_allclose(b.energies(u, hist), brute(hist), rtol=1e-12)
    kept = b.history(rng.normal(size=(6, 2)))
    assert not kept.flags.writeable
    np.testing.assert_allclose(b.energies(u, kept), brute(kept), rtol=1e-12)
    assert b.energies(u, kept) is b.energies(u, kept)  # the same plan's check again: the kept answer
