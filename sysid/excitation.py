"""Persistency of excitation of the recorded inputs, per trial and collectively over trials.

An input ``u`` with ``m`` channels is *persistently exciting of order L* when its (mosaic) block-Hankel matrix of
depth ``L`` has full row rank ``m·L``. The direct route builds its predictors from windows of ``L = Tini + N``
samples (past window plus horizon); by the fundamental lemma its data matrix spans every trajectory of the system
when the input is persistently exciting of order ``L + n``, ``n`` the state dimension.

Ranks are numerical: singular values are counted when ``σ_i > σ_max · max(shape) · eps · tol_factor`` with
``eps`` the float64 machine epsilon and ``max(shape)`` the larger dimension of the (never formed) Hankel matrix.
With ``tol_factor = 1`` this is NumPy's default for :func:`numpy.linalg.matrix_rank`; the default ``10`` leaves a
margin for the rounding of the streamed QR used to get the singular values.

:func:`check_excitation` first tries the Gram ``H Hᵀ`` of the input Hankel matrix, made from lag products of the
raw inputs (:mod:`stimsteer.sysid._lagged`, a few ``(T × m)`` products per lag instead of a QR of the
``T × m·L`` matrix): its eigenvalues are ``σ_i²``, but forming it costs digits (``σ_i`` below ``√eps · σ_max``
are lost), so it only decides "full row rank" where the smallest eigenvalue exceeds a bound on the rounding of
the Gram and of the eigensolver by far more than the squared tolerance (:func:`_gram_proves_full_rank`). Anything
else (a rank-deficient or nearly deficient input) is decided by the QR route as before, so the order returned is
the same either way.

References
----------
Willems J.C., Rapisarda P., Markovsky I., De Moor B.L.M. (2005), "A note on persistency of excitation", Systems &
Control Letters 54:325.
van Waarde H.J., De Persis C., Camlibel M.K., Tesi P. (2020), "Willems' fundamental lemma for state-space systems
and its extension to multiple datasets", IEEE Control Systems Letters 4:602.
"""

from __future__ import annotations

import os
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from ._lagged import _lagged_gram, _stream_lag_sums
from .exceptions import ExcitationError, ExcitationWarning, SessionError
from ._blas_threads import _one_blas_thread
from .hankel import combine_factors, hankel_column_count, row_space_factor

__all__ = [
    "DEFAULT_TOL_FACTOR",
    "ExcitationReport",
    "rank_tolerance",
    "numerical_rank",
    "hankel_rank",
    "pe_order",
    "required_order",
    "excitation_report",
    "check_excitation",
    "excitation_order",
    "warn_low_excitation",
]

DEFAULT_TOL_FACTOR = 10.0

_SCHEDULE_HINT = "Use a longer or richer stimulation schedule (`stimsteer schedule`)."


def rank_tolerance(singular_values, shape, *, tol_factor: float = DEFAULT_TOL_FACTOR) -> float:
    """Threshold below which a singular value counts as zero: ``σ_max · max(shape) · eps · tol_factor``.

    Parameters
    ----------
    singular_values : array_like, shape (k,)
    shape : tuple of int
        Shape of the matrix the singular values belong to.
    tol_factor : float, default DEFAULT_TOL_FACTOR

    Returns
    -------
    float
    """
    sv = np.asarray(singular_values, dtype=np.float64)
    smax = float(sv.max()) if sv.size else 0.0
    return smax * max(int(s) for s in shape) * np.finfo(np.float64).eps * float(tol_factor)


def numerical_rank(M, *, tol_factor: float = DEFAULT_TOL_FACTOR, shape=None) -> int:
    """Numerical rank by SVD with the tolerance of :func:`rank_tolerance`.

    Parameters
    ----------
    M : array_like, shape (n_rows, n_cols)
    tol_factor : float, default DEFAULT_TOL_FACTOR
    shape : tuple of int, optional
        Shape used in the tolerance when ``M`` is a compressed factor of a larger matrix (default ``M.shape``).

    Returns
    -------
    int
    """
    M = np.atleast_2d(np.asarray(M, dtype=np.float64))
    if M.size == 0:
        return 0
    sv = np.linalg.svd(M, compute_uv=False)
    tol = rank_tolerance(sv, M.shape if shape is None else shape, tol_factor=tol_factor)
    return int(np.count_nonzero(sv > tol)) if sv[0] > 0 else 0


