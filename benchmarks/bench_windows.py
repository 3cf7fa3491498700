"""Fits at realistic windows: the four methods on a 1 kHz session, against one lagged Gram of the raw data.

Setup (not timed): the demo's simulated network (``demo_data/make_demo.py``, seeded) recorded at 1 kHz with 3
stimulation sites, 20 contacts and 25 trials of 2.5 s (63,000 samples with the rests), written once to a
temporary HDF5 file.

Measured in the same run, each case in a fresh child process (so peak memory is that case's alone):

1. the fit time and the peak resident memory (``VmHWM`` of ``/proc/self/status``, and its rise over the resident
   size just before the fit) of ridge ARX (``output_lags = input_lags = past``), subspace identification
   (``past_steps = past``, ``future_steps = horizon``), the least-squares (SPC) predictor and the regularised
   Hankel predictor, each with its default settings and grids, at past 10 / horizon 20 and past 100 / horizon 50;
2. the reference: one lagged Gram of the raw data with the same lag count (``past + horizon`` lags; ``past`` for
   ARX), as bare lag products in numpy written here (``Z[δ:]ᵀ Z[:T-δ]`` for every lag ``δ``, one BLAS thread): the
   products an exact Gram of the lagged data computes by direct products; beside it the same sums by the fits'
   own route (short FFTs for long lagged vectors, ``sysid/_lag_spectra.py``), and one Cholesky factor of that
   ``n × n`` Gram (one and two BLAS threads): what a ridge fit that factors its Gram even once cannot go below (a
   cross-validated fit factors one Gram-sized matrix per fold and strength, or eigendecomposes one per fold);
3. the ratio fit ÷ reference (target: each fit <= 3x, <= 10 s and <= 500 MB at past 100 / horizon 50); beside it
   the fit's CPU time (every thread, system time included) ÷ the reference, and that ÷ the machine's cores: the
   ratio the fit would have with every core busy all the time, so the lowest its schedule can reach without doing
   less work (the reference runs on one thread, so its wall time is its CPU time); and for the
   two cross-validated ridge fits (ridge ARX, the least-squares predictor) their floor on this machine: the lag
   sums by the fits' own route plus, per fold, one reduction of the largest regressor block that gives every
   strength at once (the cheaper of ridge ARX's band reduction and the tridiagonal reduction of an
   eigendecomposition, one thread, CPU seconds), both cores used without loss. Any exact cross-validation that
   solves every fold for a grid of strengths does at least this; one eigendecomposition per fold (the issue's
   method, printed beside it for the least-squares predictor) does more. For the regularised Hankel predictor,
   whose strengths predict alike (no grid to reduce for), its floor: the lag sums plus, per fold, one Cholesky
   factor of its regressor block, two triangular solves and one triangular product with its right-hand sides, plus
   once the total Gram's factor;
4. cost growth (``--growth``): the fit time of each ``--growth-methods`` method at past 25 / 50 / 100 / 200 with
   horizon 50, on a smaller session (``--growth-contacts`` recorded channels, 3 sites, same trials), and the slope
   of log time against log past window between neighbouring windows and over all of them (least squares), beside
   the same slope of the Gram reference. A slope near 2 is set by the Gram's (rows)² size; one near 3 by the
   factorisations of Gram-sized matrices (Cholesky, eigendecomposition), which no exact fit of every coefficient
   avoids.
5. the least-squares predictor's kernels (``--spc-kernels``): on one cross-validation fold's training Gram of the
   session at ``--spc-window`` (default 100:50, ``n_b`` = 2,450 regressors, ``pN`` = 1,000 predicted values), one
   BLAS thread, CPU seconds: the eigendecomposition with LAPACK's divide-and-conquer driver (``syevd``, what the
   fit uses, and NumPy's ``eigh``), the MRRR driver (``syevr``), the eigenvalues alone (the tridiagonal reduction),
   one dense product of the same size (``gemm``, ``2 n³`` flops) and one strength of the per-strength alternative
   (Cholesky factor of ``G11 + s I``, two triangular solves and one triangular product with ``pN`` right-hand
   sides: what scoring one strength of a fold needs without eigenvectors), projected to the fit's 3 folds × 9
   strengths;
6. the least-squares predictor's grids by both routes (``--spc-grids``, at ``--spc-window``): every fold's held-out
   errors on the fit's own folds, fold by fold (one Cholesky factor per strength, two strengths side by side) and
   with the folds side by side (two by their eigendecomposition, one per core; the third by strength), each in
   fresh processes, alternating, twice: wall, CPU, peak memory and the errors' agreement.

Every row carries the 1-minute load average when it was printed (timings on a busy machine are slower and noisier),
and each fit its CPU time (all threads): on a busy machine the wall time mostly measures the others' load, while the
CPU time still tracks the work done (it grows less, through cache and memory contention).

A case that exceeds ``--timeout`` seconds is killed and printed as such (on a loaded machine, say so).

Usage::

    python benchmarks/bench_windows.py                       # both windows, every method
    python benchmarks/bench_windows.py --windows 10:20 --methods lsq hankel --timeout 300
    python benchmarks/bench_windows.py --windows --growth      # the cost growth only
    python benchmarks/bench_windows.py --windows --spc-kernels # the least-squares predictor's kernels only
    python benchmarks/bench_windows.py --windows --spc-grids --spc-window 50:25  # its grids by both routes
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

METHODS = {"arx": ("indirect", "arx", "ridge ARX"), "subspace": ("indirect", "subspace", "subspace"),
           "lsq": ("direct", "lsq", "least-squares (SPC) predictor"),
           "hankel": ("direct", "hankel", "regularised Hankel predictor")}


# ------------------------------------------------------------------------------------------------ setup
def make_session(seed: int, n_contacts: int = 20, n_sites: int = 3):
    """The demo network at 1 kHz: 3 sites, 20 contacts, 25 trials of 2.5 s (seeded)."""
    return make_session_and_plant(seed, n_contacts, n_sites)[0]


def make_session_and_plant(seed: int, n_contacts: int = 20, n_sites: int = 3):
    """:func:`make_session` and the simulated network that recorded it (a plant for ``stimsteer live --plant``)."""
    from stimsteer.demo_data.make_demo import Scenario, make_demo

    sc = Scenario(sample_rate_hz=1000.0, n_contacts=n_contacts, n_sites=n_sites, n_trials=25, trial_s=2.5,
                  rest_s=0.0)
    return make_demo(seed, scenario=sc)


def _status(key: str) -> float:
    """A ``/proc/self/status`` field in MB (0 where /proc is missing)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(key + ":"):
                return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return 0.0


