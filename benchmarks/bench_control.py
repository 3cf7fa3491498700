"""Speed of the predictive controllers in a closed loop (issue: predictive control under safety limits).

Setup (not timed): a stable 12-state network with 4 stimulation inputs and 16 recorded outputs, horizon 20,
box amplitude limits only (a QP). Timed, in the same run:

1. ratio A — closed-loop step of stimsteer's indirect controller (``ModelPredictiveController.plan`` on its
   reusable OSQP problem: state estimate, bound guards, solve, verification, plan packaging) ÷ the bare OSQP solve
   of the same condensed QP (set up once, only ``q``, ``l``, ``u`` updated per step); for reference also the
   controller's plain cvxpy path (compiled once, re-solved with CLARABEL) ÷ bare OSQP. Target: ratio A <= 2.
2. ratio B — the direct controller's step ÷ the indirect one's, on the same horizon, with predictors fitted on
   5,000 samples: SPC (``LsqPredictor``) and DeePC (``HankelPredictor``, compressed blocks). Target: <= 3.

Run from the repository root:  .venv/bin/python benchmarks/bench_control.py [--steps 200]
"""

from __future__ import annotations

import argparse
import contextlib
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
    args = ap.parse_args(argv)
    model, rng = _system(args.seed)
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, process_noise_std=0.01)
    limits = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=N_INPUTS)
    target = rng.normal(size=N_OUTPUTS)
    ind = ModelPredictiveController(model=model, limits=limits, horizon_steps=HORIZON, input_weight=1e-2).fit()
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
    _live_section(args, model, plant, limits, target, ind)


# ------------------------------------------------------------------------------ live loop at 10 kHz (issue 20)
# Section 3 -- the live runner (stimsteer.control.realtime.run_live) at 10 kHz on the same system for 10 s, in
# wall-clock time: p50/p99 step latency (tick to decision, plan + gate), jitter, overruns, missed ticks, unchecked
# inputs (target: p99 < 100 µs and zero unchecked inputs). With the indirect controller's plan() the runner refuses
# 10 kHz (its best step is longer than 100 µs: the dense solver and precomputed estimator of the item 5
# are not built yet), so the section prints the refusal with its figures, runs that controller at the fastest rate
# whose period is twice its median step, and then runs the runner at 10 kHz with a saturated explicit law (the
# unconstrained optimum of the same condensed problem, a precomputed linear map of the past window, clipped to the
# box) -- a stand-in with the mpc controllers' public interface, to show what the runner itself costs.
class _ExplicitLaw:
    """The first input of the unconstrained condensed optimum, as a linear map of the past window, clipped."""

    def __init__(self, ctrl, model, target):
        self._c = ctrl
        T, m, p = PAST, N_INPUTS, N_OUTPUTS
        E = np.empty((N_STATES, T * (m + p)))  # estimate_state is linear in the window: read its matrix column-wise
        for j in range(E.shape[1]):
            w = np.zeros(T * (m + p))
            w[j] = 1.0
            E[:, j] = model.estimate_state(w[:T * m].reshape(T, m), w[T * m:].reshape(T, p))
        H = ctrl._LG.T @ ctrl._LG + ctrl._Ru.T @ ctrl._Ru
        S = -np.linalg.solve(H, ctrl._LG.T)[:m] @ ctrl._Lz
        self._K = S @ ctrl._Phi_y @ E
        self._k = -S @ np.tile(target, HORIZON)
        self._lo, self._hi = ctrl.limits_.input_bounds()
        rng = np.random.default_rng(0)
        u, y = rng.normal(size=(T, m)), rng.normal(size=(T, p))
        self.map_error = float(np.max(np.abs(E @ np.concatenate([u.ravel(), y.ravel()]) - model.estimate_state(u, y))))

    def __getattr__(self, name):
        return getattr(self._c, name)

    def reset(self):
        return self._c.reset()

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None):
        w = np.concatenate([u_past[-PAST:].ravel(), y_past[-PAST:].ravel()])
        return _FirstInput(np.clip(self._K @ w + self._k, self._lo, self._hi)[None, :])


class _FirstInput:
    __slots__ = ("inputs",)
    fallback = False

    def __init__(self, inputs):
        self.inputs = inputs


def _live_report(name, run):
    s = run.summary
    lat, jit, c = s["latency_s"], s["jitter_s"], s["counts"]
    us = lambda v: float("nan") if v is None else 1e6 * v  # noqa: E731
    print(f"{name}: {s['n_steps_run']} steps at {s['sample_rate_hz']:g} Hz, latency p50 {us(lat['p50']):.1f} µs, "
          f"p99 {us(lat['p99']):.1f} µs, max {us(lat['max']):.0f} µs; jitter p50 {us(jit['p50']):.1f} µs, p99 "
          f"{us(jit['p99']):.1f} µs; overruns {c['overrun']}, missed ticks {c['missed']}, planned {c['planned']}; "
          f"unchecked inputs {s['unchecked_inputs']}, delivered over a hard limit "
          f"{sum(s['delivered_violations'].values())}")


def _live_section(args, model, plant, limits, target, ind):
    from stimsteer.control.realtime import run_live
    from stimsteer.sysid import InvalidParameterError

    import os

    print(f"\nlive runner (stimsteer live), wall-clock pace, box limits, overrun policy hold; load average "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores at the start")

    def fresh(rate):
        return LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, process_noise_std=0.01,
                                  sample_rate_hz=rate)
    seconds = args.live_seconds
    try:
        run_live(ind, fresh(10_000.0), n_steps=int(10_000 * seconds), target=target, pace="wall")
    except InvalidParameterError as exc:
        print(f"10 kHz with the indirect controller's plan(): refused -- {exc}")
        median = float(str(exc).split("(median ")[1].split(" µs")[0]) * 1e-6
        rate = float(np.floor(1.0 / (2.0 * median)))
        run = run_live(ind, fresh(rate), n_steps=int(rate * seconds), target=target, pace="wall")
        _live_report(f"indirect controller at {rate:g} Hz (period = 2 x its median step)", run)
    law = _ExplicitLaw(ind, model, target)
    print(f"explicit law: the linear map of the past window matches estimate_state to {law.map_error:.1e}")
    n = int(10_000 * seconds)
    t0 = time.perf_counter()
    run_live(law, fresh(10_000.0), n_steps=n, target=target, pace="none")
    print(f"whole step of the runner, unpaced (decision + gate + simulated plant + record): "
          f"{1e6 * (time.perf_counter() - t0) / n:.1f} µs on average over {n} steps")
    run = run_live(law, fresh(10_000.0), n_steps=int(10_000 * seconds), target=target, pace="wall")
    _live_report("runner at 10 kHz with the explicit law", run)
    lat = run.summary["latency_s"]["p99"]
    print(f"ratio (runner p99 step latency at 10 kHz / the 100 µs budget): {1e6 * lat / 100.0:.2f}   "
          "(target < 1; an idle 2-core machine)")


if __name__ == "__main__":
    main()
