"""Live closed loops with deadlines: :func:`run_live`, a loop runner that treats the sample period as a budget.

At every sample the runner plans from the last measured window with any controller of
:mod:`stimsteer.control.mpc` (through its public ``plan``), and delivers the plan's first input to a plant (a
simulated plant, or the streaming bridge of :mod:`stimsteer.control.stream`; anything with ``reset`` and
``step``). Unlike :func:`stimsteer.control.loop.run_closed_loop` (a simulation study), it keeps time:

* **Budget.** The sample period is the budget of each step, counted from the sample's tick (``pace="wall"``: the
  runner's own schedule ``t0 + k·T``; ``pace="source"``: the moment the plant's ``step`` returned the sample, for
  sources that block until data arrive; ``pace="none"``: simulation as fast as possible, the budget applies to the
  compute time alone). A step whose decision is ready after the budget is an *overrun*; a wall tick that has
  already passed when the runner reaches it is *missed* (not planned at all).
* **Overrun policy**, declared: ``"hold"`` delivers the last delivered input again, ``"fallback"`` the next sample
  of the safe fallback (:meth:`StimLimits.safe_inputs`). A late plan is never delivered. A plan that failed (a
  fallback plan, or a controller that raised) and a window with missing data (a stalled source) deliver the safe
  fallback whatever the policy: without a valid plan or data, holding a stimulation is not known to be safe.
* **Gate.** Every input that leaves passes :class:`~stimsteer.control.input_gate.InputGate` at that moment:
  amplitude, slew from the last *delivered* input, every rolling budget over the windows of delivered inputs (the
  energy budget over its window, default the controller's horizon; charge and energy windows in physical terms)
  and train length and duty from the on samples delivered. An input that breaks a per-sample limit is replaced by
  the safe fallback; one that would break a window or a train is reduced to the largest safe input.
* **Sequence limits and the controller.** The full ``plan`` receives the delivered inputs as far back as its
  windows and trains reach (``history_steps_``), so it plans inside what is left of every window; a
  :class:`~stimsteer.control.mpc.fast_step.FastStep` plans with the per-sample limits only, and the gate clips its
  first input to the remaining budget and the train mask of the delivered history (safe: the limits are on the
  delivered sequence, and the gate's fallback always fits; not the full plan's answer, which looks ahead).
* **Refusal.** Before the first input, the runner times ``calibration_steps`` plans on the warm-up window (nothing
  is delivered) and refuses to start when the sample period is shorter than the best of them, with the figures.
* **Wind-down.** However the run ends (its length, a stalled source, a stream error, an interrupt), the runner
  delivers the safe fallback until the input is zero, so a stimulator is never left holding a command.
* **Record.** The whole run is a :class:`~stimsteer.sysid.Session`: inputs actually delivered, outputs received
  (a missing sample is masked), one trial over the controlled samples, and in its metadata the markers (sample
  indices of overruns, missed ticks, fallbacks, gate replacements, missing data, wind-down) and the timing
  figures, so the run can be checked and refitted (it is marked ``recorded_under_feedback``).

Latency is the time from the tick to the checked decision (plan + gate, before the input is sent), seconds; it
includes any wait for the step to start when the previous one ran late (catching up). The service time is the part
from the moment the step's work began to its decision (the step's own cost, preemption during it included); jitter
is ``|tick interval − T|`` (``pace`` "wall" or "source"). With ``pace="wall"`` the start of a step is split by
its cause: the *wake-up lateness* (start − tick) of the steps whose tick the loop was waiting for (sleep and spin
wake-up, preemption while waiting, idle work that ran long), and the count of steps that *started behind* (their
tick had passed when the previous step ended). Each reported as p50/p99/max, with the counts of each marker.

Which clock those figures are on is declared (``summary["latency_clock"]``, ``"latency_definition"``): the wall
clock by default, where the plant's ``step`` (sending the input, reading the next sample) runs inside the period;
with ``simulated_plant=True`` the loop's clock, from which a simulated plant's step is taken off -- hardware
samples on its own clock, and a real loop's latency runs from the sample's arrival to the checked input. The plant's
step time is reported either way (``plant_step_s``).
"""

