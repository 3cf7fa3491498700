"""The live loop runner (control/realtime.py) and its gate (control/input_gate.py): deadlines, overrun policy,
refusal, faults injected into the controller and the plant, and the recorded run.

The hard-limit rules are re-checked here with plain numpy, written from the rules' definitions (amplitude window,
slew between consecutive delivered samples, Σ u² over every window of the horizon's length) -- common practice,
no source -- and with StimLimits.violations, so neither the gate's code nor the runner grades itself.
"""

from __future__ import annotations

import dataclasses
import time

import numpy as np
import pytest

from stimsteer.control.input_gate import InputGate
from stimsteer.control.limits import StimLimits
from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.control.realtime import run_live
from stimsteer.sysid import InvalidParameterError, Session, SessionError, StateSpaceModel, StimsteerError
from stimsteer.sysid.io import load_session, save_session

N, M, P, PAST, H = 6, 2, 3, 3, 8
LO, HI, SLEW, BUDGET = -1.0, 1.0, 0.25, 6.0


@pytest.fixture(scope="module")
def system():
    rng = np.random.default_rng(11)
    A = rng.normal(size=(N, N))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.normal(size=(N, M)), rng.normal(size=(P, N))
    return StateSpaceModel(A=A, B=B, C=C, past_steps=PAST), rng.normal(size=P) * 3.0


def _plant(model, rate=100.0):
    return LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, sample_rate_hz=rate)


def _controller(model, budget=BUDGET):
    lim = StimLimits(amplitude_min_ua=LO, amplitude_max_ua=HI, n_inputs=M, slew_max_ua=SLEW, energy_budget_ua2=budget)
    return ModelPredictiveController(model=model, limits=lim, horizon_steps=H, input_weight=1e-3).fit()


def _independent_check(u, window=H):
    """Counts of broken hard limits in a delivered sequence, from rest (plain numpy, from the definitions)."""
    seq = np.vstack([np.zeros((1, u.shape[1])), u])
    amp = int(np.sum((u < LO) | (u > HI)))
    slew = int(np.sum(np.abs(np.diff(seq, axis=0)) > SLEW * (1 + 1e-9)))
    e = np.sum(u**2, axis=1)
    energy = int(sum(e[max(0, k - window + 1):k + 1].sum() > BUDGET * (1 + 1e-12) for k in range(len(e))))
    return amp, slew, energy


class _FakeClock:
    """Seconds that move only when a test says so: deadlines become deterministic."""

    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


class _Faulty:
    """A controller proxy injecting faults at chosen plan calls (counted after the timing plans)."""

    def __init__(self, inner, *, clock=None, late=(), raises=(), fails=(), wild=(), skip=20, step_s=1e-4, late_s=1.0):
        self._c, self._clock, self._skip = inner, clock, skip
        self._late, self._raises, self._fails, self._wild = set(late), set(raises), set(fails), set(wild)
        self._step_s, self._late_s, self.calls = step_s, late_s, -skip

    def __getattr__(self, name):
        return getattr(self._c, name)

    def reset(self):
        return self._c.reset()

    def plan(self, u_past, y_past, **kw):
        k, self.calls = self.calls, self.calls + 1
        plan = self._c.plan(u_past, y_past, **kw)
        if self._clock is not None:
            self._clock.t += self._late_s if k in self._late else self._step_s
        if k in self._raises:
            raise RuntimeError("injected solver crash")
        if k in self._fails:
            return dataclasses.replace(plan, status="failed", fallback=True, inputs=plan.inputs * 0 + 50.0)
        if k in self._wild:  # a plan that claims success but breaks every limit: only the gate stands in the way
            return dataclasses.replace(plan, inputs=np.full_like(plan.inputs, 40.0))
        return plan


def _live(controller, plant, **kw):
    """run_live on a clock that moves only with the plans (0.1 ms each): no deadline passes unless injected."""
    clock = kw.pop("clock", None) or _FakeClock()
    if not isinstance(controller, _Faulty):
        controller = _Faulty(controller, clock=clock)
    elif controller._clock is None:
        controller._clock = clock
    return run_live(controller, plant, clock=clock, **kw)