# ------------------------------------------------------------------------------------------------ child cases
def child_fit(path: str, method: str, past: int, horizon: int) -> dict:
    """Load the session, fit one method, report seconds and memory (run in a fresh process)."""
    from stimsteer.sysid import load_session, make_estimator

    session = load_session(path)
    route, name, _label = METHODS[method]
    settings = {"future_steps": horizon} if method == "subspace" else {}
    est = make_estimator(route, name, settings, past_steps=past, horizon_steps=horizon)
    rss0 = _status("VmRSS")
    c0, t0 = time.process_time(), time.perf_counter()
    est.fit(session)
    seconds = time.perf_counter() - t0
    out = {"seconds": seconds, "cpu_s": time.process_time() - c0, "peak_mb": _status("VmHWM"),
           "rise_mb": _status("VmHWM") - rss0}
    if getattr(est, "factor_route_", None):  # the direct predictors: which factor route, and the Gram's condition
        out["route"] = f"{est.factor_route_} route, Gram condition {est.gram_condition_:.3g}"
    m, p = session.n_inputs, session.n_outputs  # the largest regressor a fold must solve for, and the folds
    if method == "arx":
        out["floor"] = {"n": (m + p) * past, "folds": int(est.n_folds_), "rhs": 0}
    elif method in ("lsq", "hankel"):
        out["floor"] = {"n": (m + p) * past + m * horizon,
                        "folds": sum(str(c).startswith("fold_") for c in est.cv_table_.columns), "rhs": p * horizon,
                        "kind": method}
    return out