from __future__ import annotations

import gc
import math
import time
from dataclasses import dataclass

import numpy as np

from ..sysid import InvalidParameterError, Session, StimsteerError, check_fitted
from ..sysid.caution import CAUTION
from . import _process_priority
from ._live_record import record_run, timing_summary
from ._live_setup import OVERRUN_POLICIES, PACES, _calibrate, _check_settings, _warmup, energy_window
from .input_gate import InputGate
from .loop import offset_free_wrapper
from .mpc.fast_step import StepResult

__all__ = ["LiveRun", "run_live", "energy_window", "OVERRUN_POLICIES", "PACES"]

_SPIN_S = 0.0005  # sleep until this close to a wall tick, then spin: sleep alone wakes up to ~0.1 ms late
# under SCHED_FIFO a sleep wakes within ~25 µs (p99 on a loaded 2-core VM), and a loop that spun its core full would
# meet the kernel's real-time throttling (by default 0.95 s of every second: a 50 ms stall each second)
_SPIN_FIFO_S = 30e-6


@dataclass(frozen=True)
class LiveRun:
    """What a live run delivered and how well it kept time.

    Attributes
    ----------
    session : Session
        The recorded run (warm-up, controlled samples, wind-down); markers and timing in ``session.metadata``.
    latency_s : ndarray, shape (n_steps,)
        Tick to decision of each controlled sample, seconds (NaN for a missed tick).
    jitter_s : ndarray, shape (n_steps,)
        ``|tick interval − sample period|``, seconds (NaN with ``pace="none"``, and for the first tick).
    events : tuple of str
        Per controlled sample: ``"planned"``, ``"overrun"``, ``"missed"``, ``"failed"`` (a fallback plan or a
        controller error), ``"no_data"``; a gate replacement adds ``"+gate:<limit>"``.
    stop_reason : str
        ``""`` when the run reached its length, else why it stopped early.
    summary : dict
        JSON-ready figures (see :func:`stimsteer.control._live_record.timing_summary`).
    caution : str
    """

    session: Session
    latency_s: np.ndarray
    jitter_s: np.ndarray
    events: tuple
    stop_reason: str
    summary: dict
    caution: str = CAUTION