def test_a_complete_run_delivers_only_checked_inputs_and_records_a_refittable_session(system, tmp_path):
    model, target = system
    run = _live(_controller(model), _plant(model), n_steps=60, target=target, pace="none", seed=1)
    s = run.session
    assert run.stop_reason == "" and len(run.events) == 60
    assert run.summary["unchecked_inputs"] == 0 and run.summary["gate"]["admitted"] + \
        run.summary["gate"]["replaced"] == s.n_samples
    assert _independent_check(np.asarray(s.u)) == (0, 0, 0)
    assert s.trials.tolist() == [[PAST, PAST + 60]]
    assert np.all(s.u[-1] == 0)  # wound down to rest
    assert s.metadata["recorded_under_feedback"] is True
    assert s.metadata["live_run"]["latency_s"]["p99"] >= s.metadata["live_run"]["latency_s"]["p50"] > 0
    save_session(s, tmp_path / "run.h5")  # metadata is file-safe, and the run can be read back to refit
    back = load_session(tmp_path / "run.h5")
    np.testing.assert_array_equal(back.u, s.u)
    assert back.metadata["markers"] == s.metadata["markers"]


def test_the_loop_reaches_the_target_like_the_offline_loop(system):
    """The runner adds deadlines, not different control: without faults it tracks as the planner says."""
    model, target = system
    clock = _FakeClock()  # no deadline can pass: every plan is delivered
    c = _controller(model, budget=1e6)  # the rolling window of delivered inputs must not bind here
    run = run_live(_Faulty(c, clock=clock), _plant(model), n_steps=40, target=target, pace="none", seed=2,
                   clock=clock)
    assert set(run.events) == {"planned"}
    offline = run_closed_loop(c, _plant(model), n_steps=40, target=target, seed=2)
    np.testing.assert_allclose(np.asarray(run.session.u)[PAST:PAST + 40], offline.inputs, atol=1e-9)
    np.testing.assert_allclose(np.asarray(run.session.y)[PAST:PAST + 40], offline.outputs, atol=1e-9)


def test_late_steps_deliver_the_held_input_never_the_late_plan(system):
    model, target = system
    clock = _FakeClock()
    c = _Faulty(_controller(model), clock=clock, late={10, 11, 25})
    run = run_live(c, _plant(model), n_steps=40, target=target, pace="none", clock=clock, overrun_policy="hold")
    u = np.asarray(run.session.u)
    for k in (10, 11, 25):
        assert run.events[k] == "overrun"
        np.testing.assert_array_equal(u[PAST + k], u[PAST + k - 1])  # held
    assert run.summary["counts"]["overrun"] == 3
    assert [i - PAST for i in run.session.metadata["markers"]["overrun"]] == [10, 11, 25]
    assert run.latency_s[10] == pytest.approx(1.0)


def test_late_steps_under_the_fallback_policy_ramp_towards_zero(system):
    model, target = system
    clock = _FakeClock()
    c = _Faulty(_controller(model), clock=clock, late=set(range(15, 40)))
    run = run_live(c, _plant(model), n_steps=40, target=target, pace="none", clock=clock, overrun_policy="fallback")
    u = np.asarray(run.session.u)
    lim = c.limits_
    for k in range(15, 40):
        np.testing.assert_allclose(u[PAST + k], lim.safe_inputs(1, u[PAST + k - 1])[0])
    assert np.all(u[PAST + 39] == 0)


def test_solver_failures_and_crashes_deliver_the_safe_fallback(system):
    model, target = system
    c = _Faulty(_controller(model), raises={5, 6}, fails={12})
    run = _live(c, _plant(model), n_steps=30, target=target, pace="none")
    u = np.asarray(run.session.u)
    lim = c.limits_
    for k in (5, 6, 12):
        assert run.events[k] == "failed"
        np.testing.assert_allclose(u[PAST + k], lim.safe_inputs(1, u[PAST + k - 1])[0])
    assert _independent_check(u) == (0, 0, 0)


