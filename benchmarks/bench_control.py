"""Speed of the predictive controllers in a closed loop (issue: predictive control under safety limits).

Setup (not timed): a stable 12-state network with 4 stimulation inputs and 16 recorded outputs, horizon 20,
box amplitude limits only (a QP). Timed, in the same run:

1. ratio A — closed-loop step of stimsteer's indirect controller (``ModelPredictiveController.plan`` on its
   fast path -- the dense warm-started active-set QP when ``daqp`` is installed (the ``realtime`` extra), else the
   reusable OSQP problem: state estimate, bound guards, solve, verification, plan packaging) ÷ the bare OSQP solve
   of the same condensed QP (set up once, only ``q``, ``l``, ``u`` updated per step); for reference also the
   controller's plain cvxpy path (compiled once, re-solved with CLARABEL) ÷ bare OSQP. Target: ratio A <= 2.
2. ratio B — the direct controller's step ÷ the indirect one's, on the same horizon, with predictors fitted on
   5,000 samples: SPC (``LsqPredictor``) and DeePC (``HankelPredictor``, compressed blocks). Target: <= 3.
3. the fast step (``FastStep``, issue 20) against a floor, bare OSQP, and at horizon 80 (see the section below).
4. the live runner at 1 kHz and 10 kHz for ``--live-seconds`` each, with the machine's load printed beside; at
   10 kHz under both latency definitions, back to back (``--live-repeats`` times): the old one (wall clock, the
   simulated plant's step inside the period) and the new one (``run_live(simulated_plant=True)``: the simulated
   plant's step off the loop's clock, latency from the sample's arrival to the checked input).
5. the input gate's added cost per step under limits on the delivered sequence (a rolling charge window, an energy
   window, train length and duty cycle at 10 kHz) against the gate with box limits only, and a 10 kHz live run of the
   fast step under them (``--gate-only`` runs this section alone).

BLAS runs on one thread (threadpoolctl): on a loaded 2-core machine a second BLAS thread only waits.

Run from the repository root:  .venv/bin/python benchmarks/bench_control.py [--steps 200]
"""

from __future__ import annotations

import argparse
import contextlib
import os
import time

import numpy as np

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.sysid import Session, StateSpaceModel
from stimsteer.sysid.datadriven import HankelPredictor, LsqPredictor

N_STATES, N_INPUTS, N_OUTPUTS, HORIZON, PAST, N_DATA = 12, 4, 16, 20, 4, 5000


def _system(seed):
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(N_STATES, N_STATES))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.normal(size=(N_STATES, N_INPUTS)), rng.normal(size=(N_OUTPUTS, N_STATES))
    return StateSpaceModel(A=A, B=B, C=C, past_steps=PAST), rng


def _loop(plan_step, plant, model, target, steps):
    """Run a receding-horizon loop; return the per-step wall times of ``plan_step(u_past, y_past) -> u``."""
    plant.reset(seed=1)
    U = [np.zeros(N_INPUTS)] * PAST
    Y = [plant.step(u) for u in U]
    times = np.empty(steps)
    for k in range(steps):
        t0 = time.perf_counter()
        u = plan_step(np.asarray(U[-PAST:]), np.asarray(Y[-PAST:]))
        times[k] = time.perf_counter() - t0
        U.append(u)
        Y.append(plant.step(u))
    return times