def child_reduction(n: int, rhs: int, kind: str = "ridge") -> dict:
    """CPU seconds, one BLAS thread, of the cheapest reductions that give a ridge solve for every strength of one
    fold at once, on an ``n × n`` symmetric definite matrix (their flop counts do not depend on the values: random,
    seeded): the band reduction ridge ARX uses (``arx_band.BandForm``, ``~4/3 n³`` flops of ``syr2k``/``symm``) and
    the tridiagonal reduction of an eigendecomposition (eigenvalues only, LAPACK ``syevd``), best of two; with
    ``rhs > 0`` also one product of the matrix with ``rhs`` right-hand sides (``2 n² rhs`` flops, what bringing the
    fold's right-hand sides into the reduced basis costs at least: applying the reflectors costs about as much,
    Golub & Van Loan 2013, Matrix Computations, 4th ed., sec. 5.1). For ``kind="lsq"`` also the whole
    eigendecomposition with eigenvectors (``syevd``, the issue's "one symmetric eigendecomposition per fold"); for
    ``kind="hankel"`` instead the Hankel predictor's work per fold, which has no grid of strengths to reduce for
    (the projection regulariser's strengths predict alike on full-rank data): one Cholesky factor of ``n`` rows, two
    triangular solves and one triangular product with the ``rhs`` right-hand sides (``n³/3 + 3 n² rhs`` flops), and
    once the total Gram's Cholesky factor (``n + rhs`` rows)."""
    import numpy as np
    import scipy.linalg as sla
    from threadpoolctl import threadpool_limits

    from stimsteer.sysid.arx_band import BandForm

    M = np.random.default_rng(0).standard_normal((n, n))
    A = M @ M.T / n + np.eye(n)
    work = np.empty(n * n)
    cases = {"band": lambda: BandForm(A, work), "tridiagonal": lambda: sla.eigh(A, eigvals_only=True, driver="evd",
                                                                                check_finite=False)}
    if rhs > 0:
        R = np.random.default_rng(1).standard_normal((n, rhs))
        cases["rhs"] = lambda: A @ R
    if kind == "lsq":
        cases["eigh"] = lambda: sla.eigh(A, driver="evd", check_finite=False)
    if kind == "hankel":
        from scipy.linalg import blas, lapack

        M2 = np.random.default_rng(2).standard_normal((n + rhs, n + rhs))
        At = M2 @ M2.T / (n + rhs) + np.eye(n + rhs)
        Rf = np.asfortranarray(R)

        def fold():
            F, _info = lapack.dpotrf(A, lower=1, clean=0)
            Y = blas.dtrsm(1.0, F, Rf, lower=1)
            X = blas.dtrsm(1.0, F, Y, lower=1, trans_a=1, overwrite_b=1)
            return blas.dtrmm(1.0, F, X, lower=1, trans_a=1, overwrite_b=1)

        cases = {"fold": fold, "total": lambda: lapack.dpotrf(At, lower=1, clean=0)}
    out = {}
    with threadpool_limits(limits=1, user_api="blas"):
        for name, f in cases.items():
            best = float("inf")
            for _ in range(2):
                c0 = time.process_time()
                f()
                best = min(best, time.process_time() - c0)
            out[name] = best
    return out