def test_a_plan_that_breaks_the_limits_is_stopped_by_the_gate(system):
    model, target = system
    c = _Faulty(_controller(model), wild={3, 4, 20})
    run = _live(c, _plant(model), n_steps=30, target=target, pace="none")
    assert run.events[3].endswith("+gate:amplitude")
    assert run.summary["gate"]["replaced"] >= 3
    assert _independent_check(np.asarray(run.session.u)) == (0, 0, 0)
    assert run.session.metadata["markers"]["gate_amplitude"][0] == PAST + 3


class _VirtualTime(_FakeClock):
    """Simulated seconds for a wall-paced run: each reading takes 1 µs, sleeping moves the time on at once."""

    def __call__(self):
        self.t += 1e-6
        return self.t

    def sleep(self, seconds):
        self.t += seconds


def test_a_wall_paced_run_marks_missed_ticks_after_a_long_step(system):
    # simulated time (deterministic whatever the machine's load): plans take 0.1 ms, the plan of step 8 takes 60 ms
    model, target = system
    vt = _VirtualTime()
    c = _Faulty(_controller(model), clock=vt, late={8}, late_s=0.06)
    run = run_live(c, _plant(model, rate=100.0), n_steps=30, target=target, pace="wall", clock=vt, sleep=vt.sleep)
    # step 8 ends 60 ms after its tick: it overran, and the ticks of steps 9-13 passed while it ran (10 ms each)
    assert run.events[8] == "overrun" and run.events[9:14] == ("missed",) * 5
    assert set(run.events[:8] + run.events[14:]) == {"planned"}
    assert run.summary["counts"]["overrun"] == 1 and run.summary["counts"]["missed"] == 5
    assert [i - PAST for i in run.session.metadata["markers"]["missed"]] == [9, 10, 11, 12, 13]
    # the start of each step by its cause: steps 9-14 found their tick passed (step 14's by the 1 µs clock readings
    # of the catch-up); every other step waited, and woke within a few clock readings of its tick
    assert run.summary["started_behind"] == 6
    wake = run.summary["wake_s"]
    assert 0.0 <= wake["p50"] <= wake["max"] <= 5e-6
    assert np.isfinite(run.jitter_s[1:]).all() and np.isnan(run.latency_s[9:14]).all()
    u = np.asarray(run.session.u)
    for k in range(8, 14):  # the overrun and the missed ticks held the last input (policy "hold")
        np.testing.assert_array_equal(u[PAST + k], u[PAST + 7])
    assert not np.array_equal(u[PAST + 14], u[PAST + 7])  # planning resumes
    assert _independent_check(u) == (0, 0, 0)


class _SlowPlant:
    """A plant whose step takes ``step_s`` of simulated time (a simulation dearer than the loop)."""

    def __init__(self, inner, clock, step_s):
        self._p, self._clock, self._step_s = inner, clock, step_s
        self.n_inputs, self.n_outputs, self.sample_rate_hz = inner.n_inputs, inner.n_outputs, inner.sample_rate_hz

    def reset(self, seed=None, x0=None):
        self._p.reset(seed=seed, x0=x0)

    def step(self, u):
        self._clock.t += self._step_s
        return self._p.step(u)


@pytest.mark.parametrize("simulated", [False, True])
def test_a_simulated_plants_step_is_taken_off_the_loops_clock_only_when_declared(system, simulated):
    # plans take 4 ms and the plant's step 7 ms of a 10 ms period: inside the period every step ends after the next
    # tick (the plant's time counted); declared simulated, the loop keeps time as if the plant ran elsewhere
    model, target = system
    vt = _VirtualTime()
    c = _Faulty(_controller(model), clock=vt, step_s=0.004)
    plant = _SlowPlant(_plant(model, rate=100.0), vt, 0.007)
    run = run_live(c, plant, n_steps=40, target=target, pace="wall", clock=vt, sleep=vt.sleep,
                   simulated_plant=simulated)
    s = run.summary
    assert s["latency_clock"] == ("loop" if simulated else "wall")
    assert ("taken off" in s["latency_definition"]) == simulated
    assert 0.007 <= s["plant_step_s"]["p50"] <= 0.00701  # reported either way
    if simulated:  # each step waited for its tick, and its latency is the plan's time (+ a few clock readings)
        assert s["started_behind"] == 0 and set(run.events) == {"planned"}
        assert 0.004 <= s["latency_s"]["p50"] <= s["latency_s"]["max"] <= 0.00402
        assert s["jitter_s"]["max"] <= 2e-5
    else:  # the schedule slips: steps start behind, ticks pass unplanned
        assert s["started_behind"] > 10 and s["counts"]["missed"] > 0
    assert s["unchecked_inputs"] == 0 and _independent_check(np.asarray(run.session.u)) == (0, 0, 0)


