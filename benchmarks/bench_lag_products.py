"""The lag products of one chunk by both routes: direct products against short FFTs (``sysid._lag_spectra``).

Setup (not timed): one chunk of 16,384 rows (the fits' chunk) of seeded Gaussian samples, ``c`` channels and ``L``
lead-in samples. Timed in one run, on one BLAS thread (the fits' stream workers take one each), each the best of 5
CPU times (``time.process_time``):

* direct: one product of two ``(rows × c)`` matrices per lag difference (``_lagged._chunk_products`` with the FFT
  route switched off), ``2 (L + 1) c²`` flops per row;
* FFT: ``_lag_spectra.spectral_products`` (segments of ``N − L`` rows, ``N`` = :func:`_lag_spectra.fft_length`).

Printed per channel count and window: both CPU times, FFT ÷ direct, which route ``_chunk_products`` takes (the
rule :func:`_lag_spectra.uses_spectra`) and the largest difference of the two results relative to the largest product.
The rule is right where the taken route is the faster one; near the crossover the two cost about the same.

Run from the repository root:  .venv/bin/python benchmarks/bench_lag_products.py [--channels 8 23 72]
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
from threadpoolctl import threadpool_limits

from stimsteer.sysid import _lag_spectra, _lagged

ROWS = 16384


def _best(f, repeats: int = 5) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.process_time()
        f()
        times.append(time.process_time() - t0)
    return min(times)


def direct(B: np.ndarray, L: int) -> np.ndarray:
    """The direct route, whatever the window (the FFT route switched off for the call)."""
    keep = _lag_spectra.MIN_LAGGED_LENGTH
    _lag_spectra.MIN_LAGGED_LENGTH = 10**9
    try:
        return _lagged._chunk_products(B, L)[1]
    finally:
        _lag_spectra.MIN_LAGGED_LENGTH = keep


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--channels", type=int, nargs="+", default=[8, 23, 72])
    ap.add_argument("--lags", type=int, nargs="+", default=[5, 10, 16, 24, 32, 50, 100, 150, 200])
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    print(f"# one chunk of {ROWS} rows, one BLAS thread, best of 5 CPU times; load {os.getloadavg()[0]:.1f}")
    print("| channels | L | N | direct | FFT | FFT / direct | route taken | difference |")
    print("| --- | --- | --- | --- | --- | --- | --- | --- |")
    with threadpool_limits(limits=1, user_api="blas"):
        for c in args.channels:
            for L in args.lags:
                B = rng.standard_normal((ROWS + L, c)) + 0.5
                Xd = direct(B, L)
                Xf = _lag_spectra.spectral_products(B, L)
                td = _best(lambda: direct(B, L))
                tf = _best(lambda: _lag_spectra.spectral_products(B, L))
                taken = "FFT" if _lag_spectra.uses_spectra(L, c) else "direct"
                diff = np.abs(Xf - Xd).max() / np.abs(Xd).max()
                print(f"| {c} | {L} | {_lag_spectra.fft_length(L)} | {td * 1e3:.1f} ms | {tf * 1e3:.1f} ms | "
                      f"{tf / td:.2f} | {taken} | {diff:.1e} |")
    print(f"# load {os.getloadavg()[0]:.1f} at the end")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
