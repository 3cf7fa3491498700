"""Exciting signals and the check that inputs excite enough: the identification side of stimulation schedules.

* :func:`max_length_sequence`: a maximum-length binary sequence on -1 / +1 (PRBS);
* :func:`multisine`: one period of a flat-spectrum multisine with reduced crest factor; :func:`crest_factor`;
* :func:`verify_excitation`: whether the inputs of some trials are persistently exciting of an order, together
  (the :class:`ExcitationCheck` result).

Schedules for a next session, designed from these inside declared limits, live in the control layer
(:func:`stimsteer.control.design_schedule`), since they take a :class:`~stimsteer.control.StimLimits`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .exceptions import InvalidParameterError
from .excitation import DEFAULT_TOL_FACTOR, rank_tolerance
from .hankel import hankel_column_count, row_space_factor
from ._lazy import lazy_module
from ._mls import seeded_register

ssig = lazy_module("scipy.signal")  # imported at its first use (sysid/_lazy.py)

__all__ = ["ExcitationCheck", "verify_excitation", "max_length_sequence", "multisine", "crest_factor",
           "MAX_MLS_BITS"]

#: scipy.signal.max_len_seq knows taps up to 32 bits.
MAX_MLS_BITS = 32


def _rng(seed) -> np.random.Generator:
    return seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)


# ---------------------------------------------------------------------------------------------------- signals
def max_length_sequence(nbits: int, *, seed=None, length: int | None = None) -> np.ndarray:
    """A maximum-length binary sequence on the levels -1 / +1.

    Parameters
    ----------
    nbits : int
        Register length; the period is ``N = 2**nbits - 1``. From 2 to 32.
    seed : int or numpy.random.Generator, optional
        Picks the (non-zero) initial register state, i.e. a cyclic shift; default the all-ones state.
    length : int, optional
        Number of values; default one period ``N``.

    Returns
    -------
    ndarray, shape (length,)
        ``2 b - 1`` for the bits ``b`` of :func:`scipy.signal.max_len_seq`.

    Notes
    -----
    Over one period the periodic autocorrelation is 1 at lag 0 and ``-1/N`` at every other lag
    (Golomb S.W. (1967), Shift Register Sequences), so the sequence is exciting of every order up to ``N``.

    Examples
    --------
    >>> s = max_length_sequence(3)
    >>> s.size, float(np.dot(s, np.roll(s, 1)) / s.size)
    (7, -0.14285714285714285)
    """
    nbits = int(nbits)
    if not 2 <= nbits <= MAX_MLS_BITS:
        raise InvalidParameterError(f"nbits must be between 2 and {MAX_MLS_BITS}; got {nbits}.")
    bits, _ = ssig.max_len_seq(nbits, state=seeded_register(nbits, seed), length=length)
    return 2.0 * bits.astype(np.float64) - 1.0


def crest_factor(x) -> np.ndarray:
    """Crest factor ``max|x - mean| / rms(x - mean)`` per column of ``x`` (shape (n_samples, c) or (n_samples,))."""
    x = np.asarray(x, dtype=np.float64)
    x2 = x[:, None] if x.ndim == 1 else x
    d = x2 - x2.mean(axis=0)
    rms = np.sqrt(np.mean(d ** 2, axis=0))
    cf = np.divide(np.max(np.abs(d), axis=0), rms, out=np.full(d.shape[1], np.inf), where=rms > 0)
    return cf[0] if x.ndim == 1 else cf


def multisine(period_samples: int, harmonics, *, seed=None, n_iter: int = 100) -> np.ndarray:
    """One period of a flat-spectrum multisine with random phases and reduced crest factor, peak 1.

    Parameters
    ----------
    period_samples : int
        Period ``P`` in samples.
    harmonics : sequence of int
        Excited harmonics ``k`` (frequency ``k / P`` cycles per sample), each in ``1 <= k < P / 2``.
    seed : int or numpy.random.Generator, optional
        Draws the initial random phases.
    n_iter : int, default 100
        Clipping iterations.

    Returns
    -------
    x : ndarray, shape (P,)
        Zero mean, ``max|x| = 1``; its DFT is non-zero only at ``harmonics``, all with the same magnitude.

    Notes
    -----
    Crest-factor reduction by time-frequency swapping: clip the signal at 90 % of its peak, keep the phases of
    the clipped signal's spectrum at the excited harmonics with the original (flat) magnitudes, repeat; the
    iterate with the lowest crest factor is returned (so it is never worse than the random-phase start).

    References
    ----------
    Van der Ouderaa E., Schoukens J., Renneboog J. (1988), Peak factor minimization using a time-frequency domain
    swapping algorithm, IEEE Trans. Instrum. Meas. 37:145.
    """
    P = int(period_samples)
    k = np.unique(np.asarray(harmonics, dtype=np.int64))
    if k.size == 0 or k[0] < 1 or 2 * k[-1] >= P:
        raise InvalidParameterError(
            f"harmonics must be non-empty whole numbers with 1 <= k < P/2 = {P / 2:g}; got {np.asarray(harmonics)}."
        )
    rng = _rng(seed)
    X = np.zeros(P // 2 + 1, dtype=complex)
    X[k] = np.exp(2j * np.pi * rng.random(k.size))
    best, best_cf = None, np.inf
    for _ in range(max(int(n_iter), 1)):
        x = np.fft.irfft(X, n=P)
        cf = crest_factor(x)
        if cf < best_cf:
            best, best_cf = x, cf
        peak = np.max(np.abs(x))
        Xc = np.fft.rfft(np.clip(x, -0.9 * peak, 0.9 * peak))
        X = np.zeros_like(X)
        X[k] = np.exp(1j * np.angle(Xc[k]))
    return best / np.max(np.abs(best))


# ---------------------------------------------------------------------------------------------------- excitation
@dataclass(frozen=True)
class ExcitationCheck:
    """Persistency of excitation of a schedule's trials at the planned order.

    Attributes
    ----------
    order : int
        Depth ``L`` of the checked mosaic input Hankel matrix.
    rank : int
        Its numerical rank.
    n_rows : int
        ``n_inputs * order``; full row rank (``rank == n_rows``) means exciting of order ``L``.
    n_columns : int
    rank_tol : float
        Singular values above it count (``sigma_max * max(shape) * eps * tol_factor``, see
        :mod:`stimsteer.sysid.excitation`).
    singular_value_ratio : float
        ``sigma_min / sigma_max``: the excitation margin (0 when rank-deficient).
    exciting : bool
    """

    order: int
    rank: int
    n_rows: int
    n_columns: int
    rank_tol: float
    singular_value_ratio: float
    exciting: bool


def verify_excitation(u, trials, order: int, *, tol_factor: float = DEFAULT_TOL_FACTOR) -> ExcitationCheck:
    """Check that the inputs of the given trials are persistently exciting of ``order`` collectively.

    Parameters
    ----------
    u : array_like, shape (n_samples, n_inputs)
    trials : array_like of int, shape (n_trials, 2)
        Half-open ranges ``[start, stop)``.
    order : int
        ``L >= 1``.
    tol_factor : float, default DEFAULT_TOL_FACTOR

    Returns
    -------
    ExcitationCheck

    Notes
    -----
    The mosaic block-Hankel matrix of depth ``L`` (per-trial Hankel matrices side by side) must have full row rank
    ``m L`` (Willems et al. 2005; van Waarde et al. 2020). Its singular values come from the streamed row-space
    factor (:func:`~stimsteer.sysid.hankel.row_space_factor`), so the matrix is never formed.
    """
    u = np.asarray(u, dtype=np.float64)
    u = u[:, None] if u.ndim == 1 else u
    segs = [(int(a), int(b)) for a, b in np.asarray(trials).reshape(-1, 2)]
    order = int(order)
    n_rows = u.shape[1] * order
    n_cols = hankel_column_count(segs, order)
    if n_cols == 0:
        return ExcitationCheck(order, 0, n_rows, 0, 0.0, 0.0, False)
    F, n_cols = row_space_factor([u], order, segs)
    sv = np.linalg.svd(F, compute_uv=False)
    tol = rank_tolerance(sv, (n_rows, n_cols), tol_factor=tol_factor)
    rank = int(np.count_nonzero(sv > tol)) if sv.size and sv[0] > 0 else 0
    ratio = float(sv[-1] / sv[0]) if rank == n_rows and sv.size == n_rows else 0.0
    return ExcitationCheck(order, rank, n_rows, int(n_cols), float(tol), ratio, rank == n_rows)
