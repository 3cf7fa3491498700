"""Limits on the delivered sequence in live loops (issue 20 with issue 16's limits): the input gate
(control/input_gate.py, control/_delivered.py) under rolling window budgets, train length and duty cycle, with random
and adversarial requests; the live runner with the full plan and with the fast step under them.

Every delivered record is graded by the checker below, written here from the rules' definitions with plain Python
loops (common practice, no source): the load ``Σ_i (a_i |u_i| + b_i u_i²)`` summed over every window of ``W``
consecutive delivered samples (windows at the start hold the samples delivered so far), the per-sample amplitude
window and slew, and per input the on samples (any of the last ``hold`` samples nonzero, samples after the record
counting as off), the longest run of on samples and the on samples of every duty window. It shares no code with the
gate, the planner or ``StimLimits.violations``.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stimsteer.control.input_gate import InputGate
from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.control.realtime import run_live
from stimsteer.control.sequence_limits import TrainLimits, WindowBudget
from stimsteer.sysid import InvalidParameterError, StateSpaceModel

RTOL = 1e-9


# ------------------------------------------------------------------------------------------- the independent checker
def sequence_breaks(u, lim, energy_window=None):
    """Every limit of ``lim`` that the delivered record ``u`` (n, m) breaks, from rest, as readable strings."""
    u = np.asarray(u, np.float64)
    n, m = u.shape
    lo, hi = lim.input_bounds()
    out = []
    for k in range(n):
        for i in range(m):
            if not (lo[i] <= u[k, i] <= hi[i]):
                out.append(f"amplitude at {k}")
            if lim.slew_max_ua is not None:
                prev = u[k - 1, i] if k else 0.0
                if abs(u[k, i] - prev) > lim.slew_max_ua[i] * (1 + RTOL):
                    out.append(f"slew at {k}")
    budgets = [(b.name, b.budget, b.window_steps, b.linear, b.quadratic) for b in lim.window_budgets]
    if lim.energy_budget_ua2 is not None:
        budgets.append(("energy", lim.energy_budget_ua2, energy_window, np.zeros(m), np.ones(m)))
    for name, budget, W, a, b in budgets:
        loads = [sum(a[i] * abs(u[k, i]) + b[i] * u[k, i] ** 2 for i in range(m)) for k in range(n)]
        for k in range(n):
            if sum(loads[max(0, k - W + 1):k + 1]) > budget * (1 + RTOL):
                out.append(f"{name} window ending at {k}")
    t = lim.train_limits
    for i in range(m if t is not None else 0):
        g = t.hold_steps[i]
        nz = [u[k, i] != 0 for k in range(n)] + [False] * g
        on = [any(nz[max(0, k - g + 1):k + 1]) for k in range(len(nz))]
        run = 0
        for k, o in enumerate(on):
            run = run + 1 if o else 0
            if t.run_max_steps[i] is not None and run > t.run_max_steps[i]:
                out.append(f"train length of input {i} at {k}")
        w, d = t.duty_window_steps[i], t.duty_max_steps[i]
        for k in range(len(on) if w is not None else 0):
            if sum(on[max(0, k - w + 1):k + 1]) > d:
                out.append(f"duty cycle of input {i} at {k}")
    return out


def test_the_checker_finds_what_it_is_for():
    lim = StimLimits(amplitude_min_ua=[0.0], amplitude_max_ua=[10.0],
                     window_budgets=(WindowBudget("charge_rate_window", 25.0, 3, np.ones(1), np.zeros(1), "uC"),),
                     train_limits=TrainLimits((2,), (3,), (5,), (2,)))
    assert sequence_breaks(np.array([[10.0], [0.0], [0.0], [0.0], [0.0], [10.0]]), lim) == []
    assert sequence_breaks(np.array([[10.0], [10.0], [10.0]]), lim)[0] == "charge_rate_window window ending at 2"
    # one pulse holds its train on for 2 samples: two pulses in a row make a run of 3 > 2
    assert "train length of input 0 at 2" in sequence_breaks(np.array([[1.0], [1.0]]), lim)
    assert "duty cycle of input 0 at 4" in sequence_breaks(np.array([[1.0], [0.0], [0.0], [1.0], [0.0]]), lim)


# ------------------------------------------------------------------------------------------ random sequence limits
@st.composite
def problems(draw):
    m = draw(st.integers(1, 3))
    hi = np.array(draw(st.lists(st.floats(1.0, 100.0), min_size=m, max_size=m)))
    lo = -hi * draw(st.sampled_from([0.0, 0.5]))
    budgets = []
    for j in range(draw(st.integers(0, 2))):
        a = np.array(draw(st.lists(st.sampled_from([0.0, 0.3, 1.0]), min_size=m, max_size=m)))
        b = np.array(draw(st.lists(st.sampled_from([0.0, 0.01, 0.1]), min_size=m, max_size=m)))
        a[0] = a[0] or 0.5  # not all weights zero
        W = draw(st.integers(1, 30))
        most = float(a @ hi + b @ hi**2) * W  # a window of stimulation at the bounds
        budgets.append(WindowBudget(f"window_{j}", most * draw(st.floats(0.05, 1.2)), W, a, b, "uC"))
    train = None
    if draw(st.booleans()):
        runs = tuple(draw(st.one_of(st.none(), st.integers(1, 10))) for _ in range(m))
        wins = tuple(draw(st.one_of(st.none(), st.integers(1, 20))) for _ in range(m))
        duty = tuple(None if w is None else draw(st.integers(0, w)) for w in wins)
        train = TrainLimits(runs, duty, wins, tuple(draw(st.integers(1, 3)) for _ in range(m)))
    slew = None if train is not None or not draw(st.booleans()) else hi * draw(st.floats(0.05, 1.0))
    energy = None
    if train is None and draw(st.booleans()):
        energy = float(hi @ hi) * draw(st.floats(0.1, 3.0))
    lim = StimLimits(amplitude_min_ua=lo, amplitude_max_ua=hi, slew_max_ua=slew, energy_budget_ua2=energy,
                     window_budgets=tuple(budgets), train_limits=train)
    return lim, draw(st.sampled_from(["maximum", "random", "wild"])), draw(st.integers(0, 2**31 - 1))


def _requests(lim, kind, seed, n):
    lo, hi = lim.input_bounds()
    rng = np.random.default_rng(seed)
    if kind == "maximum":  # a controller that always asks for the most it may
        return np.tile(hi, (n, 1))
    if kind == "random":
        return rng.uniform(lo, hi, size=(n, lo.size)) * rng.choice([0.0, 1.0], size=(n, 1), p=[0.2, 0.8])
    wild = rng.uniform(lo - (hi - lo), hi + (hi - lo), size=(n, lo.size))  # outside the window too, and NaN
    wild[rng.random(n) < 0.05, 0] = np.nan
    return wild


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(problems())
def test_the_gate_delivers_only_inputs_that_keep_every_window_and_train(problem):
    lim, kind, seed = problem
    W = 7
    gate = InputGate(lim, energy_window_steps=W)
    sent = np.array([gate.admit(r)[0] for r in _requests(lim, kind, seed, 150)])
    assert sequence_breaks(sent, lim, W) == []
    assert gate.n_unavoidable == 0 and gate.n_admitted + gate.n_replaced == len(sent)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(problems())
def test_a_reduced_input_is_the_largest_safe_one(problem):
    """Without a slew limit the largest safe input towards a request is ``α`` times it (trains full: zero on that
    input), with ``α`` where the fullest window closing at that sample reaches its budget (to 1e-9)."""
    lim, kind, seed = problem
    if lim.slew_max_ua is not None:
        return
    gate = InputGate(lim, energy_window_steps=7)
    sent = []
    for r in _requests(lim, "maximum" if kind == "wild" else kind, seed, 120):
        u, why = gate.admit(r)
        sent.append(u)
        if why and why not in ("train_length", "duty_cycle") and np.any(u != 0):
            on = u != 0
            alpha = float(np.max(np.abs(u[on]) / np.abs(r[on])))
            assert alpha < 1.0
            np.testing.assert_allclose(u[on], alpha * r[on], rtol=1e-12)  # towards the request, not elsewhere
            assert _closing_share(np.array(sent), lim, 7) >= 1 - 1e-9, (alpha, why)


def _closing_share(u, lim, energy_window):
    """The largest share of its budget that a window ending at the last sample of ``u`` holds."""
    n, m = u.shape
    budgets = [(b.budget, b.window_steps, b.linear, b.quadratic) for b in lim.window_budgets]
    if lim.energy_budget_ua2 is not None:
        budgets.append((lim.energy_budget_ua2, energy_window, np.zeros(m), np.ones(m)))
    return max(sum(a[i] * abs(u[k, i]) + b[i] * u[k, i] ** 2 for k in range(max(0, n - W), n) for i in range(m))
               / budget for budget, W, a, b in budgets)


def test_the_old_gate_is_what_the_property_test_would_catch():
    """The gate before this change refused these limits; a gate that ignored them (per-sample checks only) breaks
    the checker at once under a controller that always asks for the maximum."""
    lim = StimLimits(amplitude_min_ua=[0.0, 0.0], amplitude_max_ua=[10.0, 10.0],
                     window_budgets=(WindowBudget("charge_rate_window", 50.0, 20, np.ones(2), np.zeros(2), "uC"),),
                     train_limits=TrainLimits((7, None), (None, 5), (None, 12), (2, 1)))
    per_sample_only = StimLimits(amplitude_min_ua=[0.0, 0.0], amplitude_max_ua=[10.0, 10.0])
    blind = np.array([InputGate(per_sample_only).admit([10.0, 10.0])[0] for _ in range(40)])
    assert sequence_breaks(blind, lim)
    gate = InputGate(lim)
    sent = np.array([gate.admit([10.0, 10.0])[0] for _ in range(400)])
    assert sequence_breaks(sent, lim) == []
    # the windows bind, and the gate uses them: every charge window ending after the first reaches its budget
    q = sent.sum(axis=1)
    assert max(q[max(0, k - 19):k + 1].sum() for k in range(400)) == pytest.approx(50.0, rel=1e-11)


def test_a_window_longer_than_a_live_gate_keeps_is_refused_in_one_line():
    lim = StimLimits(amplitude_min_ua=[0.0], amplitude_max_ua=[10.0],
                     window_budgets=(WindowBudget("charge_rate_window", 5.0, 3 << 20, np.ones(1), np.zeros(1),
                                                  "uC"),))
    with pytest.raises(InvalidParameterError, match=r"spans 3145728 samples, more than the 1048576 a live gate keeps"):
        InputGate(lim)


# ------------------------------------------------------------------------------------------------- the live runner
class _Clock:
    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


class _Greedy:
    """A controller proxy that asks for the most the amplitude allows (after the timing plans), late on some steps."""

    def __init__(self, inner, clock, late=(), skip=20, greedy=True):
        self._c, self._clock, self._late, self.calls, self._greedy = inner, clock, set(late), -skip, greedy

    def __getattr__(self, name):
        return getattr(self._c, name)

    def reset(self):
        return self._c.reset()

    def plan(self, u_past, y_past, **kw):
        k, self.calls = self.calls, self.calls + 1
        plan = self._c.plan(u_past, y_past, **kw)
        self._clock.t += 1.0 if k in self._late else 1e-4
        if k < 0 or not self._greedy:
            return plan
        import dataclasses

        hi = self._c.limits_.input_bounds()[1]
        return dataclasses.replace(plan, inputs=np.tile(hi, (plan.inputs.shape[0], 1)))


def _system(m=2, p=2, n=4, seed=3):
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(n, n))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.uniform(0.2, 1.0, size=(n, m)), C=rng.normal(size=(p, n)), past_steps=3)


def _physical_limits():
    return StimLimits(amplitude_min_ua=[0.0, 0.0], amplitude_max_ua=[10.0, 8.0],
                      window_budgets=(WindowBudget("charge_rate_window", 60.0, 25, np.array([1.0, 0.5]), np.zeros(2),
                                                   "uC"),
                                      WindowBudget("energy_window", 900.0, 40, np.zeros(2), np.array([0.5, 1.0]),
                                                   "uJ")),
                      train_limits=TrainLimits((12, None), (None, 9), (None, 20), (2, 1)))


@pytest.mark.parametrize("fast", [False, True])
def test_a_live_run_under_sequence_limits_delivers_only_safe_inputs(fast):
    """The full plan (which plans inside the windows from the delivered history; here overridden by a greedy
    controller asking for the maximum) and the fast step (planning with the per-sample limits only, towards a target
    out of reach, so it asks for the maximum too; clipped by the gate) both run with late steps: the record is safe."""
    model, lim = _system(), _physical_limits()
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=1e-3).fit()
    if fast:
        from stimsteer.control.mpc.fast_step import FastStep

        ctrl = FastStep(ctrl)
    clock = _Clock()
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, sample_rate_hz=100.0)
    # the runner's calibration: 20 timed plans, after one untimed plan whose new active set the fast step maps
    greedy = _Greedy(ctrl, clock, late={7, 30}, greedy=not fast, skip=21 if fast else 20)
    run = run_live(greedy, plant, n_steps=200, target=np.array([50.0, -50.0]),
                   pace="none", clock=clock, seed=1)
    u = np.asarray(run.session.u)
    assert sequence_breaks(u, lim) == []
    assert run.summary["unchecked_inputs"] == 0 and not any(run.summary["delivered_violations"].values())
    g = run.summary["gate"]
    assert g["reduced"] > 20  # the windows and trains bind: the greedy requests were cut to the largest safe input
    assert any("+gate:charge_rate_window" in e or "+gate:energy_window" in e for e in run.events)
    assert run.events[7].startswith("overrun")
    assert run.summary["sequence_limits"]["train_limits"]["train_length_max_steps"] == [12, None]


def test_the_full_plan_sees_the_delivered_history_of_its_windows():
    """The runner hands the plan the delivered inputs as far back as its windows reach, so an honest controller
    plans inside what is left: the gate seldom has to cut its answers."""
    model, lim = _system(), _physical_limits()
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=6, input_weight=1e-3).fit()
    assert ctrl.history_steps_ > ctrl.past_steps_
    clock = _Clock()
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, sample_rate_hz=100.0)
    seen = []

    class _Spy(_Greedy):
        def plan(self, u_past, y_past, **kw):
            seen.append(len(u_past))
            clock.t += 1e-4
            return self._c.plan(u_past, y_past, **kw)

    run = run_live(_Spy(ctrl, clock), plant, n_steps=120, target=np.array([50.0, -50.0]), pace="none", clock=clock)
    assert max(seen) == ctrl.history_steps_
    assert sequence_breaks(np.asarray(run.session.u), lim) == []
    assert run.summary["gate"]["reduced"] <= 3, run.summary["gate"]