def hankel_rank(w, depth: int, segments=None, *, tol_factor: float = DEFAULT_TOL_FACTOR) -> int:
    """Numerical rank of the mosaic Hankel matrix of depth ``depth`` of ``w`` over ``segments``.

    Computed from the streamed row-space factor (:func:`~stimsteer.sysid.hankel.row_space_factor`), which has
    the same singular values as the Hankel matrix, so long recordings never form it.
    """
    F, n_cols = row_space_factor([w], depth, segments)
    return numerical_rank(F, tol_factor=tol_factor, shape=(F.shape[0], n_cols))


def _max_feasible_depth(segments, n_channels: int, cap: int) -> int:
    """Largest depth <= cap for which the mosaic has at least as many columns as rows (else 0)."""
    depths = np.arange(1, cap + 1)
    lengths = np.array([b - a for a, b in segments], dtype=np.int64)
    cols = np.clip(lengths[None, :] - depths[:, None] + 1, 0, None).sum(axis=1)
    ok = np.nonzero(cols >= n_channels * depths)[0]
    return int(depths[ok[-1]]) if ok.size else 0


def pe_order(u, segments=None, *, max_order: int, tol_factor: float = DEFAULT_TOL_FACTOR) -> int:
    """Order of persistency of excitation of ``u`` over ``segments``, looked for up to ``max_order``.

    Parameters
    ----------
    u : array_like, shape (n_samples, n_inputs)
    segments : sequence of (int, int), optional
        Valid segments (default the whole signal). The mosaic over several segments gives the collective order.
    max_order : int
        Largest order checked; the cost of one check at depth ``L`` is ``O(n_columns · (m·L)²)``.
    tol_factor : float, default DEFAULT_TOL_FACTOR

    Returns
    -------
    int
        The largest ``L <= max_order`` whose input mosaic Hankel matrix of depth ``L`` has rank ``m·L``
        (0 when not even depth 1 has). A result equal to ``max_order`` means "at least ``max_order``".

    Notes
    -----
    Full row rank at depth ``L`` implies it at depth ``L − 1`` (the top rows of the depth-``L`` columns are
    columns of the depth-``L − 1`` matrix), so the order is found by bisection.

    Examples
    --------
    >>> pe_order(np.tile([1.0, 0.0, 0.0], 20), max_order=10)  # a pulse every 3 samples excites order 3
    3
    """
    u = np.asarray(u, dtype=np.float64)
    u = u[:, None] if u.ndim == 1 else u
    segments = [(0, u.shape[0])] if segments is None else [(int(a), int(b)) for a, b in segments]
    max_order = int(max_order)
    if max_order < 1:
        raise SessionError(f"max_order must be at least 1; got {max_order}.")
    m = u.shape[1]

    def full(depth):
        return hankel_rank(u, depth, segments, tol_factor=tol_factor) == m * depth

    hi = _max_feasible_depth(segments, m, max_order)
    if hi == 0 or full(hi):
        return hi
    lo = 0
    while hi - lo > 1:
        mid = (lo + hi) // 2
        lo, hi = (mid, hi) if full(mid) else (lo, mid)
    return lo


def required_order(past_steps: int, horizon_steps: int, n_states: int | None = None) -> int:
    """Excitation order the direct route needs: ``Tini + N + n`` (``n = past_steps`` when not given).

    When the state dimension is unknown, the past window is assumed to be at least the state dimension (the
    usual way of choosing it; common practice, no source), so ``n = Tini`` is used.
    """
    past, horizon = _check_window(past_steps, horizon_steps)
    n = past if n_states is None else int(n_states)
    if n < 0:
        raise SessionError(f"n_states must be >= 0; got {n_states}.")
    return past + horizon + n


def _check_window(past_steps, horizon_steps) -> tuple[int, int]:
    for name, v in (("past_steps", past_steps), ("horizon_steps", horizon_steps)):
        if isinstance(v, (bool, np.bool_)) or not float(v).is_integer() or int(v) < 1:
            raise SessionError(f"{name} must be a whole number of samples >= 1; got {v!r}.")
    return int(past_steps), int(horizon_steps)


class _InputsOnly:
    """The inputs of concatenated segments as a source without outputs (for :func:`_stream_lag_sums`)."""

    n_outputs = 0

    def __init__(self, u: np.ndarray):
        self._u, self.n_inputs = u, u.shape[1]

    def read(self, start: int, stop: int):
        return self._u[start:stop], np.zeros((stop - start, 0)), None


