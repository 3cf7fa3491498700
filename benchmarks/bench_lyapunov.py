"""Infinite-horizon Gramians, ``W = A W Aᵀ + Q``: SciPy's solver against the doubled sum (``sysid/network/lyapunov.py``).

Setup (not timed): random stable ``A`` (Gaussian entries scaled to spectral radius ``--radius``), ``Q = B Bᵀ`` of
a Gaussian ``B`` with 3 columns (3 stimulation sites), seeded.

Measured in the same run, per size ``n`` (``--sizes``): the wall time of :func:`scipy.linalg.solve_discrete_lyapunov`
and of the doubling route of :func:`stimsteer.sysid.network.lyapunov.stable_gramian` (forced at every size), and
each one's relative residual ``max |A W Aᵀ − W + Q| / max |W|``, beside the relative difference of the two. SciPy is
skipped from ``--scipy-max`` states on (its Schur form and ``trsyl`` take minutes at 2,000 states); the doubling route
is what ``stable_gramian`` takes from ``DOUBLING_STATES`` states on.

Usage::

    python benchmarks/bench_lyapunov.py
    python benchmarks/bench_lyapunov.py --sizes 400 800 --radius 0.9995
"""

from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np
import scipy.linalg as sla

from stimsteer.sysid.network import lyapunov as ly


def _residual(A, W, Q) -> float:
    return float(np.abs(A @ W @ A.T - W + Q).max() / np.abs(W).max())


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", nargs="+", type=int, default=[200, 400, 800, 1600])
    ap.add_argument("--radius", type=float, default=0.95)
    ap.add_argument("--scipy-max", type=int, default=1000, help="states from which SciPy's solver is not run")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(args.seed)
    print(f"# {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f}; spectral radius {args.radius}; "
          f"stable_gramian doubles from {ly.DOUBLING_STATES} states")
    print("| states | SciPy solve_discrete_lyapunov | doubling | relative difference | load |")
    print("| --- | --- | --- | --- | --- |")
    for n in args.sizes:
        A = rng.standard_normal((n, n))
        A *= args.radius / np.max(np.abs(np.linalg.eigvals(A)))
        B = rng.standard_normal((n, 3))
        Q = B @ B.T
        old, ly.DOUBLING_STATES = ly.DOUBLING_STATES, 1
        try:
            t = time.perf_counter()
            W = ly.stable_gramian(A, Q)
            t_d = time.perf_counter() - t
        finally:
            ly.DOUBLING_STATES = old
        cell_s, diff = "skipped", "-"
        if n < args.scipy_max:
            t = time.perf_counter()
            R = sla.solve_discrete_lyapunov(A, Q)
            t_s = time.perf_counter() - t
            cell_s = f"{t_s:.3f} s (residual {_residual(A, R, Q):.1e})"
            diff = f"{np.abs(W - R).max() / np.abs(R).max():.1e}"
        print(f"| {n} | {cell_s} | {t_d:.3f} s (residual {_residual(A, W, Q):.1e}) | {diff} | "
              f"{os.getloadavg()[0]:.1f} |", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