def floor_line(label: str, r: dict, ref: dict, timeout: float) -> str:
    """What the fit cannot go below on this machine: the Gram reference, plus one reduction of its largest
    regressor block per fold (the cheaper of the band and the tridiagonal reduction) spread over both cores without
    loss; for many right-hand sides, one product with them per fold. A lower bound of any exact cross-validation
    over a grid of strengths that solves every fold: one eigendecomposition per fold needs the tridiagonal reduction
    and more, one Cholesky factor per strength costs ``n³/3`` flops per strength."""
    n, folds, kind = r["floor"]["n"], r["floor"]["folds"], r["floor"].get("kind", "ridge")
    red = run_child(["reduction", "-", n, r["floor"]["rhs"], kind], timeout)
    if ("band" not in red and "fold" not in red) or "seconds" not in ref:
        return f"# floor of {label}: not measured ({_fmt(red)})"
    sums = ref.get("own_s", ref["seconds"])  # the lag sums by the fits' own route
    if kind == "hankel":
        floor = sums + (folds * red["fold"] + red["total"]) / 2
        return (f"# floor of {label}: lag sums {sums:.2f} s ({ref.get('own_route', 'direct')} route) + ({folds} "
                f"folds x one Cholesky factor of {n} rows, two triangular solves and a triangular product with its "
                f"{r['floor']['rhs']} right-hand sides {red['fold']:.2f} s + the total's factor of "
                f"{n + r['floor']['rhs']} rows {red['total']:.2f} s of CPU, one thread) / 2 cores = {floor:.2f} s = "
                f"{floor / ref['seconds']:.1f}x Gram (no assembly, no closed-form predictor counted); the fit "
                f"{r['seconds']:.2f} s is {r['seconds'] / floor:.1f}x this floor")
    cheapest = min(red["band"], red["tridiagonal"]) + red.get("rhs", 0.0)
    floor = sums + folds * cheapest / 2
    rhs = f" + one product with its {r['floor']['rhs']} right-hand sides {red['rhs']:.2f} s" if "rhs" in red else ""
    return (f"# floor of {label}: lag sums {sums:.2f} s ({ref.get('own_route', 'direct')} route) + {folds} folds "
            f"x one reduction of {n} rows "
            f"(band {red['band']:.2f} s, tridiagonal {red['tridiagonal']:.2f} s of CPU, one thread){rhs} / 2 cores "
            f"= {floor:.2f} s = {floor / ref['seconds']:.1f}x Gram; the fit {r['seconds']:.2f} s is "
            f"{r['seconds'] / floor:.1f}x this floor" + _eigen_floor(sums, folds, red, ref))


def _eigen_floor(sums: float, folds: int, red: dict, ref: dict) -> str:
    """The floor by the issue's own method for a grid of strengths, one eigendecomposition per fold (``eigh``, with
    eigenvectors) plus the product with the right-hand sides, where measured."""
    if "eigh" not in red:
        return ""
    floor = sums + folds * (red["eigh"] + red.get("rhs", 0.0)) / 2
    return (f"; by one eigendecomposition per fold (syevd with eigenvectors {red['eigh']:.2f} s of CPU) "
            f"{floor:.2f} s = {floor / ref['seconds']:.1f}x Gram")


def child_gram(path: str, n_lags: int) -> dict:
    """Bare lag products of the raw data: ``Z[δ:]ᵀ Z[:T-δ]`` for δ = 0 … n_lags - 1, over the whole recording.

    One product of two ``(T × c)`` matrices per lag (the cost of any exact lagged Gram by direct products, without
    its per-trial edge terms), on one BLAS thread, best of two runs; beside it (``own_s``) the same sums by the fits'
    own route (``_lagged._chunk_products`` over 16,384-row chunks: short FFTs for long lagged vectors).
    """
    import numpy as np
    from threadpoolctl import threadpool_limits

    from stimsteer.sysid import load_session
    from stimsteer.sysid._lag_spectra import uses_spectra
    from stimsteer.sysid._lagged import _chunk_products

    session = load_session(path)
    Z = np.ascontiguousarray(np.hstack([session.u, session.y]))
    T, c = Z.shape
    X = np.zeros((n_lags, c, c))
    rss0 = _status("VmRSS")

    def products():
        t0 = time.perf_counter()
        for d in range(n_lags):
            np.matmul(Z[d:].T, Z[: T - d], out=X[d])
        return time.perf_counter() - t0

    def own():  # the fits' own route for the same sums (direct products or short FFTs, _lagged._chunk_products)
        t0 = time.perf_counter()
        for k0 in range(n_lags, T, 16384):
            _chunk_products(Z[k0 - n_lags + 1: min(T, k0 + 16384)], n_lags - 1)
        return time.perf_counter() - t0

    # One BLAS thread: on a busy machine multi-threaded OpenBLAS stalls on these small products (a 2-thread
    # reference was killed after 400 s at 150 lags under load 11); on an idle one it gains little at c = 23.
    with threadpool_limits(limits=1, user_api="blas"):
        best = min(products() for _ in range(2))
        own_best = min(own() for _ in range(2))
    return {"seconds": best, "own_s": own_best, "own_route": "FFT" if uses_spectra(n_lags - 1, c) else "direct",
            "peak_mb": _status("VmHWM"), "rise_mb": _status("VmHWM") - rss0, **_cholesky_seconds(X)}