class _StallingPlant:
    """A plant whose samples stop arriving after ``stall_at`` controlled steps (a stalled inlet)."""

    def __init__(self, inner, stall_at, error_at=None):
        self._p, self._k, self._stall, self._err = inner, 0, stall_at, error_at
        self.n_inputs, self.n_outputs, self.sample_rate_hz = inner.n_inputs, inner.n_outputs, inner.sample_rate_hz

    def reset(self, seed=None, x0=None):
        self._p.reset(seed=seed, x0=x0)

    def step(self, u):
        self._k += 1
        y = self._p.step(u)
        if self._err is not None and self._k == self._err:
            raise StimsteerError("injected stream fault: the time stamps jumped")
        return np.full_like(y, np.nan) if self._k > self._stall else y


def test_a_stalled_source_delivers_safe_inputs_then_stops_at_the_stall_limit(system):
    model, target = system
    plant = _StallingPlant(_plant(model, rate=100.0), stall_at=PAST + 20)
    run = _live(_controller(model), plant, n_steps=200, target=target, pace="none", max_stall_s=0.1)
    s = run.session
    assert "stalled" in run.stop_reason and len(run.events) < 200
    assert all(e.startswith("no_data") for e in run.events[21:])
    assert not np.any(s.mask[PAST + 20:])
    assert np.all(s.u[-1] == 0) and _independent_check(np.asarray(s.u)) == (0, 0, 0)


def test_a_stream_fault_stops_the_run_and_winds_down(system):
    model, target = system
    plant = _StallingPlant(_plant(model), stall_at=10**9, error_at=PAST + 15)
    run = _live(_controller(model), plant, n_steps=100, target=target, pace="none")
    assert "time stamps jumped" in run.stop_reason
    assert np.all(run.session.u[-1] == 0)
    assert _independent_check(np.asarray(run.session.u)) == (0, 0, 0)


def test_refuses_a_sample_period_shorter_than_the_best_measured_step(system):
    model, target = system

    class Slow(_Faulty):
        def plan(self, u_past, y_past, **kw):
            time.sleep(0.003)
            return super().plan(u_past, y_past, **kw)

    with pytest.raises(InvalidParameterError, match=r"sample period 1000 µs .* shorter than the best measured step "
                                                    r"\d+ µs \(median \d+ µs"):
        run_live(Slow(_controller(model)), _plant(model, rate=1000.0), n_steps=5, target=target,
                 calibration_steps=3)


@pytest.mark.parametrize("kw, err, match", [
    ({"overrun_policy": "skip"}, InvalidParameterError, "overrun_policy must be one of"),
    ({"pace": "fast"}, InvalidParameterError, "pace must be one of"),
    ({"n_steps": 0}, InvalidParameterError, "n_steps must be a whole number"),
    ({"sample_rate_hz": 250.0}, SessionError, "differs from the plant's 100 Hz"),
    ({"max_stall_s": -1}, InvalidParameterError, "max_stall_s must be a positive"),
    ({"warmup_inputs": np.full((PAST, M), 5.0)}, StimsteerError, "warm-up inputs break the hard limits"),
])
def test_bad_settings_are_refused_with_a_clear_message(system, kw, err, match):
    model, target = system
    args = {"n_steps": 5, "target": target, "pace": "none", **kw}
    with pytest.raises(err, match=match):
        run_live(_controller(model), _plant(model), **args)