class _Loop:
    """The mutable state of one run: delivered inputs and received outputs (preallocated), gate, clock, markers."""

    def __init__(self, controller, plant, gate, period, policy, pace, clock, capacity, n_steps, simulated_plant=False):
        self.c, self.plant, self.gate, self.T = controller, plant, gate, period
        # a simulated plant's step is the hardware's time, not the loop's: it is taken off the loop's clock
        self.simulated, self.plant_s = bool(simulated_plant), 0.0
        self.policy, self.pace, self.clock, self.sleep, self.spin = policy, pace, clock, time.sleep, _SPIN_S
        # preallocated: windows are views, not copies (a 10 kHz loop has no time for list-to-array copies)
        self._u = np.zeros((capacity, controller.n_inputs_))
        self._y = np.full((capacity, controller.n_outputs_), np.nan)
        self._y_shape, self._ones = (controller.n_outputs_,), np.ones(controller.n_outputs_)
        self.n, self.missing_run, self.last_gap = 0, 0, -(10**9)
        # a shared gate (the bridge's) may have counted inputs before this run
        self.gate0 = (gate.n_admitted, gate.n_replaced, gate.n_reduced, gate.n_unavoidable)
        self.history = int(getattr(controller, "history_steps_", 0) or 0)
        # read once: a FastStep answers fitted attributes through __getattr__, a microsecond each at 10 kHz
        self.past = int(controller.past_steps_)
        self.reach = max(self.past, self.history)
        # per-step records, preallocated and touched (no list growth, float objects or page faults mid-run):
        # latency, service (start of the step's work to its decision), ticks, wake-up lateness (wall pace: how late
        # a step started after its tick when the loop was waiting for it), the plant's step time; and the events
        self._rec = {k: _touched(n_steps if k != "plant_t" else capacity)
                     for k in ("latency", "service", "ticks", "wake", "plant_t")}
        self._n = dict.fromkeys(self._rec, 0)
        self._ev, self.n_events = [""] * n_steps, 0
        self.markers, self.n_behind, self.waited = {}, 0, False
        # work a controller leaves for the time between samples (FastStep: the answer map of a new active set)
        self._idle = getattr(controller, "idle", None) if hasattr(controller, "idle_cost_s") else None
        self.start = 0.0  # when the current step's work began (set by _step)

    def record(self, kind, value):
        i = self._n[kind]
        self._rec[kind][i] = value
        self._n[kind] = i + 1

    def recorded(self, kind):
        return self._rec[kind][:self._n[kind]]

    latency, service, ticks, wake, plant_t = (property(lambda self, k=k: self.recorded(k))
                                              for k in ("latency", "service", "ticks", "wake", "plant_t"))

    @property
    def events(self):
        return self._ev[:self.n_events]

    def event(self, kind):
        i = self.n_events
        self._ev[i] = kind
        self.n_events = i + 1

    @property
    def U(self):
        return self._u[:self.n]

    @property
    def Y(self):
        return self._y[:self.n]

    def window(self):
        """The past window ``(u, y)`` as views, or None when a sample in it is missing; ``u`` reaches back as far as
        the controller's windows and trains do (delivered inputs are always known)."""
        T, n = self.past, self.n
        if n - self.last_gap <= T:
            return None
        return self._u[max(0, n - self.reach):n], self._y[n - T:n]

    def mark(self, kind):
        self.markers.setdefault(kind, []).append(self.n)

    def deliver(self, u, kind=None, base=None):
        """Gate ``u``, send it, receive the next sample; returns the gate's reason ('' when ``u`` left as given).
        With ``base`` (the tick), the latency to the checked decision is recorded before the input is sent."""
        if kind:
            self.mark(kind)
        sent, why = self.gate.admit(u, hand=True)  # a plant sharing the gate (the bridge) sends it as checked
        if base is not None:
            now = self.clock()
            self.record("latency", now - base)
            self.record("service", now - self.start)
        if why:
            self.mark(f"gate_{why}")
        i = self.n
        self._u[i] = sent
        self.n = i + 1
        t0 = self.clock()
        try:
            y = np.asarray(self.plant.step(sent), np.float64).reshape(-1)
        except StimsteerError:
            self._gap(i)
            raise
        finally:
            dt = self.clock() - t0
            self.record("plant_t", dt)
            if self.simulated:
                self.plant_s += dt
        if y.shape == self._y_shape and math.isfinite(np.dot(self._ones, y)):  # NaN or inf anywhere: not finite
            self._y[i] = y
            self.missing_run = 0
        else:
            self._gap(i)
        return why

    def _gap(self, i):
        self.last_gap, self.missing_run = i, self.missing_run + 1

    def wait_tick(self, tick):
        if self.pace != "wall":
            if self._idle is not None and self.pace == "none":
                self._idle()
            return self.clock()
        idle = self._idle
        now = self.clock()
        self.waited = now < tick
        while True:
            left = tick - now
            if left <= 0:
                return now
            if idle is not None and left > 2.0 * self.c.idle_cost_s:  # only with time to spare before the tick
                if not idle():  # a piece of work done: the clock is read again before the next
                    idle = None
            elif left > self.spin:
                self.sleep(left - self.spin)
            now = self.clock()