def _cholesky_seconds(X) -> dict:
    """Seconds of one Cholesky factor of the ``n × n`` lagged Gram (``n = lags × channels``, its blocks ``X[i - j]``
    placed block-Toeplitz, plus ``tr/n`` on the diagonal so it is definite), best of two, on one and on two BLAS
    threads: what a ridge fit that factors its Gram once cannot go below, next to the Gram's products."""
    import numpy as np
    import scipy.linalg as sla
    from threadpoolctl import threadpool_limits

    n_lags, c, _c = X.shape
    G = np.empty((n_lags * c, n_lags * c))
    for i in range(n_lags):
        for j in range(n_lags):
            G[i * c:(i + 1) * c, j * c:(j + 1) * c] = X[i - j] if i >= j else X[j - i].T
    G[np.diag_indices_from(G)] += np.trace(G) / G.shape[0]
    out = {"n": int(G.shape[0])}
    for threads in (1, 2):
        with threadpool_limits(limits=threads, user_api="blas"):
            times = []
            for _ in range(2):
                K = np.array(G, order="F")
                t0 = time.perf_counter()
                sla.cholesky(K, lower=True, overwrite_a=True, check_finite=False)
                times.append(time.perf_counter() - t0)
        out[f"cholesky_{threads}t_s"] = min(times)
    return out


def child_spc_kernels(path: str, past: int, horizon: int) -> dict:
    """CPU seconds of the least-squares predictor's per-fold kernels on fold 0's training Gram (one BLAS thread)."""
    import numpy as np
    import scipy.linalg as sla
    from scipy.linalg import blas, lapack
    from threadpoolctl import threadpool_limits

    from stimsteer.sysid import load_session
    from stimsteer.sysid.datadriven.lsq import LsqPredictor

    est = LsqPredictor(past_steps=past, horizon_steps=horizon)
    folds, weights = est._gather(load_session(path), 9, keep_full=False)  # the fit's own data pass and folds
    n_b = (est.n_inputs_ + est.n_outputs_) * past + est.n_inputs_ * horizon
    Gt = folds.total.plus(folds[0], -1.0).gram_rows(0, n_b)
    G11, G12w = np.asfortranarray(Gt[:, :n_b]), np.asfortranarray(Gt[:, n_b:] * weights[None, :])
    kept = folds.total._factor_gram if folds.total._factor_gram is not None else folds.total._factor
    C = np.asfortranarray(np.tril(kept[:n_b, :n_b]))  # the total's Cholesky factor (condition check)
    s = 1e-2 * float(np.trace(G11)) / Gt.shape[1]
    del Gt, folds

    def strength():
        K = np.array(G11, order="F")
        K[np.diag_indices(n_b)] += s
        R, _info = lapack.dpotrf(K, lower=1, overwrite_a=1, clean=0)
        Y = blas.dtrsm(1.0, R, G12w, lower=1)  # R⁻¹ G12 Ω
        X = blas.dtrsm(1.0, R, Y, lower=1, trans_a=1, overwrite_b=1)  # (Ω Θ)ᵀ
        return blas.dtrmm(1.0, C, X, lower=1, trans_a=1, overwrite_b=1)  # Cᵀ (Ω Θ)ᵀ

    cases = {"eigh syevd (the fit's)": lambda: sla.eigh(G11, driver="evd", check_finite=False),
             "numpy eigh (syevd)": lambda: np.linalg.eigh(G11),
             "eigh syevr (MRRR)": lambda: sla.eigh(G11, driver="evr", check_finite=False),
             "eigenvalues only (tridiagonal reduction)": lambda: sla.eigh(G11, eigvals_only=True, driver="evd",
                                                                          check_finite=False),
             "gemm of the same size (2 n³ flops)": lambda: G11 @ G11,
             "one strength: Cholesky + 2 trsm + trmm, pN rhs": strength}
    out = {"n_b": n_b, "pN": int(weights.size)}
    with threadpool_limits(limits=1, user_api="blas"):
        for name, f in cases.items():
            c0 = time.process_time()
            f()
            out[name] = [time.process_time() - c0, _load()]
    return out


