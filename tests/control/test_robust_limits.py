"""Plans robust over an ensemble keep every declared limit (issue 19): the energy budget over rolling windows of
the applied inputs in a closed loop, and output bounds over every member (worst case) or the mean (average).

Before this change :class:`RobustPlanner` refused limits with an energy budget or output bounds. The windows are
counted here on the applied sequence directly, independently of the controllers' own bookkeeping.
"""

import warnings

import numpy as np
import pytest

from stimsteer.control import LinearNetworkPlant, StimLimits, record_session
from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc.robust import RobustPlanner
from stimsteer.sysid.ensemble import BootstrapEnsemble

ARX = {"output_lags": 2, "input_lags": 2, "delay_samples": 0, "alphas": (1e-3,)}


def _plant():
    return LinearNetworkPlant(np.array([[0.9, 0.2], [-0.15, 0.75]]), np.array([[1.0], [0.5]]),
                              np.array([[1.0, 0.0]]), sample_rate_hz=100.0, process_noise_std=0.05,
                              measurement_noise_std=0.1)


@pytest.fixture(scope="module")
def ensemble():
    u = np.random.default_rng(1).normal(size=(10 * 200, 1))
    s = record_session(_plant(), u, trials=[(k * 200, (k + 1) * 200) for k in range(10)], seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return BootstrapEnsemble(method="arx", method_settings=ARX, n_members=8, seed=2).fit(s)


def _applied_windows(loop, W):
    """Energy of each window of W applied samples ending at a loop step (rest and warm-up before it), by brute force."""
    seq = np.vstack([np.zeros((W, loop.inputs.shape[1])), loop.warmup_inputs, loop.inputs])
    e = np.sum(seq**2, axis=1)
    n0 = seq.shape[0] - loop.n_steps
    return np.array([e[j - W + 1:j + 1].sum() for j in range(n0, seq.shape[0])])


@pytest.mark.parametrize("mode", ["worst", "average"])
@pytest.mark.parametrize("window", [5, 15])  # shorter and longer than the horizon (the ramp windows after a plan)
def test_a_robust_loop_keeps_every_window_of_applied_inputs_inside_the_budget(ensemble, mode, window):
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.5, slew_max_ua=0.4, n_inputs=1,
                     energy_budget_ua2=3.0, energy_window_steps=window)
    planner = RobustPlanner(ensemble=ensemble, limits=lim, horizon_steps=8, mode=mode).fit()
    assert planner.problem_.is_dpp() and planner.energy_window_steps_ == window
    loop = run_closed_loop(planner, _plant(), n_steps=60, target=np.array([10.0]), seed=3)
    windows = _applied_windows(loop, window)
    assert windows.max() <= 3.0 * (1 + 1e-9)
    # the budget binds: the target needs ~1.6 µA (plant gain ~6.4), beyond what any window may hold
    assert windows.max() >= 0.95 * 3.0 and loop.limit_use["energy_budget"] > 0.5
    assert loop.violations == {"amplitude": 0, "slew": 0, "energy_budget": 0, "output_bounds": 0}
    assert loop.n_fallback == 0


def test_a_robust_plan_from_a_spent_budget_is_the_safe_fallback(ensemble):
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.5, n_inputs=1, energy_budget_ua2=3.0,
                     energy_window_steps=10)
    planner = RobustPlanner(ensemble=ensemble, limits=lim, horizon_steps=8).fit()
    up, yp = ensemble.rest_window()
    spent = np.vstack([np.full((9, 1), 1.0), np.zeros((up.shape[0], 1))])  # 9 µA² in the window already
    plan = planner.plan(np.vstack([spent, up])[-max(9, up.shape[0]):], yp, target=np.array([2.0]))
    assert plan.fallback and plan.status == "infeasible" and "energy budget" in plan.message
    np.testing.assert_array_equal(plan.inputs, lim.safe_inputs(8, np.zeros(1)))


def _bounded(ensemble, mode, ymax):
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.5, slew_max_ua=0.4, n_inputs=1,
                     output_min=[-np.inf], output_max=[ymax])
    planner = RobustPlanner(ensemble=ensemble, limits=lim, horizon_steps=10, mode=mode).fit()
    assert planner.problem_.is_dpp()
    up, yp = ensemble.rest_window()
    plan = planner.plan(up, yp, target=np.array([2.0]))
    return plan, planner._members(plan.inputs, up, yp)


def test_the_worst_case_plan_keeps_every_member_below_an_output_bound(ensemble):
    free, free_members = _bounded(ensemble, "worst", np.inf)
    assert free_members.max() > 1.05  # without the bound, members go well past 1.0 towards the target
    plan, members = _bounded(ensemble, "worst", 1.0)
    assert plan.ok and members.max() <= 1.0 + 1e-6 and members.max() >= 1.0 - 1e-3  # every member, and it binds
    assert plan.slack_total <= 1e-6 and plan.active_limits["output_bounds"].any()


def test_the_average_plan_keeps_the_mean_below_an_output_bound_not_every_member(ensemble):
    plan, members = _bounded(ensemble, "average", 1.0)
    assert plan.ok and plan.predicted_outputs.max() <= 1.0 + 1e-6
    np.testing.assert_allclose(plan.predicted_outputs, members.mean(axis=0), atol=1e-12)
    assert members.max() > 1.0 + 1e-3  # the members spread around the mean: some pass the bound


def test_an_unreachable_bound_reports_the_largest_member_excess_as_slack(ensemble):
    plan, members = _bounded(ensemble, "worst", -5.0)  # the inputs cannot push every member below −5
    assert plan.ok and plan.slack_total > 0
    # the slack of each step is the largest excess over the members (computed here from the members' predictions)
    np.testing.assert_allclose(plan.output_slack, np.maximum(members + 5.0, 0.0).max(axis=0), atol=1e-9)
    assert plan.cost_terms["output_penalty"] == pytest.approx(1e4 * plan.slack_total)


@pytest.mark.parametrize("mode", ["worst", "average"])
@pytest.mark.parametrize("target", [10.0, 100.0])
def test_a_target_far_beyond_reach_still_gives_a_robust_plan_at_the_bounds(ensemble, mode, target):
    # before: the worst case called targets of 10 and 100 infeasible (an epigraph on the squared costs) and the
    # average broke a bound at 100 (no cost scaling); both returned the safe fallback
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.5, slew_max_ua=0.4, n_inputs=1)
    planner = RobustPlanner(ensemble=ensemble, limits=lim, horizon_steps=8, mode=mode).fit()
    up, yp = ensemble.rest_window()
    plan = planner.plan(up, yp, target=np.array([target]))
    assert plan.ok and not any(lim.violations(plan.inputs, np.zeros(1)).values())
    # as high as the slew limit lets the input climb from rest, then at the amplitude bound
    np.testing.assert_allclose(plan.inputs[:, 0], np.minimum(0.4 * np.arange(1, 9), 1.5), atol=1e-6)