def run_live(controller, plant, *, n_steps, target, overrun_policy="hold", pace="wall", sample_rate_hz=None,
             seed=None, x0=None, warmup_inputs=None, calibration_steps=20, max_stall_s=1.0, use_fast_path=None,
             output_units="a.u.", clock=time.perf_counter, offset_free=None, sleep=time.sleep,
             simulated_plant=False, realtime=False) -> LiveRun:
    """Run a fitted controller against a plant in real time, with deadlines, and record the run as a session.

    Parameters
    ----------
    controller : a fitted controller of :mod:`stimsteer.control.mpc`
        Used through ``plan(u_past, y_past, target=, last_input=, use_fast_path=)``, ``reset()`` and its fitted
        ``limits_``, ``past_steps_``, ``horizon_steps_``, ``n_inputs_``, ``n_outputs_``, ``input_names_``,
        ``output_names_``.
    plant : Plant
        ``reset(seed, x0)``, ``step(u_k) -> y_k`` and ``sample_rate_hz`` (a row of NaN: no sample arrived).
    n_steps : int
        Controlled samples (after the warm-up).
    target : ndarray
        As for ``controller.plan``: a constant (n_outputs,) or state target, kept for the whole run.
    overrun_policy : {"hold", "fallback"}, default "hold"
        What an overrun or a missed tick delivers (see the module docstring).
    pace : {"wall", "source", "none"}, default "wall"
        Where ticks come from (see the module docstring).
    sample_rate_hz : float, optional
        The loop's rate; default the plant's. A rate different from the plant's is refused.
    seed, x0
        Passed to ``plant.reset``.
    warmup_inputs : ndarray, shape (>= past_steps_, n_inputs), optional
        Delivered before the loop (through the gate) to fill the past window; default zeros.
    calibration_steps : int, default 20
        Plans timed before the start (nothing delivered); the best of them must fit in the sample period.
    max_stall_s : float, default 1.0
        Stop when no sample has arrived for this long (consecutive missing samples × period).
    use_fast_path : bool, optional
        Passed to every plan.
    output_units : str or sequence of str, default "a.u."
        Units of the recorded outputs in the session.
    clock : callable, default time.perf_counter
        Monotonic seconds.
    sleep : callable, default time.sleep
        Waits for the given seconds (``pace="wall"``); with ``clock``, a simulated time for tests and replays.
    offset_free : {None, "constant", "ramp"}, optional
        Plan offset-free with this output-disturbance model
        (:class:`~stimsteer.control.mpc.offset_free.OffsetFreeController`); the estimate is updated only from
        samples whose delivered input is the one planned (a held, replaced or fallback input teaches it nothing).
    simulated_plant : bool, default False
        True when ``plant`` is a simulation standing in for hardware that samples on its own clock (a benchmark,
        ``stimsteer live --plant``): the time its ``step`` takes is the simulated hardware's, not the loop's, and is
        taken off the loop's clock -- ticks, latency, overruns, missed ticks and jitter are counted as if the plant
        ran elsewhere (the run takes that much longer in wall time), so the latency is the time from the sample's
        arrival (its tick) to the checked input, as a loop beside real hardware times it. False: the plant's step
        runs inside the period (the streaming bridge's step sends the input and reads the next sample: loop work).
        Nothing else changes: every input is gated, a late plan is never delivered.
    realtime : bool, default False
        Ask for real-time scheduling (``SCHED_FIFO``) on one core and locked memory for the run
        (:mod:`stimsteer.control._process_priority`); what the system granted or refused, with its reason, is in
        ``summary["realtime"]``. Never required: a refusal changes nothing else. Everything granted is undone when
        the run ends. Under ``SCHED_FIFO`` the loop sleeps until 30 µs before each tick (not 0.5 ms), so it
        never spins its core full.

    Returns
    -------
    LiveRun

    Raises
    ------
    InvalidParameterError
        Bad settings; a sample period shorter than the best measured step (the message gives the figures).
    SessionError
        A plant whose channels or rate differ from the controller's; a bad warm-up.
    LimitsError
        Warm-up inputs outside the limits.
    """
    check_fitted(controller, "problem_")
    controller = offset_free_wrapper(controller, offset_free)
    period = _check_settings(controller, plant, n_steps, overrun_policy, pace, sample_rate_hz, calibration_steps,
                             max_stall_s)
    warm = _warmup(controller, warmup_inputs)
    gate = _gate(controller, plant)
    capacity = warm.shape[0] + int(n_steps) + _ramp_steps(controller.limits_) + 1
    loop = _Loop(controller, plant, gate, period, overrun_policy, pace, clock, capacity, int(n_steps), simulated_plant)
    loop.sleep = sleep
    best = _calibrate(controller, warm, target, gate, int(calibration_steps), use_fast_path, clock)
    if period < best["min"]:
        raise InvalidParameterError(
            f"the sample period {_us(period)} ({1 / period:g} Hz) is shorter than the best measured step "
            f"{_us(best['min'])} (median {_us(best['median'])}, max {_us(best['max'])} over {best['n']} timed plans "
            f"on the warm-up window); lower the rate below {1 / best['min']:.4g} Hz (below {1 / best['median']:.4g} "
            "Hz for most steps to meet their deadline), or use a cheaper controller (shorter horizon, fewer inputs).")
    plant.reset(seed=seed, x0=x0)
    granted, undo = _process_priority.request() if realtime else ({"requested": False}, [])
    if str(granted.get("sched_fifo", "")).startswith("granted"):
        loop.spin = _SPIN_FIFO_S  # sleep closer to the tick: the core must not spin full (module notes)
    try:
        stop = _run(loop, warm, n_steps, target, max_stall_s, use_fast_path)
    finally:
        _process_priority.restore(undo)
    summary = timing_summary(loop, period, best, stop)
    summary["realtime"] = granted
    if offset_free:
        summary["offset_free"] = {"disturbance_model": offset_free,
                                  "disturbance_estimate": [float(v) for v in controller.disturbance_]}
    session = record_run(loop, warm.shape[0], n_steps, period, summary, output_units)
    return LiveRun(session=session, latency_s=_ro(loop.latency), jitter_s=_jitter(loop.ticks, period, pace),
                   events=tuple(loop.events), stop_reason=stop, summary=summary)