def child_spc_grid(path: str, past: int, horizon: int, route: str) -> dict:
    """The least-squares predictor's cross-validation grids (every fold, every strength) on the fit's own folds,
    by ``route``: ``"fold"`` (fold by fold, one Cholesky factor per strength, two strengths side by side) or
    ``"side"`` (the folds side by side: two by their eigendecomposition, one per core, the rest by strength).
    Wall and CPU seconds of the grids alone, the peak resident memory and its rise during them, and the errors."""
    from stimsteer.sysid import load_session
    from stimsteer.sysid._blas_threads import blas_threads
    from stimsteer.sysid.datadriven import gram
    from stimsteer.sysid.datadriven.lsq import LsqPredictor, _DEFAULT_ALPHAS

    gram.FOLDS_SIDE_BY_SIDE = route == "side"
    est = LsqPredictor(past_steps=past, horizon_steps=horizon)
    folds, weights = est._gather(load_session(path), len(_DEFAULT_ALPHAS), keep_full=False)
    n_b = (est.n_inputs_ + est.n_outputs_) * past + est.n_inputs_ * horizon
    total = folds.total
    rss0 = _status("VmRSS")
    with blas_threads(1):  # as in the fit (``_one_blas_thread``)
        c0, t0 = time.process_time(), time.perf_counter()
        errors = [gram.ridge_grid_errors(total.plus(f, -1.0), f, n_b, _DEFAULT_ALPHAS, weights, total).tolist()
                  for f in folds]
        seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    return {"seconds": seconds, "cpu_s": cpu, "peak_mb": _status("VmHWM"), "rise_mb": _status("VmHWM") - rss0,
            "errors": errors, "n_b": n_b, "load": _load()}


def spc_grid_table(path: str, window: str, timeout: float, repeat: int = 2) -> None:
    """Both routes of the least-squares predictor's grids, alternating in fresh processes, and their agreement."""
    import numpy as np

    past, horizon = (int(v) for v in window.split(":"))
    print(f"| SPC grids at {past} / {horizon}, 3 folds x 9 strengths | wall | CPU | peak (rise) | load |")
    print("| --- | --- | --- | --- | --- |")
    got = {}
    for _ in range(repeat):
        for route, label in (("fold", "fold by fold, by strength"), ("side", "folds side by side (eigen x 2)")):
            r = run_child(["spc-grid", path, past, horizon, route], timeout)
            if "errors" not in r:
                print(f"| {label} | {_fmt(r)} | | | |")
                continue
            got[route] = np.asarray(r["errors"])
            print(f"| {label} (n_b {r['n_b']}) | {r['seconds']:.2f} s | {r['cpu_s']:.2f} s | {r['peak_mb']:.0f} MB "
                  f"(+{r['rise_mb']:.0f}) | {r['load']:.1f} |", flush=True)
    if len(got) == 2:
        a, b = got["fold"], got["side"]
        print(f"# largest relative difference of the held-out errors {np.abs(b / a - 1).max():.2e}; "
              f"chosen strength per fold {a.argmin(axis=1).tolist()} / {b.argmin(axis=1).tolist()}; "
              f"pooled {int(a.sum(axis=0).argmin())} / {int(b.sum(axis=0).argmin())}")


def spc_kernel_table(path: str, window: str, timeout: float) -> None:
    """The least-squares predictor's kernels (one fold, one BLAS thread), and the two routes' projected costs."""
    past, horizon = (int(v) for v in window.split(":"))
    r = run_child(["spc-kernels", path, past, horizon], timeout)
    if "n_b" not in r:
        print(f"# SPC kernels: {_fmt(r)}")
        return
    print(f"| SPC kernel, one fold's training G11 ({r.pop('n_b')} rows, {r.pop('pN')} right-hand sides), "
          "one BLAS thread | CPU | load |")
    print("| --- | --- | --- |")
    for name, (cpu, load) in r.items():
        print(f"| {name} | {cpu:.2f} s | {load:.1f} |")
    eig, one = r["eigh syevd (the fit's)"][0], r["one strength: Cholesky + 2 trsm + trmm, pN rhs"][0]
    print(f"# 3 folds x 9 strengths: eigen route {3 * eig:.1f} s of eigendecompositions (+ its O(n³) products), "
          f"per-strength route {27 * one:.1f} s")