def _gram_proves_full_rank(u, segments, depth: int, tol_factor: float = DEFAULT_TOL_FACTOR) -> bool:
    """True when the Gram of the input mosaic Hankel matrix of depth ``depth`` proves full row rank ``m·depth``.

    Each Gram entry is a sum of at most ``T`` products (the lag sums, then the edge terms subtracted), so its
    rounding error is at most ``γ_T · ||h_i|| ||h_j||`` (Higham 2002, section 3.1; ``||h_i||²`` bounded by the
    energy of a channel over every sample), and ``||E||₂ <= 2 γ_T · depth · Σ_t ||u_t||²``; the symmetric
    eigensolver adds ``O(n eps λ_max)`` (Golub & Van Loan 2013, section 8.1). With ``λ_min`` of the computed Gram
    above both bounds plus the squared rank tolerance, ``σ_min² = λ_min(H Hᵀ) > tol²`` (Weyl): full rank, as the
    QR route would find. False means "not proven" (the caller then asks the QR route), never "deficient". The lag
    sums are the direct products here at any depth (``spectra=False``: the bound is theirs, not the FFT route's).
    """
    m = u.shape[1]
    pieces = [(a + depth - 1, b, 0) for a, b in segments if b - a >= depth]
    if not pieces:
        return False
    n_cols = sum(b - k for k, b, _f in pieces)
    sums = _stream_lag_sums(_InputsOnly(u), pieces, 1, depth - 1, spectra=False)[0]  # the bound above
    G = _lagged_gram(sums)
    lam = np.linalg.eigvalsh(G)
    eps = np.finfo(np.float64).eps
    n_terms = int(sum(b - a for a, b in segments))
    gamma = n_terms * eps / (1.0 - n_terms * eps)
    energy = float(sum(np.sum(u[a:b] ** 2) for a, b in segments))
    bound = 2.0 * gamma * depth * energy + 10.0 * G.shape[0] * eps * max(float(lam[-1]), 0.0)
    tol = rank_tolerance([np.sqrt(max(float(lam[-1]), 0.0))], (m * depth, n_cols), tol_factor=tol_factor)
    return bool(lam[0] > 10.0 * bound + tol ** 2)


@dataclass(frozen=True)
class ExcitationReport:
    """How well a session's inputs excite the dynamics, against what the direct route needs.

    Attributes
    ----------
    trial_orders : tuple of int
        Excitation order of each trial on its own (its valid segments as a mosaic).
    collective_order : int
        Excitation order of all trials together (the mosaic over every valid segment).
    required_order : int
        ``past_steps + horizon_steps + n_states``.
    window_steps : int
        ``past_steps + horizon_steps``: below this order the direct route's predictor is not defined.
    past_steps, horizon_steps, n_states : int
    n_states_assumed : bool
        True when ``n_states`` was not given and ``past_steps`` was used.
    max_checked : int
        Orders were looked for up to this value; an order equal to it means "at least".
    ok : bool
        ``collective_order >= required_order``.
    message : str
        One line for the user: the figures, the consequence and the fix.
    """

    trial_orders: tuple
    collective_order: int
    required_order: int
    window_steps: int
    past_steps: int
    horizon_steps: int
    n_states: int
    n_states_assumed: bool
    max_checked: int
    ok: bool
    message: str

    @property
    def defined(self) -> bool:
        """True when the inputs excite at least ``window_steps`` (the predictor exists)."""
        return self.collective_order >= self.window_steps

    def to_text(self) -> str:
        """A few lines for the terminal (used by ``stimsteer inspect``)."""
        def fmt(o):
            return f">={o}" if o >= self.max_checked else str(o)

        n_note = " (assumed = past window)" if self.n_states_assumed else ""
        trials = ", ".join(fmt(o) for o in self.trial_orders)
        return "\n".join([
            f"excitation (direct route, past {self.past_steps} + horizon {self.horizon_steps} steps, "
            f"n = {self.n_states}{n_note}):",
            f"  order per trial: {trials}",
            f"  collective order: {fmt(self.collective_order)}; needed: {self.required_order}",
            f"  {'ok' if self.ok else 'warning'}: {self.message}",
        ])


