"""Lag products of a chunk by short FFTs: the long-window route of :func:`stimsteer.sysid._lagged._chunk_products`.

``X[δ] = Σ_t Z_t Z_{t-δ}ᵀ`` for ``δ = 0 … L`` is, channel pair by channel pair, a cross-correlation at lags
``0 … L``. The chunk's rows are cut into segments of ``M`` rows; segment ``s`` correlates its own rows ``x_s``
(zero-padded) with the window ``y_s`` that also holds the ``L`` samples before them. With an FFT length
``N ≥ M + L`` the circular correlation of the two equals the linear one at lags ``0 … L`` (no wrap-around), and the
sum over segments is taken on the spectra before one inverse transform::

    X[L - ℓ] = irfft( Σ_s conj(rfft(x_s)) · rfft(y_s)ᵀ )[ℓ],   ℓ = 0 … L

(the convolution theorem for finite sequences: Oppenheim & Schafer 2010, "Discrete-time signal processing", 3rd ed.,
sec. 8.7; segments summed as in the overlap-save method, sec. 8.7.3).

Work per row: two real FFTs of ``c`` channels over ``N / M`` rows, and ``(N/2 + 1) c² / M`` complex multiply-adds,
against ``2 (L + 1) c²`` flops for the direct products. With ``N`` the power of two at or above ``3 (L + 1)`` that
is a few ``c²`` per row, whatever ``L``, plus the transforms' and the calls' own cost, which weighs most with few
channels. ``benchmarks/bench_lag_products.py`` measures both routes on one 16,384-row chunk (one core): at 23
channels the FFT route took 0.09 of the direct products' time at ``L = 150`` and 0.14 at ``L = 100``, but 1.2 at
``L = 10``; at 72 channels 0.64 at ``L = 10`` and 1.1 at ``L = 5``; at 8 channels 0.21 at ``L = 100`` and 1.0 at
``L = 50``. So the FFT route is taken from ``(L + 1) c ≥ 500`` (:func:`uses_spectra`); shorter windows keep the
direct products, bit for bit as before.

Rounding: each product's error is a small multiple of ``ε log₂ N`` times the norms of the two segments (the FFT's
normwise bound, Higham 2002, "Accuracy and stability of numerical algorithms", 2nd ed., sec. 24.1), the order of the
direct products' ``ε · Σ |x_t y_t|``; measured, the two routes agree to at most 7.4e-16 of the largest product
(``benchmarks/bench_lag_products.py``). ``X[0]`` is
made exactly symmetric (the direct route's ``Zᵀ Z`` is), and a channel of zeros gives products of exactly zero.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft
from numpy.lib.stride_tricks import as_strided

#: Lagged-vector length ``(L + 1) · c`` from which the FFT route is taken (``bench_lag_products.py``: the two
#: routes cost about the same near 22 lags of 23 channels, 7 of 72, 60 of 8).
MIN_LAGGED_LENGTH = 500
#: Fewest lags for the FFT route whatever the channel count (its transforms are too short to pay below).
MIN_LAGS = 8


def uses_spectra(n_lags: int, n_channels: int) -> bool:
    """Whether lag products up to ``n_lags`` of ``n_channels`` are taken by :func:`spectral_products`."""
    return n_lags >= MIN_LAGS and (n_lags + 1) * n_channels >= MIN_LAGGED_LENGTH


def fft_length(n_lags: int) -> int:
    """The FFT length for lags ``0 … L``: the power of two at or above ``3 (L + 1)`` (segments of ``N - L`` rows,
    at least two thirds of the transform; the measured optimum at ``L = 100`` and ``150`` was 512)."""
    return 1 << int(np.ceil(np.log2(3 * (n_lags + 1))))


def spectral_products(B: np.ndarray, n_lags: int) -> np.ndarray:
    """``X[δ] = Σ_t Z_t Z_{t-δ}ᵀ`` over the chunk's rows, by FFTs of short segments.

    Parameters
    ----------
    B : ndarray, shape (L + n, c), C-contiguous rows
        Samples ``Z``: the ``L`` samples before the chunk's first row, then its ``n ≥ 1`` rows.
    n_lags : int
        ``L``, the longest lag.

    Returns
    -------
    X : ndarray, shape (L + 1, c, c)
        The lag products, ``X[0]`` exactly symmetric.
    """
    L = int(n_lags)
    n, c = B.shape[0] - L, B.shape[1]
    if n < 1:
        raise ValueError(f"spectral_products needs at least one row after the {L} lead-in samples; got {n}")
    N = fft_length(L)
    M = N - L  # rows per segment
    full, rest = divmod(n, M)
    B = np.ascontiguousarray(B, dtype=float)
    row, col = B.strides
    C = np.zeros((N // 2 + 1, c, c), dtype=complex)
    if full:
        x = B[L: L + full * M].reshape(full, M, c)  # each segment's own rows
        y = as_strided(B, shape=(full, M + L, c), strides=(M * row, row, col))  # its rows and the L before them
        _add_cross_spectra(C, x, y, N)
    if rest:
        s0 = full * M
        _add_cross_spectra(C, B[L + s0: L + n][None], B[s0: L + n][None], N)
    corr = sfft.irfft(C, n=N, axis=0)  # corr[ℓ][i, k] = Σ_τ x[τ, i] y[τ + ℓ, k]
    X = np.ascontiguousarray(corr[L::-1])  # X[δ] = corr[L - δ]
    X[0] += X[0].T
    X[0] *= 0.5
    return X


def _add_cross_spectra(C: np.ndarray, x: np.ndarray, y: np.ndarray, N: int) -> None:
    """``C[f] += Σ_s conj(x̂_s[f])ᵀ ŷ_s[f]`` for segments ``x`` (``S × M × c``) and windows ``y``
    (``S × (M + L) × c``), each zero-padded to ``N`` rows by the transform."""
    xf = sfft.rfft(x, n=N, axis=1)  # (S, F, c)
    yf = sfft.rfft(y, n=N, axis=1)
    np.conjugate(xf, out=xf)
    C += np.matmul(xf.transpose(1, 2, 0), yf.transpose(1, 0, 2))  # per frequency: (c × S)(S × c)