def _bare_osqp(ctrl):
    """OSQP on the controller's condensed QP, set up once; per step only the new vectors (numpy) and the solve."""
    import osqp
    import scipy.sparse as sp

    Nm = ctrl._LG.shape[1]
    H = ctrl._LG.T @ ctrl._LG + ctrl._Ru.T @ ctrl._Ru
    solver = osqp.OSQP()
    from stimsteer.control.mpc.fastqp import _SILENT, _osqp_settings

    solver.setup(sp.triu(sp.csc_matrix(2 * H), format="csc"), np.zeros(Nm), sp.eye(Nm, format="csc"),
                 np.tile(ctrl._lo, HORIZON), np.tile(ctrl._hi, HORIZON), **_osqp_settings(True))
    M = 2.0 * ctrl._LG.T
    kw = {} if osqp.__version__.startswith("0.") else {"raise_error": False}

    def step(ew):
        solver.update(q=M @ ew)
        with contextlib.redirect_stdout(_SILENT):  # as in stimsteer's fast path: OSQP 1.x prints when polishing
            return solver.solve(**kw).x
    return step


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=200, help="closed-loop steps per measurement (default 200)")
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument("--live-seconds", type=float, default=10.0, help="length of each live run (default 10 s)")
    ap.add_argument("--live-repeats", type=int, default=1,
                    help="runs of each 10 kHz live measurement, back to back (default 1; the spread shows the noise)")
    ap.add_argument("--gate-only", action="store_true", help="run section 5 alone (the gate under sequence limits)")
    ap.add_argument("--live-only", action="store_true", help="run sections 4 and 5 alone (live runner, gate)")
    ap.add_argument("--realtime", action="store_true",
                    help="the 10 kHz live runs ask for real-time scheduling, one core and locked memory "
                         "(run_live(realtime=True); what was granted is printed; never required)")
    args = ap.parse_args(argv)
    model, rng = _system(args.seed)
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, process_noise_std=0.01)
    limits = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=N_INPUTS)
    target = rng.normal(size=N_OUTPUTS)
    ind = ModelPredictiveController(model=model, limits=limits, horizon_steps=HORIZON, input_weight=1e-2).fit()
    if args.gate_only:
        return _gate_section(args, model, limits, target)
    if args.live_only:
        from stimsteer.control.mpc.fast_step import FastStep

        _live_section(args, model, plant, limits, target, FastStep(ind), ind)
        return _gate_section(args, model, limits, target)
    bare = _bare_osqp(ind)

    def ind_step(u, y, fast=True):
        return ind.plan(u, y, target=target, use_fast_path=fast).inputs[0]

    def bare_step(u, y):
        x0 = model.estimate_state(u, y)  # the bare loop still needs the free response for q
        ew = ind._Lz @ (ind._Phi_y @ x0 - np.tile(target, HORIZON))
        return np.clip(bare(ew)[:N_INPUTS], -1.0, 1.0)

    t_bare = np.median(_loop(bare_step, plant, model, target, args.steps))
    t_fast = np.median(_loop(ind_step, plant, model, target, args.steps))
    t_cvx = np.median(_loop(lambda u, y: ind_step(u, y, fast=False), plant, model, target, max(args.steps // 4, 10)))
    print(f"system: {N_STATES} states, {N_INPUTS} inputs, {N_OUTPUTS} outputs, horizon {HORIZON}, box limits")
    print(f"median closed-loop step: bare OSQP {1e6 * t_bare:.0f} µs, stimsteer fast path {1e6 * t_fast:.0f} µs, "
          f"stimsteer cvxpy path {1e6 * t_cvx:.0f} µs")
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    print(f"ratio A (stimsteer fast path / bare OSQP): {t_fast / t_bare:.2f}   (target <= 2)")
    print(f"        (stimsteer cvxpy path / bare OSQP): {t_cvx / t_bare:.2f}   (reference only)")

    u = rng.uniform(-1, 1, size=(N_DATA, N_INPUTS))
    session = Session(u=u, y=plant.simulate(u, seed=2), sample_rate_hz=1.0, trials=[(0, 2500), (2500, 5000)])
    t0 = time.perf_counter()
    spc_pred = LsqPredictor(past_steps=PAST, horizon_steps=HORIZON, alphas=(1e-6,)).fit(session)
    deepc_pred = HankelPredictor(past_steps=PAST, horizon_steps=HORIZON, lambdas_g=(1e-3,)).fit(session)
    print(f"fitted SPC and DeePC predictors on {N_DATA} samples in {time.perf_counter() - t0:.1f} s (not timed "
          f"below); DeePC blocks: {deepc_pred.blocks_.Up.shape[1]} columns (compressed)")
    u0, y0 = np.zeros((PAST, N_INPUTS)), plant.simulate(np.zeros((PAST, N_INPUTS)), seed=3)
    for name, pred in (("SPC", spc_pred), ("DeePC", deepc_pred)):
        ctrl = DataPredictiveController(predictor=pred, limits=limits, input_weight=1e-2).fit()
        a, b = (ctrl.plan(u0, y0, target=target, use_fast_path=f) for f in (True, False))
        print(f"{name}: fast path vs cvxpy plan (setup check, not timed): max |Δu| = "
              f"{np.max(np.abs(a.inputs - b.inputs)):.1e} µA, statuses {a.status}/{b.status}")

        def step(uu, yy, c=ctrl):
            return c.plan(uu, yy, target=target).inputs[0]
        t = np.median(_loop(step, plant, model, target, args.steps))
        print(f"ratio B ({name} step {1e6 * t:.0f} µs / indirect step {1e6 * t_fast:.0f} µs): {t / t_fast:.2f}   "
              "(target <= 3)")
        _direct_fast_step(name, ctrl, plant, model, target, args.steps)
    step = _fast_section(args, model, plant, limits, target, ind)
    _live_section(args, model, plant, limits, target, step, ind)
    _gate_section(args, model, limits, target)


def _direct_fast_step(name, ctrl, plant, model, target, steps):
    """The direct route's FastStep in the same loop (reference figure; its first input against the plan's)."""
    from stimsteer.control.mpc.fast_step import FastStep

    fs = FastStep(ctrl)
    t = np.median(_loop(lambda uu, yy: fs.plan(uu, yy, target=target).inputs[0], plant, model, target, steps))
    u0, y0 = np.zeros((PAST, N_INPUTS)), plant.simulate(np.zeros((PAST, N_INPUTS)), seed=4)
    d = np.max(np.abs(fs.plan(u0, y0, target=target).inputs[0] - ctrl.plan(u0, y0, target=target).inputs[0]))
    print(f"   {name} FastStep: median step {1e6 * t:.1f} µs; first input vs its plan() {d:.1e} µA")


# ------------------------------------------------------------------------------ fast step (issue 20, item 5)
# Section 3 -- the step of the fast path on the benchmark system with a target that makes amplitude bounds bind on a
# good share of steps: FastStep.plan (precomputed linear estimator and QP terms, warm dense active-set solve, the
# answer verified against the limits) against a floor written here (the same precomputed product and the warm
# daqp solve, nothing else), the bare OSQP solve of the same condensed QP, and the controller's full plan() (which now
# also solves with the dense path). Targets: FastStep <= 2 x the floor, <= 0.1 x bare OSQP, the same first input as
# the cvxpy path to 1e-6, horizon 80 <= 4 x horizon 20.
def _windows(model, plant, limits, target, ctrl, steps):
    """Past windows of a closed loop run with the controller's own plan (the inputs every timed step sees)."""
    plant.reset(seed=5)
    U = [np.zeros(N_INPUTS)] * PAST
    Y = [plant.step(u) for u in U]
    out, binding = [], 0
    for _ in range(steps):
        u, y = np.asarray(U[-PAST:]), np.asarray(Y[-PAST:])
        plan = ctrl.plan(u, y, target=target)
        out.append((u, y, U[-1]))
        binding += int(np.any(plan.active_limits["amplitude_max"][0] | plan.active_limits["amplitude_min"][0]))
        U.append(plan.inputs[0])
        Y.append(plant.step(plan.inputs[0]))
    return out, binding / steps


def _floor(step):
    """The least a step can do: the precomputed product for q and the warm daqp solve (daqp.Model, no checks)."""
    import daqp

    qp, model = step._qp, daqp.Model()
    model.setup(qp._H, np.zeros(qp.n_vars), np.zeros((0, qp.n_vars)), step._row_hi, step._row_lo)

    def run(u, y, target):
        w = np.concatenate([u.reshape(-1), y.reshape(-1)])
        model.update(f=step._Qw @ w + step._target_term(target))
        return model.solve()[0][:N_INPUTS]
    return run


def _timed(fn, windows, repeats=3):
    best = None
    for _ in range(repeats):
        t = np.empty(len(windows))
        for i, (u, y, last) in enumerate(windows):
            t0 = time.perf_counter()
            fn(u, y, last)
            t[i] = time.perf_counter() - t0
        best = t if best is None or np.median(t) < np.median(best) else best
    return best


def _fast_section(args, model, plant, limits, target, ind):
    from stimsteer.control.mpc.fast_step import FastStep

    gain = model.C @ np.linalg.solve(np.eye(N_STATES) - model.A, model.B)  # steady-state gain
    far = gain @ np.array([3.0, -3.0, 3.0, -3.0])  # needs inputs of ±3 µA, beyond the ±1 µA box: bounds bind
    windows, share = _windows(model, plant, limits, far, ind, args.steps)
    step = FastStep(ind)
    floor = _floor(step)
    bare = _bare_osqp(ind)
    Phi, Lz = ind._Phi_y, ind._Lz

    def bare_step(u, y, last):
        return bare(Lz @ (Phi @ model.estimate_state(u, y) - np.tile(far, HORIZON)))[:N_INPUTS]
    t_floor = _timed(lambda u, y, last: floor(u, y, far), windows)
    t_step = _timed(lambda u, y, last: step.plan(u, y, target=far, last_input=last), windows)
    t_bare = _timed(bare_step, windows, repeats=1)
    t_plan = _timed(lambda u, y, last: ind.plan(u, y, target=far, last_input=last), windows, repeats=1)
    # the reference is the cvxpy problem with CLARABEL's tolerances tightened to 1e-12 (its defaults leave ~1e-6)
    tight = ModelPredictiveController(model=model, limits=limits, horizon_steps=HORIZON, input_weight=1e-2,
                                      solver_options={"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12,
                                                      "tol_feas": 1e-12}).fit()
    diff = max(float(np.max(np.abs(step.plan(u, y, target=far, last_input=last).inputs[0]
                                   - tight.plan(u, y, target=far, last_input=last, use_fast_path=False).inputs[0])))
               for u, y, last in windows[::10])
    diff_osqp = max(float(np.max(np.abs(step.plan(u, y, target=far, last_input=last).inputs[0]
                                        - bare_step(u, y, last)))) for u, y, last in windows[::10])
    ind80 = ModelPredictiveController(model=model, limits=limits, horizon_steps=80, input_weight=1e-2).fit()
    step80 = FastStep(ind80)
    t_80 = _timed(lambda u, y, last: step80.plan(u, y, target=far, last_input=last), windows)
    med = lambda t: 1e6 * float(np.median(t))  # noqa: E731
    p99 = lambda t: 1e6 * float(np.percentile(t, 99))  # noqa: E731
    print(f"\nfast step, target beyond reach (an amplitude bound binds at the first step of {100 * share:.0f} % of "
          f"the steps); medians (p99): floor {med(t_floor):.1f} ({p99(t_floor):.1f}) µs, FastStep {med(t_step):.1f} "
          f"({p99(t_step):.1f}) µs, plan() with the dense path {med(t_plan):.0f} ({p99(t_plan):.0f}) µs, bare OSQP "
          f"{med(t_bare):.0f} ({p99(t_bare):.0f}) µs; FastStep horizon 80: {med(t_80):.1f} ({p99(t_80):.1f}) µs")
    print(f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores (the ratios below were measured at it)")
    print(f"ratio (FastStep / floor): {np.median(t_step) / np.median(t_floor):.2f}   (target <= 2)")
    print(f"ratio (FastStep / bare OSQP): {np.median(t_step) / np.median(t_bare):.3f}   (target <= 0.1)")
    print(f"ratio (FastStep horizon 80 / horizon 20): {np.median(t_80) / np.median(t_step):.2f}   (target <= 4)")
    print(f"largest |Δu| of the first input, FastStep vs the cvxpy path (CLARABEL), {len(windows[::10])} windows: "
          f"{diff:.1e} µA, vs bare OSQP (tolerances 1e-7, polished): {diff_osqp:.1e} µA   (target <= 1e-6)")
    return step


# ------------------------------------------------------------------------------ live loops at 1 and 10 kHz (issue 20)
# Section 4 -- the live runner (stimsteer.control.realtime.run_live) on the same system for --live-seconds in
# wall-clock time: p50/p99 step latency (tick to decision, plan + gate; at 10 kHz with the simulated plant's step
# inside the period and, back to back, off the loop's clock), jitter, overruns, missed ticks, unchecked
# inputs (target: p99 < 100 µs at 10 kHz and zero unchecked inputs, on an idle 2-core machine), with FastStep, and
# with the controller's full plan() at 1 kHz (or the refusal the runner gives, with its figures).
def _live_report(name, run, usage=None):
    s = run.summary
    lat, jit, c = s["latency_s"], s["jitter_s"], s["counts"]
    us = lambda v: float("nan") if v is None else 1e6 * v  # noqa: E731
    srv = s.get("service_s", {"p50": None, "p99": None})
    print(f"{name} [latency: {s['latency_definition']}; load {os.getloadavg()[0]:.1f}]: {s['n_steps_run']} steps at {s['sample_rate_hz']:g} Hz, latency p50 {us(lat['p50']):.1f} µs, "
          f"p99 {us(lat['p99']):.1f} µs, max {us(lat['max']):.0f} µs (of which the step's own work, from its start: "
          f"p50 {us(srv['p50']):.1f} µs, p99 {us(srv['p99']):.1f} µs); jitter p50 {us(jit['p50']):.1f} µs, p99 "
          f"{us(jit['p99']):.1f} µs; overruns {c['overrun']}, missed ticks {c['missed']}, planned {c['planned']}; "
          f"unchecked inputs {s['unchecked_inputs']}, delivered over a hard limit "
          f"{sum(s['delivered_violations'].values())}; the plant's step p50 {us(s['plant_step_s']['p50']):.1f} µs, "
          f"p99 {us(s['plant_step_s']['p99']):.1f} µs")
    rt = s.get("realtime") or {}
    if rt.get("requested"):
        print("  real time asked for: " + ", ".join(f"{k} {v}" for k, v in rt.items() if k != "requested"))
    wake = s.get("wake_s") or {}
    if wake.get("p50") is not None:
        print(f"  start of a step: woke after its tick p50 {us(wake['p50']):.1f} µs, p99 {us(wake['p99']):.1f} µs, max "
              f"{us(wake['max']):.0f} µs (steps that waited); started behind (tick passed while the last step ran) "
              f"{s['started_behind']}")
    if usage is not None:
        print(f"  during the run: involuntary context switches {usage[0]}, voluntary {usage[1]}, page faults minor "
              f"{usage[2]} major {usage[3]}; GC collections {usage[4]}")


@contextlib.contextmanager
def _usage():
    """Preemptions (involuntary context switches), sleeps, page faults and garbage collections during the block: a
    list filled when it ends."""
    import gc
    import resource

    out, counts = [], [0]

    def count(phase, info):
        if phase == "start":
            counts[0] += 1
    gc.callbacks.append(count)
    r0 = resource.getrusage(resource.RUSAGE_SELF)
    try:
        yield out
    finally:
        r1 = resource.getrusage(resource.RUSAGE_SELF)
        gc.callbacks.remove(count)
        out += [r1.ru_nivcsw - r0.ru_nivcsw, r1.ru_nvcsw - r0.ru_nvcsw, r1.ru_minflt - r0.ru_minflt,
                r1.ru_majflt - r0.ru_majflt, counts[0]]


def _steal(seconds=0.5):
    """The share of CPU time the hypervisor took from this machine over ``seconds`` (/proc/stat), percent."""
    def read():
        with open("/proc/stat", encoding="ascii") as f:
            v = [int(x) for x in f.readline().split()[1:]]
        return sum(v), v[7] if len(v) > 7 else 0
    try:
        t0, s0 = read()
        time.sleep(seconds)
        t1, s1 = read()
    except OSError:
        return float("nan")
    return 100.0 * (s1 - s0) / max(t1 - t0, 1)


_DEFINITIONS = ((False, "old: the plant's step inside the period"), (True, "new: the simulated plant off the clock"))


def _ratio(run):
    lat = run.summary["latency_s"]["p99"]
    return "n/a (no planned step)" if lat is None else f"{1e6 * lat / 100.0:.2f}"


def _live_section(args, model, plant, limits, target, step, ind):
    from stimsteer.control.realtime import run_live
    from stimsteer.sysid import InvalidParameterError

    print(f"\nlive runner (stimsteer live), wall-clock pace, box limits, overrun policy hold; load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores at the start, CPU steal {_steal():.0f} %")
    print("latency = tick to the checked input. Two definitions, run back to back: the old one (wall clock: the "
          "simulated plant's step runs inside the period, so a slow simulation makes the next step start behind) "
          "and the new one (the loop's clock, the simulated plant's step taken off it: a real loop's sample arrives "
          "from hardware at its tick, and the loop times from that arrival to the input leaving the gate). Same "
          "gate, same overrun policy, same checks.")

    def fresh(rate):
        return LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, process_noise_std=0.01,
                                  sample_rate_hz=rate)
    seconds = args.live_seconds
    runs = [("plan()", ind, 1_000.0, True), ("FastStep", step, 1_000.0, True)]
    runs += [("FastStep", step, 10_000.0, sim) for _ in range(args.live_repeats) for sim, _ in _DEFINITIONS]
    for name, ctrl, rate, sim in runs:
        try:
            with _usage() as usage:
                run = run_live(ctrl, fresh(rate), n_steps=int(rate * seconds), target=target, pace="wall",
                               simulated_plant=sim, realtime=args.realtime and rate == 10_000.0)
        except InvalidParameterError as exc:
            print(f"{name} at {rate:g} Hz: refused -- {exc}")
            continue
        _live_report(f"{name} at {rate:g} Hz, {dict(_DEFINITIONS)[sim]}", run, usage)
        if rate == 10_000.0:
            print(f"ratio (p99 step latency at 10 kHz / the 100 µs budget), {dict(_DEFINITIONS)[sim]}: "
                  f"{_ratio(run)}   (target < 1; an idle 2-core machine)")
    _stages(step, fresh(10_000.0), target)


def _stages(step, plant, target, n=20_000):
    """Thread CPU time per stage of a 10 kHz step, unpaced (preemption by other processes is not counted): the plan,
    the gate, the plant's step (the simulated hardware), the runner's record of the sample; and the loop's own work
    (plan + gate) against the floor (the precomputed product and the warm daqp solve alone) on the same windows, in
    the same run. The loop hands the gate the fast step's first input as a list, as the live runner does."""
    from stimsteer.control.input_gate import InputGate

    gate, T, clk = InputGate(step.limits_), step.past_steps_, time.thread_time_ns
    floor = _floor(step)
    plant.reset(seed=1)
    U, Y = np.zeros((n + T, N_INPUTS)), np.zeros((n + T, N_OUTPUTS))
    for i in range(T):
        Y[i] = plant.step(U[i])
    t = np.empty((n, 5))
    for k in range(n):
        i = k + T
        t0 = clk()
        u = step.plan(U[i - T:i], Y[i - T:i], target=target, last_input=gate.last_input).first
        t1 = clk()
        sent, _ = gate.admit(u)
        t2 = clk()
        y = plant.step(sent)
        t3 = clk()
        U[i], Y[i] = sent, y
        t4 = clk()
        floor(U[i - T:i], Y[i - T:i], target)
        t[k] = (t1 - t0, t2 - t1, t3 - t2, t4 - t3, clk() - t4)
    q = np.percentile(t, [50, 99], axis=0) / 1e3
    own = np.percentile(t[:, 0] + t[:, 1], [50, 99]) / 1e3
    print(f"10 kHz step by stage, thread CPU over {n} unpaced steps, p50 (p99) µs: " + ", ".join(
        f"{name} {q[0, j]:.1f} ({q[1, j]:.1f})" for j, name in enumerate(("plan", "gate", "plant", "record"))))
    print(f"  the loop's own work (plan + gate) p50 {own[0]:.1f} (p99 {own[1]:.1f}) µs; the floor (product + warm "
          f"daqp) on the same windows p50 {q[0, 4]:.1f} (p99 {q[1, 4]:.1f}) µs; ratio of the p50s {own[0] / q[0, 4]:.2f}; "
          f"load average {os.getloadavg()[0]:.1f}")


# ------------------------------------------------------------- the gate under sequence limits (issue 20 with issue 16)
# Section 5 -- InputGate.admit per step with the box limits alone and with limits on the delivered sequence at 10 kHz:
# a rolling charge window of 0.2 s (2,000 samples), an energy window of 0.05 s, a train length of 0.05 s and a duty
# cycle of 60 % over 0.1 s, each about half of what stimulation at the bounds would use, so they bind. Requests: a
# controller that always asks for the bounds (every step reduced once the windows fill) and uniform random ones. Then
# the live runner at 10 kHz with FastStep, box limits and sequence limits back to back (p99 must stay < 100 µs).
def _sequence_limits(rate):
    from stimsteer.control.sequence_limits import TrainLimits, WindowBudget

    m, q = N_INPUTS, 1e-4  # µC per µA-sample: a 100 µs phase
    steps = lambda s: int(round(s * rate))  # noqa: E731
    charge = WindowBudget("charge_rate_window", 0.5 * m * q * steps(0.2), steps(0.2), np.full(m, q), np.zeros(m), "uC")
    energy = WindowBudget("energy_window", 0.5 * m * 1e-3 * steps(0.05), steps(0.05), np.zeros(m), np.full(m, 1e-3),
                          "uJ")
    train = TrainLimits((steps(0.05),) * m, (steps(0.06),) * m, (steps(0.1),) * m)
    return StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=m, window_budgets=(charge, energy),
                      train_limits=train)


def _time_gate(gate, requests):
    times = np.empty(len(requests))
    clock = time.perf_counter
    for k, r in enumerate(requests):
        t0 = clock()
        gate.admit(r)
        times[k] = clock() - t0
    return times


def _gate_section(args, model, limits, target):
    from stimsteer.control.input_gate import InputGate
    from stimsteer.control.mpc.fast_step import FastStep
    from stimsteer.control.realtime import run_live
    from stimsteer.sysid import InvalidParameterError

    rate = 10_000.0
    seq = _sequence_limits(rate)
    rng = np.random.default_rng(args.seed)
    n = 20_000
    print(f"\ninput gate per step, 4 inputs; sequence limits at {rate:g} Hz: charge window 2000 samples, energy window "
          f"500, train 500, duty 600 of 1000; load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    for name, req in (("always the bounds", np.tile([1.0, -1.0, 1.0, -1.0], (n, 1))),
                      ("uniform random", rng.uniform(-1.0, 1.0, size=(n, N_INPUTS)))):
        box, gate = _time_gate(InputGate(limits), req), InputGate(seq)
        t_seq = _time_gate(gate, req)
        us = lambda t, q: 1e6 * float(np.percentile(t, q))  # noqa: E731
        print(f"requests {name}: box only p50 {us(box, 50):.1f} µs p99 {us(box, 99):.1f} µs; with sequence limits "
              f"p50 {us(t_seq, 50):.1f} µs p99 {us(t_seq, 99):.1f} µs ({gate.n_reduced} of {n} reduced); added p50 "
              f"{us(t_seq, 50) - us(box, 50):.1f} µs, p99 {us(t_seq, 99) - us(box, 99):.1f} µs")
    far = model.C @ np.linalg.solve(np.eye(N_STATES) - model.A, model.B) @ np.array([3.0, -3.0, 3.0, -3.0])
    print(f"live runner with FastStep at {rate:g} Hz for {args.live_seconds:g} s, target beyond reach; load average "
          f"{os.getloadavg()[0]:.1f} at the start, CPU steal {_steal():.0f} %")
    cases = [(name, lim, sim) for _ in range(args.live_repeats) for name, lim in (("box limits", limits),
             ("sequence limits", seq)) for sim, _ in _DEFINITIONS]
    for name, lim, sim in cases:
        ctrl = FastStep(ModelPredictiveController(model=model, limits=lim, horizon_steps=HORIZON,
                                                  input_weight=1e-2).fit())
        plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, process_noise_std=0.01,
                                   sample_rate_hz=rate)
        try:
            with _usage() as usage:
                run = run_live(ctrl, plant, n_steps=int(rate * args.live_seconds), target=far, pace="wall",
                               simulated_plant=sim, realtime=args.realtime)
        except InvalidParameterError as exc:
            print(f"FastStep, {name}: refused -- {exc}")
            continue
        _live_report(f"FastStep, {name}, {dict(_DEFINITIONS)[sim]}", run, usage)
        g = run.summary["gate"]
        print(f"  gate: {g['admitted']} as given, {g['reduced']} reduced to the largest safe input, "
              f"{g['replaced'] - g['reduced']} fallbacks; maps of active sets kept {_maps(ctrl)}; ratio (p99 "
              f"latency / 100 µs): {_ratio(run)}   (target < 1; idle 2-core machine)")


def _maps(step):
    r = getattr(step, "_regions", None)
    return "n/a" if r is None else len([v for v in r.maps.values() if v is not None])


if __name__ == "__main__":
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        main()