def _segments_by_trial(session, min_length: int = 1):
    """Concatenated inputs of the valid segments, the segments in that array and each one's trial index."""
    segs = list(session.segments(min_length))
    if not segs:
        raise SessionError("the session has no valid in-trial samples; check its mask and trials.")
    starts = np.asarray(session.trials)[:, 0]
    parts, local, trial_of = [], [], []
    pos = 0
    for a, b in segs:
        u = np.asarray(session.read(a, b)[0], dtype=np.float64)
        parts.append(u)
        local.append((pos, pos + (b - a)))
        trial_of.append(int(np.searchsorted(starts, a, side="right") - 1))
        pos += b - a
    return np.concatenate(parts, axis=0), local, trial_of


def _message(collective, capped, required, window, past, horizon):
    if collective >= required:
        at_least = "at least " if capped else ""
        return (f"the input excites order {at_least}{collective}; the direct route needs {required} for past window "
                f"{past} and horizon {horizon}, so the data are rich enough.")
    if collective < window:
        return (f"the input excites order {collective} but the direct route needs {required} for this horizon, and "
                f"at least {window} (past window + horizon) to define a predictor at all. {_SCHEDULE_HINT}")
    return (f"the input excites order {collective} but the direct route needs {required} for this horizon; "
            f"predictions will be unreliable. {_SCHEDULE_HINT}")


def _orders(u, segs, trial_of, n_trials: int, required: int, tol_factor: float) -> tuple[list[int], int]:
    """Per-trial and collective excitation orders (each capped at ``required``), as :func:`pe_order` gives them.

    The trials' row-space factors at the collective's largest feasible depth are computed once each, on worker
    threads (QR releases the GIL), and combined into the collective factor: in the usual case, where that depth
    has full rank, no factor is computed twice. Other cases fall back on :func:`pe_order`'s bisection.
    """
    m = u.shape[1]
    mine = [[s for s, k in zip(segs, trial_of) if k == t] for t in range(n_trials)]
    depth = _max_feasible_depth(segs, m, required)
    if depth == 0:
        return [pe_order(u, g, max_order=required, tol_factor=tol_factor) if g else 0 for g in mine], 0

    def factor(g):
        long_enough = [(a, b) for a, b in g if b - a >= depth]
        return row_space_factor([u], depth, long_enough) if long_enough else (np.zeros((m * depth, 0)), 0)

    with ThreadPoolExecutor(max_workers=max(1, min(n_trials, os.cpu_count() or 1))) as pool:
        factors = list(pool.map(factor, mine))

    def full(F, n_cols):
        return numerical_rank(F, tol_factor=tol_factor, shape=(F.shape[0], n_cols)) == m * depth

    F = combine_factors([f for f, _ in factors], m * depth)
    n_cols = sum(c for _, c in factors)
    collective = depth if full(F, n_cols) else pe_order(u, segs, max_order=required, tol_factor=tol_factor)
    per_trial = []
    for g, (F_t, c_t) in zip(mine, factors):
        if not g:
            per_trial.append(0)
        elif _max_feasible_depth(g, m, required) == depth and full(F_t, c_t):
            per_trial.append(depth)
        else:
            per_trial.append(pe_order(u, g, max_order=required, tol_factor=tol_factor))
    return per_trial, collective


@_one_blas_thread
def excitation_report(session, *, past_steps: int, horizon_steps: int, n_states: int | None = None,
                      tol_factor: float = DEFAULT_TOL_FACTOR) -> ExcitationReport:
    """Excitation of a session's inputs per trial and collectively, against what the direct route needs.

    Parameters
    ----------
    session : Session or SessionFile
        Anything with ``segments``, ``read`` and ``trials``.
    past_steps : int
        Past window ``Tini``, samples.
    horizon_steps : int
        Prediction horizon ``N``, samples.
    n_states : int, optional
        State dimension of the stimulated network; default ``past_steps`` (see :func:`required_order`).
    tol_factor : float, default DEFAULT_TOL_FACTOR
        Rank tolerance factor (module docstring).

    Returns
    -------
    ExcitationReport

    Raises
    ------
    SessionError
        For a non-positive past window or horizon, or a session without valid samples.

    Notes
    -----
    Orders are looked for up to the required order: enough to answer the question, and the cost of a check grows
    with the square of the depth.
    """
    past, horizon = _check_window(past_steps, horizon_steps)
    required = required_order(past, horizon, n_states)
    u, segs, trial_of = _segments_by_trial(session)
    n_trials = len(np.asarray(session.trials))
    per_trial, collective = _orders(u, segs, trial_of, n_trials, required, tol_factor)
    return ExcitationReport(
        trial_orders=tuple(per_trial), collective_order=collective, required_order=required,
        window_steps=past + horizon, past_steps=past, horizon_steps=horizon, n_states=required - past - horizon,
        n_states_assumed=n_states is None, max_checked=required, ok=collective >= required,
        message=_message(collective, collective >= required, required, past + horizon, past, horizon),
    )


