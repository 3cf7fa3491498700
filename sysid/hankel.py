"""Block-Hankel, multi-trial (mosaic) Hankel and Page matrices that respect trials and masks.

A window ``w`` of shape ``(T, c)`` is vectorised time-major, ``w.reshape(-1) = [w_0; w_1; ...; w_{T-1}]``, so the
rows of a depth-``L`` block-Hankel matrix are grouped in time blocks: block ``t`` is rows ``[t*c, (t+1)*c)``.

    H_L(w) = [ w_0      w_1    ...  w_{T-L}  ]
             [ w_1      w_2    ...  w_{T-L+1}]
             [ ...                            ]
             [ w_{L-1}  w_L    ...  w_{T-1}  ]          shape (c*L, T-L+1)

Every matrix here is built from strided views (:func:`numpy.lib.stride_tricks.sliding_window_view`): there is no
Python loop over columns, only over segments. The multi-trial forms concatenate per-segment blocks, with segments
from :meth:`Session.segments`, so no column spans a trial boundary or a masked sample.

:func:`row_space_factor` compresses a long data matrix exactly: it returns a lower-triangular ``F`` with
``H Hᵀ = F Fᵀ`` (``H = F Qᵀ`` with orthonormal ``Q``), computed segment by segment so the full matrix is never held.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from typing import Sequence

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from ._blas_threads import _single_blas_thread
from .exceptions import SessionError

__all__ = [
    "block_hankel",
    "page_matrix",
    "mosaic_hankel",
    "mosaic_page",
    "hankel_column_count",
    "session_hankel",
    "session_page",
    "row_space_factor",
    "combine_factors",
]


def _as_signal(w, name: str = "w") -> np.ndarray:
    arr = np.asarray(w, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise SessionError(
            f"{name} must be a 2-D time-major array (n_samples, n_channels); got shape {arr.shape}. "
            "Reshape it so that rows are samples."
        )
    return arr


def _check_depth(depth) -> int:
    if isinstance(depth, (bool, np.bool_)) or int(depth) != depth or int(depth) < 1:
        raise SessionError(f"the Hankel depth must be a whole number of samples >= 1; got {depth!r}.")
    return int(depth)


def _check_finite(w: np.ndarray, name: str, offset: int = 0) -> None:
    bad = ~np.isfinite(w)
    if bad.any():
        row = int(np.nonzero(bad.any(axis=1))[0][0]) + offset
        raise SessionError(
            f"{name} holds NaN or infinite values at sample {row}, inside a segment used for the Hankel matrix. "
            "Mark those samples invalid (mask) so that no column uses them."
        )


def _hankel_view(w: np.ndarray, depth: int) -> np.ndarray:
    """The (T-L+1, L, c) strided view whose row j is the window w[j:j+L]."""
    return sliding_window_view(w, depth, axis=0).transpose(0, 2, 1)


def block_hankel(w, depth: int) -> np.ndarray:
    """Block-Hankel matrix of depth ``depth`` of one contiguous signal.

    Parameters
    ----------
    w : array_like, shape (n_samples, n_channels)
        A contiguous, finite signal (one segment). A 1-D array is one channel.
    depth : int
        Number of time blocks per column, ``L >= 1``.

    Returns
    -------
    H : ndarray, shape (n_channels * depth, n_samples - depth + 1), float64
        Column ``j`` is ``w[j:j+depth].reshape(-1)`` (time-major).

    Raises
    ------
    SessionError
        If ``w`` is not 2-D, holds non-finite values, or is shorter than ``depth``.

    Examples
    --------
    >>> block_hankel(np.arange(4.0), 2)
    array([[0., 1., 2.],
           [1., 2., 3.]])
    """
    w = _as_signal(w)
    depth = _check_depth(depth)
    if w.shape[0] < depth:
        raise SessionError(
            f"a Hankel matrix of depth {depth} needs at least {depth} samples; got {w.shape[0]}. "
            "Use a smaller depth (shorter past window or horizon) or a longer segment."
        )
    _check_finite(w, "the signal")
    k = w.shape[0] - depth + 1
    return np.ascontiguousarray(_hankel_view(w, depth).reshape(k, depth * w.shape[1]).T)


def page_matrix(w, depth: int) -> np.ndarray:
    """Page matrix of depth ``depth``: like :func:`block_hankel` but with non-overlapping columns.

    Parameters
    ----------
    w : array_like, shape (n_samples, n_channels)
    depth : int

    Returns
    -------
    P : ndarray, shape (n_channels * depth, n_samples // depth)
        Column ``j`` is ``w[j*depth:(j+1)*depth].reshape(-1)``; trailing samples that do not fill a column are
        dropped.

    Raises
    ------
    SessionError
        As :func:`block_hankel`.

    References
    ----------
    Damen A.A.H., Van den Hof P.M.J., Hajdasinski A.K. (1982), "Approximate realization based on an input-output
    data set", Systems & Control Letters (the Page-matrix form of the data matrix).

    Examples
    --------
    >>> page_matrix(np.arange(5.0), 2)
    array([[0., 2.],
           [1., 3.]])
    """
    w = _as_signal(w)
    depth = _check_depth(depth)
    if w.shape[0] < depth:
        raise SessionError(
            f"a Page matrix of depth {depth} needs at least {depth} samples; got {w.shape[0]}. "
            "Use a smaller depth or a longer segment."
        )
    k = w.shape[0] // depth
    used = w[: k * depth]
    _check_finite(used, "the signal")
    return np.ascontiguousarray(used.reshape(k, depth * w.shape[1]).T)


def _check_segments(segments, n_samples: int) -> list[tuple[int, int]]:
    if segments is None:
        return [(0, n_samples)]
    out = []
    for seg in segments:
        a, b = (int(v) for v in seg)
        if not 0 <= a < b <= n_samples:
            raise SessionError(
                f"segment [{a}, {b}) is empty or outside the {n_samples} samples of the signal; segments must be "
                "half-open ranges inside it (use Session.segments())."
            )
        out.append((a, b))
    return out


def hankel_column_count(segments: Sequence[tuple[int, int]], depth: int, *, page: bool = False) -> int:
    """Number of columns of the mosaic Hankel (or Page) matrix of depth ``depth`` over ``segments``."""
    depth = _check_depth(depth)
    lengths = np.array([b - a for a, b in segments], dtype=np.int64)
    if page:
        return int((lengths // depth).sum())
    return int(np.clip(lengths - depth + 1, 0, None).sum())


def _mosaic(w, depth, segments, builder, kind):
    w = _as_signal(w)
    depth = _check_depth(depth)
    segments = _check_segments(segments, w.shape[0])
    used = [(a, b) for a, b in segments if b - a >= depth]
    if not used:
        longest = max(b - a for a, b in segments) if segments else 0
        raise SessionError(
            f"a {kind} matrix of depth {depth} needs a valid segment of at least {depth} samples; the longest "
            f"is {longest}. Shorten the past window or horizon, or record longer trials with fewer gaps."
        )
    for a, b in used:
        _check_finite(w[a:b], "the signal", offset=a)
    return np.concatenate([builder(w[a:b], depth) for a, b in used], axis=1)


def mosaic_hankel(w, depth: int, segments: Sequence[tuple[int, int]] | None = None) -> np.ndarray:
    """Multi-trial (mosaic) Hankel matrix: per-segment block-Hankel matrices side by side.

    Parameters
    ----------
    w : array_like, shape (n_samples, n_channels)
        The whole recording; samples outside ``segments`` are never read (they may be NaN).
    depth : int
    segments : sequence of (int, int), optional
        Half-open ranges ``[start, stop)`` of valid in-trial samples (e.g. ``Session.segments()``); segments
        shorter than ``depth`` contribute no column. Default: the whole signal as one segment.

    Returns
    -------
    H : ndarray, shape (n_channels * depth, n_columns)
        ``n_columns = sum(max(len_i - depth + 1, 0))``.

    Raises
    ------
    SessionError
        If no segment is long enough, a segment is outside the signal, or a used sample is not finite.

    References
    ----------
    van Waarde H.J., De Persis C., Camlibel M.K., Tesi P. (2020), "Willems' fundamental lemma for state-space
    systems and its extension to multiple datasets", IEEE Control Systems Letters 4:602.

    Examples
    --------
    >>> w = np.array([0.0, 1.0, 2.0, np.nan, 4.0, 5.0])
    >>> mosaic_hankel(w, 2, [(0, 3), (4, 6)])
    array([[0., 1., 4.],
           [1., 2., 5.]])
    """
    return _mosaic(w, depth, segments, block_hankel, "Hankel")


def mosaic_page(w, depth: int, segments: Sequence[tuple[int, int]] | None = None) -> np.ndarray:
    """Multi-trial Page matrix: per-segment Page matrices side by side (see :func:`mosaic_hankel`)."""
    return _mosaic(w, depth, segments, page_matrix, "Page")


def _session_signal(session, which: str) -> np.ndarray:
    if which == "u":
        return np.asarray(session.u)
    if which == "y":
        return np.asarray(session.y)
    if which == "uy":
        return np.concatenate([session.u, session.y], axis=1)
    raise SessionError(f"which must be 'u', 'y' or 'uy'; got {which!r}.")


def session_hankel(session, depth: int, *, which: str = "u") -> np.ndarray:
    """Mosaic Hankel matrix of a session's inputs (``"u"``), outputs (``"y"``) or both per sample (``"uy"``).

    Columns come only from ``session.segments(depth)``: never across a trial boundary or a masked sample.
    With ``"uy"`` each time block holds ``[u_t; y_t]`` (``n_inputs + n_outputs`` rows).
    """
    depth = _check_depth(depth)
    return mosaic_hankel(_session_signal(session, which), depth, session.segments(1))


def session_page(session, depth: int, *, which: str = "u") -> np.ndarray:
    """Mosaic Page matrix of a session (see :func:`session_hankel`)."""
    depth = _check_depth(depth)
    return mosaic_page(_session_signal(session, which), depth, session.segments(1))


def _r_factor(M: np.ndarray) -> np.ndarray:
    """Upper-triangular R of the economic QR of ``M`` (k, c); shape (min(k, c), c).

    LAPACK's ``geqrf`` through SciPy, with its optimal workspace: the same R as ``numpy.linalg.qr(M, mode="r")``,
    but SciPy releases the GIL during the factorisation (NumPy's does not), so factorisations on worker threads
    run side by side.
    """
    from scipy.linalg import lapack

    M = np.asarray(M, dtype=np.float64)
    k, c = M.shape
    if k == 0 or c == 0:
        return np.zeros((min(k, c), c))
    geqrf, = lapack.get_lapack_funcs(("geqrf",), (M,))
    lwork = int(geqrf(M, lwork=-1)[2][0])
    qr, _tau, _work, info = geqrf(M, lwork=max(lwork, 1))
    if info != 0:  # pragma: no cover - only for invalid arguments
        raise np.linalg.LinAlgError(f"LAPACK geqrf failed (info={info})")
    return _zero_below(qr if k <= c else np.array(qr[:c], order="F"))


def _zero_below(R: np.ndarray) -> np.ndarray:
    """``R`` with its entries below the diagonal set to zero, in place, a column at a time (contiguous in the
    Fortran order LAPACK returns): ``numpy.triu`` would build a mask and a copy of ``R``'s size (0.22 s for a
    2,350 × 3,450 factor, a trial's at past 100 / horizon 50, against milliseconds here)."""
    for j in range(min(R.shape[0], R.shape[1]) - 1):
        R[j + 1:, j] = 0.0
    return R


def combine_factors(factors: Sequence[np.ndarray], n_rows: int, own_first: bool = False) -> np.ndarray:
    """Combine row-space factors of column blocks into the factor of the blocks side by side.

    If ``H_i H_iᵀ = F_i F_iᵀ`` then ``[H_1 H_2 ...]`` has the factor ``F`` with ``F Fᵀ = Σ F_i F_iᵀ``; it is
    obtained from a QR of the stacked ``F_iᵀ`` (no normal equations, so no squared condition number). Lower
    triangular or trapezoidal factors (as :func:`row_space_factor` and this function give) are folded in one by one
    by LAPACK's ``tpqrt`` with a trapezoidal pentagon (:func:`_merge_r`): ``(2/3) n³`` flops for a square one
    instead of the stacked QR's ``(10/3) n³`` per pair (benchmarks/README.md, sixteenth session).

    Parameters
    ----------
    factors : sequence of ndarray, each shape (n_rows, r_i)
    n_rows : int
        Rows of the data matrix (used when ``factors`` is empty: the result then has 0 columns).
    own_first : bool, default False
        The first factor is the caller's to overwrite: where it is square, C-ordered and lower triangular, the
        merge is made in its memory (no copy of its size) and it no longer holds its own factor.

    Returns
    -------
    F : ndarray, shape (n_rows, min(n_rows, Σ r_i)); lower triangular when combined (a single factor is
        returned as given).
    """
    parts = [f.T for f in factors if f.shape[1]]
    if not parts:
        return np.zeros((n_rows, 0))
    if len(parts) == 1:
        return np.ascontiguousarray(parts[0].T)
    if sum(q.shape[0] for q in parts) >= n_rows and all(q.shape[0] <= n_rows and _is_lower(q.T) for q in parts):
        # C-ordered (R is Fortran), exactly lower triangular: tpqrt leaves R's zeros below
        return _merge_r(parts, own_first).T
    return np.ascontiguousarray(_r_factor(np.concatenate(parts, axis=0)).T)


def _is_lower(F: np.ndarray, block: int = 256) -> bool:
    """Whether ``F`` (square, or ``n × k`` with ``k ≤ n``) is zero above its diagonal (by block rows: no temporary
    of its size)."""
    n = F.shape[0]
    for i0 in range(0, min(n, F.shape[1]), block):
        i1 = min(i0 + block, n)
        if F[i0:i1, i1:].any() or np.triu(F[i0:i1, i0:i1], 1).any():  # no copy of the block row: views reduced
            return False
    return True


def _fill_columns(buf: np.ndarray, sigs, c0: int, depth: int, to=None) -> None:
    """Columns ``[c0, c0 + k)`` of the stacked data matrix ``[H_L(sigs[0]); H_L(sigs[1]); ...]`` into ``buf``
    (``n_rows × k``, C order, so ``buf.T`` is the Fortran-ordered ``k × n_rows`` block LAPACK reads without a copy).

    One transposed copy of the chunk's samples per signal, then one contiguous row copy per time block (NumPy's
    plain copies release the GIL, so the workers of :func:`row_space_factor` fill their chunks side by side).
    """
    k, row = buf.shape[1], 0
    for s in sigs:
        c = s.shape[1]
        sT = np.ascontiguousarray(s[c0: c0 + k + depth - 1].T)
        for t in range(depth):
            buf[_rows_to(to, row + t * c, c)] = sT[:, t: t + k]
        row += depth * c


def _rows_to(to, r: int, c: int):
    """Where rows ``[r, r + c)`` of the stacked data go: themselves or ``to[r:r + c]`` (a slice if consecutive)."""
    if to is None:
        return slice(r, r + c)
    dest = to[r:r + c]
    return slice(int(dest[0]), int(dest[0]) + c) if np.array_equal(dest, dest[0] + np.arange(c)) else dest


def _stream_r(sigs, spans, depth: int, n_rows: int, step: int, to=None) -> np.ndarray:
    """Upper-triangular ``R`` (``n_rows × n_rows``, Fortran order) with ``RᵀR = Σ_chunks MᵀM`` over the chunks
    ``M`` (columns of the data matrix as rows) of ``spans``: each chunk is folded into ``R`` by LAPACK's
    triangular-pentagonal QR (``tpqrt``), which costs ``2 k n²`` for ``k`` columns, as a QR of the chunk alone,
    without refactoring ``R`` itself (a QR of ``[R; M]`` would cost ``2 (n + k) n²``)."""
    from ._lapack_nogil import tpqrt_inplace

    R = np.zeros((n_rows, n_rows), order="F")
    flat = np.empty(n_rows * step)
    nb = min(n_rows, 64)
    for c0, c1 in spans:
        k = c1 - c0 - depth + 1
        buf = flat[: n_rows * k].reshape(n_rows, k)
        _fill_columns(buf, sigs, c0, depth, to)
        R = tpqrt_inplace(R, buf.T, 0, nb)  # the GIL is released inside: the workers run side by side
    return R


def _merge_r(parts, own_first: bool = False) -> np.ndarray:
    """``R`` (``n × n``) with ``RᵀR = Σ R_iᵀR_i`` of upper-trapezoidal parts (``k_i × n``, ``k_i ≤ n``, exactly zero
    below their diagonals, as ``_stream_r``'s and :func:`combine_factors`' checked ones are; the first copied unless
    ``own_first``), each folded in by ``tpqrt`` with a trapezoidal pentagon (``O(k_i n²)``)."""
    from ._lapack_nogil import tpqrt_inplace

    n = parts[0].shape[1]
    if own_first and parts[0].shape == (n, n) and parts[0].flags.f_contiguous:
        R = parts[0]  # the caller's own array (row_space_factor's workers): overwritten, no copy of its size
    else:
        R = np.zeros((n, n), order="F")
        R[:parts[0].shape[0]] = parts[0]
    for other in parts[1:]:
        R = tpqrt_inplace(R, np.array(other, order="F"), other.shape[0], min(n, 64))  # a copy: tpqrt overwrites B
    return R


def _spans(segments, depth: int, step: int) -> list[tuple[int, int]]:
    """Sample ranges ``[c0, c1)`` of at most ``step`` columns each (``c1 − c0 − depth + 1`` columns)."""
    return [(c0, min(c0 + step + depth - 1, b)) for a, b in segments for c0 in range(a, b - depth + 1, step)]


def row_space_factor(blocks, depth: int, segments: Sequence[tuple[int, int]] | None = None,
                     *, max_columns: int = 4096, n_workers: int | None = None,
                     row_order: np.ndarray | None = None) -> tuple[np.ndarray, int]:
    """Exact compression of a (mosaic) data matrix to its row-space factor, without forming the whole matrix.

    The data matrix stacks the depth-``depth`` mosaic Hankel matrices of the signals in ``blocks``,
    ``H = [H_L(blocks[0]); H_L(blocks[1]); ...]``. The result ``F`` is lower triangular with ``H = F Qᵀ`` for some
    ``Q`` with orthonormal columns (an LQ factorisation), so ``H Hᵀ = F Fᵀ`` and every quadratic function of
    ``H g`` over ``g`` can be written in ``h = Qᵀ g`` with ``F`` in place of ``H``.

    Parameters
    ----------
    blocks : sequence of array_like, each shape (n_samples, c_i)
        Signals on a common sample grid (e.g. ``[u, y]``).
    depth : int
    segments : sequence of (int, int), optional
        Valid segments (default: the whole grid); shorter ones are skipped.
    max_columns : int, default 4096
        Columns assembled at once (fewer for tall matrices: at most about 4 M floats, 32 MB, per chunk); bounds
        the working memory to one chunk and one ``n_rows × n_rows`` factor per worker.
    n_workers : int, optional
        Threads (default: the CPU count). The chunks are cut into this many contiguous groups, reduced side by
        side and merged in group order: the numbers depend on the worker count, not on the timing.
    row_order : ndarray of int, optional
        A permutation of the rows: the factor of ``H[row_order]`` (lower triangular in that order), the rows
        written in that order as the chunks are filled (a permuted factor of ``H`` would need another QR to be
        triangular again).

    Returns
    -------
    F : ndarray, shape (n_rows, min(n_rows, n_columns)), with ``n_rows = depth * Σ c_i``.
    n_columns : int
        Columns of the (never formed) data matrix.

    Raises
    ------
    SessionError
        As :func:`mosaic_hankel`.

    Notes
    -----
    Tall-skinny QR: each worker folds its chunks of columns into one triangular factor by triangular-pentagonal QR
    steps (LAPACK ``tpqrt``: ``2 k n²`` flops per chunk of ``k`` columns, the cost of a QR of the chunk alone), so
    the whole build costs one QR of the data split over the workers, plus one ``O(n³)`` merge per extra worker.
    LAPACK runs with the GIL released (:mod:`._lapack_nogil`: SciPy's own ``tpqrt`` wrapper holds it), so the
    workers run side by side. With fewer columns than rows the columns are
    gathered and factored at once (they are fewer than ``n_rows``).

    References
    ----------
    Golub G.H., Van Loan C.F. (2013), Matrix Computations, 4th ed., section 5.2 (QR factorisation).
    Demmel J., Grigori L., Hoemmen M., Langou J. (2012), "Communication-optimal parallel and sequential QR and LU
    factorizations", SIAM Journal on Scientific Computing 34:A206 (tall-skinny QR).
    """
    sigs = [_as_signal(b, f"blocks[{i}]") for i, b in enumerate(blocks)]
    n = sigs[0].shape[0]
    if any(s.shape[0] != n for s in sigs):
        raise SessionError(f"all signals must have the same number of samples; got {[s.shape[0] for s in sigs]}.")
    depth = _check_depth(depth)
    segments = _check_segments(segments, n)
    n_rows = depth * sum(s.shape[1] for s in sigs)
    total = hankel_column_count(segments, depth)
    if total == 0:
        longest = max((b - a for a, b in segments), default=0)
        raise SessionError(
            f"a data matrix of depth {depth} needs a valid segment of at least {depth} samples; the longest is "
            f"{longest}. Shorten the past window or horizon, or record longer trials with fewer gaps."
        )
    for a, b in segments:
        if b - a >= depth:
            for s in sigs:
                _check_finite(s[a:b], "the signal", offset=a)
    to = None
    if row_order is not None:
        row_order = np.asarray(row_order)
        if row_order.shape != (n_rows,) or not np.array_equal(np.sort(row_order), np.arange(n_rows)):
            raise ValueError(f"row_order must be a permutation of the {n_rows} rows")
        to = np.empty(n_rows, dtype=np.int64)
        to[row_order] = np.arange(n_rows)
    if total < n_rows:  # fewer columns than rows: all of them are fewer than one factor
        chunk = np.concatenate([np.concatenate([block_hankel(s[a:b], depth).T for s in sigs], axis=1)
                                for a, b in segments if b - a >= depth], axis=0)
        return np.ascontiguousarray(_r_factor(chunk if row_order is None else chunk[:, row_order]).T), total
    step = max(1, min(int(max_columns), max(64, 2 ** 22 // n_rows)))
    spans = _spans(segments, depth, step)
    n_groups = max(1, min(n_workers or os.cpu_count() or 1, len(spans)))
    edges = np.linspace(0, len(spans), n_groups + 1).round().astype(int)
    groups = [spans[edges[g]:edges[g + 1]] for g in range(n_groups)]
    with _single_blas_thread():
        if n_groups == 1:
            parts = [_stream_r(sigs, groups[0], depth, n_rows, step, to)]
        else:
            with ThreadPoolExecutor(max_workers=n_groups, thread_name_prefix="stimsteer-qr") as pool:
                parts = list(pool.map(lambda g: _stream_r(sigs, g, depth, n_rows, step, to), groups))
        R = _merge_r(parts, own_first=True)
    return np.ascontiguousarray(_zero_below(R).T), total