def test_a_plant_with_other_channels_is_refused(system):
    model, target = system
    other = LinearNetworkPlant(model.A, model.B[:, :1], model.C, sample_rate_hz=100.0)
    with pytest.raises(SessionError, match="the plant has 1 inputs"):
        run_live(_controller(model), other, n_steps=5, target=target, pace="none")


def test_the_gate_replaces_what_breaks_the_rolling_energy_window():
    lim = StimLimits(amplitude_min_ua=LO, amplitude_max_ua=HI, n_inputs=M, slew_max_ua=SLEW, energy_budget_ua2=1.0)
    gate = InputGate(lim, energy_window_steps=4)
    sent, reasons = [], []
    for k in range(40):  # always ask for the most the slew allows
        u, why = gate.admit(gate.last_input + SLEW)
        sent.append(u)
        reasons.append(why)
    u = np.asarray(sent)
    e = np.sum(u**2, axis=1)
    assert all(e[max(0, k - 3):k + 1].sum() <= 1.0 for k in range(len(e)))
    assert "energy_budget" in reasons and "" in reasons
    assert lim.violations(u, np.zeros(M), energy_window_steps=4) == {"amplitude": 0, "slew": 0, "energy_budget": 0}


def test_the_gate_puts_rounding_level_excess_on_the_bound_and_refuses_more():
    lim = StimLimits(amplitude_min_ua=LO, amplitude_max_ua=HI, n_inputs=M)
    gate = InputGate(lim)
    u, why = gate.admit([HI * (1 + 1e-12), 0.0])
    assert why == "" and u[0] == HI
    u, why = gate.admit([HI * 1.001, 0.0])
    assert why == "amplitude" and np.all(u == 0)
    u, why = gate.admit([np.nan, 0.0])
    assert why == "not_finite"
    with pytest.raises(InvalidParameterError, match="energy_window_steps"):
        InputGate(StimLimits(amplitude_min_ua=LO, amplitude_max_ua=HI, n_inputs=M, energy_budget_ua2=1.0))


def test_inputs_are_not_modified(system):
    model, target = system
    t = target.copy()
    warm = np.zeros((PAST, M))
    _live(_controller(model), _plant(model), n_steps=5, target=t, pace="none", warmup_inputs=warm)
    np.testing.assert_array_equal(t, target)
    assert np.all(warm == 0)
    assert isinstance(Session, type)


def test_the_gate_never_corners_itself_under_slew_and_energy_limits():
    """Greedy admission can leave the ramp down too slow for the next windows (seen on LSL runs: a window of
    4.01 µA² for a budget of 4); the gate looks ahead along the ramp, so even adversarial requests never force it."""
    lim = StimLimits(amplitude_min_ua=LO, amplitude_max_ua=HI, n_inputs=M, slew_max_ua=0.3, energy_budget_ua2=4.0)
    rng = np.random.default_rng(0)
    gate = InputGate(lim, energy_window_steps=6)
    sent = []
    for _ in range(3000):
        ask = gate.last_input + rng.uniform(-0.3, 0.3, size=M) * rng.choice([1.0, 1.0, 0.2])
        sent.append(gate.admit(np.clip(ask, LO, HI))[0])
    u = np.asarray(sent)
    e = np.sum(u**2, axis=1)
    assert gate.n_unavoidable == 0 and gate.n_replaced > 0
    assert all(e[max(0, k - 5):k + 1].sum() <= 4.0 for k in range(len(e)))
    assert lim.violations(u, np.zeros(M), energy_window_steps=6) == {"amplitude": 0, "slew": 0, "energy_budget": 0}


