"""Benchmark: exact row-space compression of the direct route's Hankel data against the full Hankel matrix.

Scenario (invented): a simulated stimulated network, 4 stimulation sites, 16 recorded channels, 8 states, white
measurement noise; trials of equal length. Past window 6, horizon 20 (L = 26, 520 rows of data).

Measured in one run (baseline = the full, uncompressed Hankel matrix):
1. building the compressed predictor (``HankelPredictor(compress=True)``) vs building the full Hankel matrix:
   wall time and peak traced memory (tracemalloc), at two data lengths, to show the compressed size does not grow;
2. one regularised prediction by a fresh solve of its KKT system (``solve_g``; ``predict`` itself keeps the linear
   prediction map after its first call), compressed vs full, on a subset short enough for the full problem.

Run:  .venv/bin/python benchmarks/bench_hankel.py            (about a minute on 2 cores)
      .venv/bin/python benchmarks/bench_hankel.py --samples 20000 --trials 10 --subset 2000   (quick)
"""

from __future__ import annotations

import argparse
import time
import tracemalloc
import warnings

import numpy as np

from stimsteer.sysid import ExcitationWarning, Session, StateSpaceModel
from stimsteer.sysid.datadriven import HankelPredictor
from stimsteer.sysid.hankel import session_hankel

M_INPUTS, P_OUTPUTS, N_STATES = 4, 16, 8
PAST, HORIZON = 6, 20


# ------------------------------------------------------------------------------------------------ setup
def make_session(n_samples: int, n_trials: int, seed: int = 0) -> Session:
    """Equal-length trials of white-noise stimulation through a random stable network, noisy recordings."""
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((N_STATES, N_STATES))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    sys = StateSpaceModel(A=A, B=rng.standard_normal((N_STATES, M_INPUTS)),
                          C=rng.standard_normal((P_OUTPUTS, N_STATES)))
    u = rng.standard_normal((n_samples, M_INPUTS))
    y = sys.simulate(u) + 0.1 * rng.standard_normal((n_samples, P_OUTPUTS))
    edges = np.linspace(0, n_samples, n_trials + 1).astype(int)
    return Session(u=u, y=y, sample_rate_hz=1000.0, trials=np.column_stack([edges[:-1], edges[1:]]))


def _measure(fn, repeats: int):
    """(result, seconds, peak traced MiB): best time of ``repeats`` untraced calls, then the peak memory of one
    traced call (tracing slows allocation-heavy code, so it would distort the time)."""
    runs = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        runs.append(time.perf_counter() - t0)
    dt = min(runs)
    tracemalloc.start()
    out = fn()
    peak = tracemalloc.get_traced_memory()[1] / 2**20
    tracemalloc.stop()
    return out, dt, peak


def _predictor(compress: bool, regularizer: str) -> HankelPredictor:
    return HankelPredictor(past_steps=PAST, horizon_steps=HORIZON, regularizer=regularizer, lambdas_g=[1e-3],
                           lambda_y=1e3, compress=compress, n_states=N_STATES)


def _held_bytes(pred: HankelPredictor) -> int:
    b = pred.blocks_
    return sum(a.nbytes for a in (b.Up, b.Yp, b.Uf, b.Yf)) + (0 if pred.reg_matrix_ is None else
                                                              pred.reg_matrix_.nbytes)


# ------------------------------------------------------------------------------------------------ timed parts
def bench_build(session: Session, repeats: int) -> dict:
    full, t_full, m_full = _measure(lambda: np.vstack([session_hankel(session, PAST + HORIZON, which="u"),
                                                       session_hankel(session, PAST + HORIZON, which="y")]),
                                  repeats)
    full_bytes = full.nbytes
    del full
    pred, t_comp, m_comp = _measure(lambda: _predictor(True, "projection").fit(session), repeats)
    return {"samples": session.n_samples, "columns": pred.n_columns_, "full_s": t_full, "full_peak_mib": m_full,
            "full_mib": full_bytes / 2**20, "comp_s": t_comp, "comp_peak_mib": m_comp,
            "comp_mib": _held_bytes(pred) / 2**20}


def bench_predict(session: Session, regularizer: str, repeats: int) -> dict:
    comp = _predictor(True, regularizer).fit(session)
    full = _predictor(False, regularizer).fit(session)
    rng = np.random.default_rng(1)
    a, b = session.trials[0]
    up, yp = session.u[a:a + PAST], session.y[a:a + PAST]
    uf = rng.standard_normal((HORIZON, M_INPUTS))
    times = {}
    for name, pred in (("comp", comp), ("full", full)):
        runs = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            out = pred.blocks_.Yf @ pred.solve_g(up, yp, uf)  # one prediction by a fresh KKT solve
            runs.append(time.perf_counter() - t0)
        times[name] = (min(runs), out)
    diff = np.linalg.norm(times["comp"][1] - times["full"][1]) / np.linalg.norm(times["full"][1])
    return {"regularizer": regularizer, "columns": full.n_columns_, "comp_s": times["comp"][0],
            "full_s": times["full"][0], "rel_diff": diff}


# ------------------------------------------------------------------------------------------------ report
def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=100_000)
    ap.add_argument("--trials", type=int, default=50)
    ap.add_argument("--subset", type=int, default=5_000, help="samples of the subset for the prediction timing")
    ap.add_argument("--repeats", type=int, default=3, help="timed repetitions (the best is shown)")
    args = ap.parse_args(argv)
    warnings.simplefilter("error", ExcitationWarning)  # the benchmark data must be exciting enough

    print(f"bench_hankel: {M_INPUTS} inputs, {P_OUTPUTS} outputs, past {PAST}, horizon {HORIZON} "
          f"({(M_INPUTS + P_OUTPUTS) * (PAST + HORIZON)} data rows)")
    print(f"\n1. build: compressed predictor (fit, projection, one strength) vs full Hankel matrix, best of "
          f"{args.repeats}")
    print(f"{'samples':>9} {'columns':>8} | {'full s':>7} {'full MiB':>9} {'peak MiB':>9} | {'comp s':>7} "
          f"{'held MiB':>9} {'peak MiB':>9} | {'memory ratio':>12}")
    for n in (args.samples // 2, args.samples):
        r = bench_build(make_session(n, args.trials), args.repeats)
        print(f"{r['samples']:>9} {r['columns']:>8} | {r['full_s']:>7.2f} {r['full_mib']:>9.1f} "
              f"{r['full_peak_mib']:>9.1f} | {r['comp_s']:>7.2f} {r['comp_mib']:>9.2f} {r['comp_peak_mib']:>9.1f} "
              f"| {r['full_mib'] / r['comp_mib']:>11.0f}x")

    n_sub_trials = max(1, round(args.trials * args.subset / args.samples))
    sub = make_session(args.subset, n_sub_trials, seed=2)
    print(f"\n2. one regularised prediction on a {args.subset}-sample subset ({n_sub_trials} trials), best of "
          f"{args.repeats}")
    print(f"{'regularizer':>11} {'columns':>8} | {'full s':>8} {'comp s':>8} | {'speed-up':>8} {'rel. diff':>10}")
    for reg in ("projection", "l2"):
        r = bench_predict(sub, reg, args.repeats)
        print(f"{r['regularizer']:>11} {r['columns']:>8} | {r['full_s']:>8.3f} {r['comp_s']:>8.4f} | "
              f"{r['full_s'] / r['comp_s']:>7.0f}x {r['rel_diff']:>10.1e}")
    print("\ntargets: held MiB equal at both lengths; speed-up >= 50x.")


if __name__ == "__main__":
    main()