def _run(loop, warm, n_steps, target, max_stall_s, use_fast_path):
    """Warm up, run the controlled samples, wind down; the stop reason ('' for a complete run).

    The cyclic garbage collector is paused for the run (objects alive at the start frozen out of it): a collection
    takes hundreds of microseconds at a moment nobody chose, and a step allocates no reference cycles. It is
    restored as it was, however the run ends."""
    stop = ""
    collecting = gc.isenabled()
    gc.collect()
    gc.freeze()
    gc.disable()
    try:
        for u in warm:
            loop.deliver(u)
        stall_limit = max(1, int(np.ceil(max_stall_s / loop.T)))
        loop.plant_s, loop._n["plant_t"] = 0.0, 0  # the controlled samples' (the warm-up has no deadline)
        t0 = loop.clock() + loop.T
        for k in range(int(n_steps)):
            # a simulated plant's time so far moves the schedule: ticks keep the loop's clock
            _step(loop, t0 + k * loop.T + loop.plant_s, target, use_fast_path)
            if loop.missing_run >= stall_limit:
                missing = loop.missing_run
                stop = (f"no sample arrived for {missing} samples ({missing * loop.T:.3g} s >= max_stall_s "
                        f"{max_stall_s:g} s); the source stalled")
                break
    except StimsteerError as exc:  # a stream fault (e.g. a clock jump): stop, then wind down safely
        stop = str(exc)
    except KeyboardInterrupt:
        stop = "interrupted"
    finally:
        try:
            _wind_down(loop)
        finally:
            gc.unfreeze()
            if collecting:
                gc.enable()
    return stop