def run_child(args: list, timeout: float) -> dict:
    """One case in a fresh interpreter; ``{"killed": True}`` past the timeout."""
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", *map(str, args)]
    try:
        out = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=False,
                             env={**os.environ, "STIMSTEER_PROGRESS": "0"})
    except subprocess.TimeoutExpired:
        return {"killed": True}
    if out.returncode != 0:
        return {"error": (out.stderr.strip().splitlines() or ["?"])[-1]}
    return json.loads(out.stdout.strip().splitlines()[-1])


# ------------------------------------------------------------------------------------------------ report
def _fmt(r: dict, ref: dict | None = None) -> str:
    if r.get("killed"):
        return "killed (timeout)"
    if "error" in r:
        return "error: " + r["error"][:60]
    text = f"{r['seconds']:.2f} s" + (f" (CPU {r['cpu_s']:.1f} s)" if "cpu_s" in r else "") + \
        f", {r['peak_mb']:.0f} MB peak (+{r['rise_mb']:.0f})"
    if ref and "seconds" in ref:
        text += f", {r['seconds'] / ref['seconds']:.1f}x Gram"
        if "cpu_s" in r:  # the work done: no schedule on the machine's cores can take less wall time than this
            cores = os.cpu_count() or 1
            text += f" (CPU {r['cpu_s'] / ref['seconds']:.1f}x; ÷ {cores} cores {r['cpu_s'] / cores / ref['seconds']:.1f}x)"
    if "own_s" in r:  # the Gram reference: the same sums by the fits' own route
        text += f"; by the fits' route ({r['own_route']}) {r['own_s']:.2f} s"
    if "cholesky_1t_s" in r:  # the Gram reference: one Cholesky factor of its size beside it
        text += f"; one {r['n']} x {r['n']} Cholesky {r['cholesky_1t_s']:.2f} s " \
            f"(two threads {r['cholesky_2t_s']:.2f} s)"
    if "route" in r:
        text += f" ({r['route']})"
    return text


def _load() -> float:
    return os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")


def _slope(pasts, seconds) -> float:
    """Least-squares slope of log(time) against log(past window) over the finite points (NaN with fewer than 2)."""
    import numpy as np

    x, y = np.log(np.asarray(pasts, float)), np.asarray(seconds, float)
    ok = np.isfinite(y) & (y > 0)
    return float(np.polyfit(x[ok], np.log(y[ok]), 1)[0]) if ok.sum() >= 2 else float("nan")


def window_table(path: str, windows, methods, timeout: float) -> None:
    """Fit time, memory and Gram ratio of each method at each ``past:horizon`` window."""
    print("| method | past / horizon | fit | Gram reference | load |")
    print("| --- | --- | --- | --- | --- |")
    floors = []
    for window in windows:
        past, horizon = (int(v) for v in window.split(":"))
        refs = {}
        for method in methods:
            lags = past if method == "arx" else past + horizon
            if lags not in refs:
                refs[lags] = run_child(["gram", path, lags], timeout)
            r = run_child([method, path, past, horizon], timeout)
            print(f"| {METHODS[method][2]} | {past} / {horizon} | {_fmt(r, refs[lags])} | "
                  f"{lags} lags: {_fmt(refs[lags])} | {_load():.1f} |", flush=True)
            if "floor" in r:
                floors.append(floor_line(f"{METHODS[method][2]} at {past} / {horizon}", r, refs[lags], timeout))
    for line in floors:
        print(line)