def test_real_time_scheduling_is_asked_for_only_on_request_reported_and_undone(system, monkeypatch):
    """``realtime=True`` asks for SCHED_FIFO, one core and locked memory; a refusal is reported with the system's
    reason and the run goes on; what was granted is undone when the run ends (the calls are recorded, not made:
    tests must not take a core from the machine)."""
    import os

    from stimsteer.control import _process_priority as pp

    model, target = system
    calls = []
    monkeypatch.setattr(os, "sched_setscheduler", lambda pid, pol, par: calls.append(("sched", pol)), raising=False)
    monkeypatch.setattr(os, "sched_setaffinity", lambda pid, cores: calls.append(("cores", set(cores))),
                        raising=False)

    class _Libc:
        def mlockall(self, flags):
            calls.append(("lock", flags))
            return -1  # refused

    monkeypatch.setattr(pp, "_libc", lambda: _Libc())
    run = _live(_controller(model), _plant(model), n_steps=5, target=target, pace="none", seed=1, realtime=True)
    rt = run.summary["realtime"]
    assert rt["requested"] is True and rt["sched_fifo"].startswith("granted")
    assert rt["cpu"].startswith("granted") and rt["memory_locked"].startswith("refused")
    assert run.session.metadata["live_run"]["realtime"] == rt and run.summary["unchecked_inputs"] == 0
    before = os.sched_getaffinity(0) if hasattr(os, "sched_getaffinity") else None
    kinds = [c[0] for c in calls]
    assert kinds == ["sched", "cores", "lock", "cores", "sched"]  # asked for, then undone last first
    assert calls[1][1] == {max(before)} and calls[3][1] == before
    assert calls[0][1] == os.SCHED_FIFO and calls[4][1] == os.sched_getscheduler(0)
    calls.clear()
    plain = _live(_controller(model), _plant(model), n_steps=5, target=target, pace="none", seed=1)
    assert plain.summary["realtime"] == {"requested": False} and calls == []


def test_a_refused_real_time_request_is_reported_and_changes_nothing_else(system, monkeypatch):
    import os

    from stimsteer.control import _process_priority as pp

    model, target = system

    def denied(*a):
        raise PermissionError(1, "Operation not permitted")
    for name in ("sched_setscheduler", "sched_setaffinity"):
        monkeypatch.setattr(os, name, denied, raising=False)
    monkeypatch.setattr(pp, "_libc", lambda: None)
    run = _live(_controller(model), _plant(model), n_steps=20, target=target, pace="none", seed=1, realtime=True)
    ref = _live(_controller(model), _plant(model), n_steps=20, target=target, pace="none", seed=1)
    rt = run.summary["realtime"]
    assert rt["sched_fifo"] == rt["cpu"] == "refused: Operation not permitted"
    assert rt["memory_locked"].startswith("refused")
    np.testing.assert_array_equal(np.asarray(run.session.u), np.asarray(ref.session.u))
    assert run.events == ref.events and run.summary["unchecked_inputs"] == 0


@pytest.mark.parametrize("granted", [False, True])
def test_under_real_time_scheduling_the_loop_sleeps_closer_to_its_ticks(system, monkeypatch, granted):
    """A SCHED_FIFO loop sleeps until 30 µs before a tick (its wake-up is prompt, and spinning its core full would
    meet the kernel's real-time throttling); without it, until 0.5 ms before (ordinary sleeps wake late)."""
    import os

    from stimsteer.control import _process_priority as pp

    model, target = system
    monkeypatch.setattr(os, "sched_setscheduler", lambda *a: None, raising=False)
    monkeypatch.setattr(os, "sched_setaffinity", lambda *a: None, raising=False)
    monkeypatch.setattr(pp, "_libc", lambda: None)
    class _Ticking(_FakeClock):  # a read takes 1 µs: the spin before a tick ends
        def __call__(self):
            self.t += 1e-6
            return self.t
    clock, slept = _Ticking(), []

    def sleep(s):
        slept.append(s)
        clock.t += s
    run = _live(_controller(model), _plant(model, rate=1000.0), n_steps=10, target=target, pace="wall", seed=1,
                clock=clock, sleep=sleep, realtime=granted)
    assert set(run.events) == {"planned"}
    # each plan takes 0.1 ms of the 1 ms period: 0.9 ms left (less a few clock reads), slept but for the spin margin
    np.testing.assert_allclose(slept[1:], 0.9e-3 - (30e-6 if granted else 0.5e-3), atol=1e-5)