def _step(loop, tick, target, use_fast_path):
    """One controlled sample: wait for its tick, plan within the budget or apply the policy, deliver."""
    c, T = loop.c, loop.T
    start = loop.start = loop.wait_tick(tick)
    base = tick if loop.pace == "wall" else start
    loop.record("ticks", start - loop.plant_s)
    if loop.pace == "wall":
        if loop.waited:
            loop.record("wake", start - tick)
        else:
            loop.n_behind += 1
    if loop.pace == "wall" and start - tick > T:  # this tick passed while the previous step ran: not planned
        loop.record("latency", math.nan)
        loop.record("service", math.nan)
        return _after(loop, loop.deliver(_policy_input(loop), "missed"), "missed")
    window = loop.window()
    if window is None:
        return _after(loop, loop.deliver(loop.gate.safe_input(), "no_data", base), "no_data")
    try:
        plan = c.plan(window[0], window[1], target=target, last_input=loop.gate.last_input, use_fast_path=use_fast_path)
        # a fast step's first input as a list of floats (the gate takes it without an array round trip)
        u, kind = (_first(plan), "planned") if not plan.fallback else (None, "failed")
    except Exception:  # noqa: BLE001 -- a live loop must deliver something safe whatever went wrong in a plan
        u, kind = None, "failed"
    if kind == "planned" and loop.clock() - base > T:
        u, kind = _policy_input(loop), "overrun"  # a late plan is never delivered
    elif kind == "failed":
        u = loop.gate.safe_input()
    _after(loop, loop.deliver(u, None if kind == "planned" else kind, base), kind)
    if kind == "overrun" and loop._idle is not None:  # late already: one piece of the work that ends the overruns
        loop._idle()


def _first(plan):
    return plan.first if type(plan) is StepResult else plan.inputs[0]


def _after(loop, why, kind):
    loop.event(kind + "+gate:" + why if why else kind)


def _policy_input(loop):
    return loop.gate.last_input.copy() if loop.policy == "hold" else loop.gate.safe_input()


def _gate(controller, plant):
    """The plant's own gate when it keeps one for the controller's very limits (the streaming bridge, made with
    ``limits=controller.limits_``) and energy window: the runner's check is then the bridge's
    (:meth:`InputGate.take`), once per sample; else a gate of the runner's own."""
    window = energy_window(controller)
    shared = getattr(plant, "gate", None)
    if (isinstance(shared, InputGate) and shared.limits is controller.limits_
            and (controller.limits_.energy_budget_ua2 is None or shared.energy_window_steps == window)):
        return shared
    return InputGate(controller.limits_, energy_window_steps=window)


def _ramp_steps(limits):
    """Most samples the safe fallback needs from anywhere in the amplitude window to zero."""
    lo, hi = limits.input_bounds()
    slew = np.inf if limits.slew_max_ua is None else limits.slew_max_ua
    reach = np.maximum(np.abs(lo), np.abs(hi))
    return int(np.max(np.where(np.isfinite(slew), np.ceil(reach / slew), 1))) + 1


def _wind_down(loop):
    """Deliver the safe fallback until the input is zero (bounded by the slew limit's ramp length)."""
    if not np.any(loop.gate.last_input):
        return
    for _ in range(_ramp_steps(loop.c.limits_)):
        if not np.any(loop.gate.last_input):
            return
        try:
            loop.deliver(loop.gate.safe_input(), "wind_down")
        except StimsteerError:  # the source is gone: the command still leaves, the next one too
            continue


def _touched(n):
    """A float64 buffer of ``n`` values whose pages are all written (faulted in) now, before any deadline."""
    a = np.empty(max(int(n), 1))
    a.fill(0.0)
    return a


def _jitter(ticks, period, pace):
    t = np.asarray(ticks, np.float64)
    j = np.full(t.shape, np.nan)
    if pace != "none" and t.size > 1:
        j[1:] = np.abs(np.diff(t) - period)
    return _ro(j)


def _us(seconds):
    return f"{seconds * 1e6:.0f} µs"


def _ro(a):
    a = np.array(a, dtype=np.float64, copy=True)
    a.setflags(write=False)
    return a