@_one_blas_thread
def check_excitation(session, *, past_steps: int, horizon_steps: int, n_states: int | None = None,
                     tol_factor: float = DEFAULT_TOL_FACTOR, stacklevel: int = 2) -> int:
    """Check a training session for the direct route: error when undefined, warning when unreliable.

    Only the collective order is computed (one rank check when the data are rich enough).

    Parameters
    ----------
    session, past_steps, horizon_steps, n_states, tol_factor
        As :func:`excitation_report`.
    stacklevel : int, default 2
        As in :func:`warnings.warn`, counted from this function (2 = its caller).

    Returns
    -------
    int
        The collective order found (capped at the required order).

    Raises
    ------
    ExcitationError
        When the input Hankel matrix of depth ``past_steps + horizon_steps`` is rank-deficient beyond the
        tolerance: some input direction over the window never occurs, so no predictor is defined.

    Warns
    -----
    ExcitationWarning
        When the input excites at least the window but less than ``past + horizon + n``.
    """
    order = excitation_order(session, past_steps=past_steps, horizon_steps=horizon_steps, n_states=n_states,
                             tol_factor=tol_factor)
    warn_low_excitation(order, past_steps=past_steps, horizon_steps=horizon_steps, n_states=n_states,
                        stacklevel=stacklevel + 1)
    return order


@_one_blas_thread
def excitation_order(session, *, past_steps: int, horizon_steps: int, n_states: int | None = None,
                     tol_factor: float = DEFAULT_TOL_FACTOR) -> int:
    """:func:`check_excitation` without its warning: the collective order found (capped at the required order),
    or its errors. The caller warns (:func:`warn_low_excitation`) where it wants the warning to point."""
    past, horizon = _check_window(past_steps, horizon_steps)
    required = required_order(past, horizon, n_states)
    window = past + horizon
    u, segs, _ = _segments_by_trial(session)
    if hankel_column_count(segs, window) == 0:
        longest = max(b - a for a, b in segs)
        raise SessionError(
            f"the past window + horizon ({past} + {horizon} = {window} samples) is longer than every valid "
            f"segment of every trial (the longest is {longest}). Shorten the past window or "
            "the horizon (--past/--horizon; past_steps/horizon_steps in the API), or record longer trials with "
            "fewer gaps."
        )
    depth = _max_feasible_depth(segs, u.shape[1], required)
    if depth and _gram_proves_full_rank(u, segs, depth, tol_factor):
        order = depth  # what pe_order returns when the largest feasible depth has full rank
    else:
        order = pe_order(u, segs, max_order=required, tol_factor=tol_factor)
    if order < window:
        raise ExcitationError(
            f"the input excites order {order} but the direct route needs at least {window} (past window + "
            f"horizon) to define a predictor, and {required} to be reliable: the input Hankel matrix of depth "
            f"{window} is rank-deficient beyond the tolerance (σ_max·max(shape)·eps·{tol_factor:g}). "
            f"{_SCHEDULE_HINT} Or shorten the past window or horizon."
        )
    return order


def warn_low_excitation(order: int, *, past_steps: int, horizon_steps: int, n_states: int | None = None,
                        stacklevel: int = 2) -> None:
    """:func:`check_excitation`'s warning for an ``order`` from :func:`excitation_order`: the input excites the
    window but less than ``past + horizon + n``. ``stacklevel`` as in :func:`warnings.warn`, counted from this
    function (2 = its caller)."""
    past, horizon = _check_window(past_steps, horizon_steps)
    required = required_order(past, horizon, n_states)
    if order < required:
        warnings.warn(ExcitationWarning(_message(order, False, required, past + horizon, past, horizon)),
                      stacklevel=stacklevel + 1)