def growth_table(path: str, pasts, methods, timeout: float, horizon: int = 50) -> None:
    """Fit time at each past window (horizon fixed) and the slope of log time against log past.

    Each fit's ratio is to the Gram with its own lag count (``past`` for ridge ARX, ``past + horizon`` otherwise).
    """
    print(f"| past (horizon {horizon}) | " + " | ".join(f"{METHODS[m][2]}: fit, x Gram" for m in methods)
          + " | Gram, past lags | Gram, past + horizon lags | load |")
    print("|" + " --- |" * (len(methods) + 4))
    times = {m: [] for m in methods + ["gram"]}
    for past in pasts:
        refs = {lags: run_child(["gram", path, lags], timeout) for lags in (past, past + horizon)}
        times["gram"].append(refs[past + horizon].get("seconds", float("nan")))
        cells = []
        for method in methods:
            ref = refs[past if method == "arx" else past + horizon]
            r = run_child([method, path, past, horizon], timeout)
            times[method].append(r.get("seconds", float("nan")))
            cells.append("killed" if r.get("killed") else (r.get("error", "?")[:40] if "error" in r else
                         f"{r['seconds']:.2f} s, {r['seconds'] / ref.get('seconds', float('nan')):.1f}x"))
        grams = " | ".join(f"{refs[k]['seconds']:.3f} s" if "seconds" in refs[k] else "?" for k in refs)
        print(f"| {past} | " + " | ".join(cells) + f" | {grams} | {_load():.1f} |", flush=True)
    for name in methods + ["gram"]:
        t = times[name]
        steps = ", ".join(f"{a}->{b}: {_slope([a, b], t[i:i + 2]):.2f}" for i, (a, b) in
                          enumerate(zip(pasts[:-1], pasts[1:])))
        label = METHODS[name][2] if name in METHODS else "Gram reference (past + horizon lags)"
        print(f"# slope of log time vs log past, {label}: {_slope(pasts, t):.2f} overall ({steps})")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--windows", nargs="*", default=["10:20", "100:50"], help="past:horizon pairs (none: skip)")
    ap.add_argument("--methods", nargs="+", default=list(METHODS), choices=list(METHODS))
    ap.add_argument("--timeout", type=float, default=600.0, help="seconds per case before it is killed")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--growth", action="store_true", help="also print the cost growth over past windows")
    ap.add_argument("--growth-methods", nargs="+", default=["arx", "subspace"], choices=list(METHODS))
    ap.add_argument("--growth-past", nargs="+", type=int, default=[25, 50, 100, 200])
    ap.add_argument("--growth-contacts", type=int, default=8, help="recorded channels of the growth session")
    ap.add_argument("--spc-kernels", action="store_true", help="also time the least-squares predictor's kernels")
    ap.add_argument("--spc-window", default="100:50", help="past:horizon of --spc-kernels and --spc-grids")
    ap.add_argument("--spc-grids", action="store_true",
                    help="also time the least-squares predictor's grids by both routes (fresh processes, alternating)")
    ap.add_argument("--child", nargs="+", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        kind, path, *rest = args.child
        out = child_gram(path, int(rest[0])) if kind == "gram" else \
            child_reduction(int(rest[0]), int(rest[1]), *rest[2:3]) if kind == "reduction" else \
            child_spc_kernels(path, int(rest[0]), int(rest[1])) if kind == "spc-kernels" else \
            child_spc_grid(path, int(rest[0]), int(rest[1]), rest[2]) if kind == "spc-grid" else \
            child_fit(path, kind, int(rest[0]), int(rest[1]))
        print(json.dumps(out))
        return 0
    print(f"# {platform.machine()} {os.cpu_count()} CPUs, load average {_load():.1f} at the start")
    from stimsteer.sysid.io import save_session

    with tempfile.TemporaryDirectory() as tmp:
        if args.windows or args.spc_kernels or args.spc_grids:
            path = str(Path(tmp) / "session.h5")
            session = make_session(args.seed)
            save_session(session, path)
            print(f"# session: {session.u.shape[0]} samples at 1 kHz, {session.n_inputs} inputs, "
                  f"{session.n_outputs} outputs, {len(session.trials)} trials; timeout {args.timeout:.0f} s per case")
            if args.windows:
                window_table(path, args.windows, args.methods, args.timeout)
            if args.spc_kernels:
                spc_kernel_table(path, args.spc_window, args.timeout)
            if args.spc_grids:
                spc_grid_table(path, args.spc_window, args.timeout)
        if args.growth:
            path = str(Path(tmp) / "growth.h5")
            # 3 sites: the demo's stimulation file describes three, and make_demo refuses fewer
            session = make_session(args.seed, n_contacts=args.growth_contacts)
            save_session(session, path)
            print(f"# growth session: {session.u.shape[0]} samples at 1 kHz, {session.n_inputs} inputs, "
                  f"{session.n_outputs} outputs; timeout {args.timeout:.0f} s per case")
            growth_table(path, args.growth_past, args.growth_methods, args.timeout)
    print(f"# load average {_load():.1f} at the end")
    return 0


if __name__ == "__main__":
    sys.exit(main())
