"""Sums and lag products of lagged sample vectors, streamed chunk by chunk from a session.

For samples ``Z_t`` (rows of a ``(T × c)`` signal) and rows ``k`` of a piece, the Gram of the lagged vectors
``w_k = [Z_k; Z_{k-1}; ...; Z_{k-L}]`` has blocks ``sum_k Z_{k-a} Z_{k-b}ᵀ`` that depend on ``b - a`` up to a few
edge samples: one product of two ``(n × c)`` matrices per lag difference per chunk, instead of one product of the
``(n × c(L+1))`` lagged design; for long lagged vectors the same sums come from short FFTs (:mod:`._lag_spectra`),
whose cost per row hardly grows with ``L``. Ridge ARX (the regression Gram) and subspace identification (the
block-Hankel Gram, whose columns are the same lagged vectors in reversed order) both use it.
"""

from __future__ import annotations

import functools
import inspect
import os

import numpy as np
from numpy.lib.stride_tricks import as_strided

# blas_*: imported from here by the package's other modules
from ._blas_threads import _parallel_pass, _single_threaded_blas, blas_controller, blas_thread_count, blas_threads  # noqa: F401
from ._lag_spectra import spectral_products, uses_spectra

# ------------------------------------------------------------------------------------------------ sufficient stats
class _Moments:
    """Row count, sums and Gram of the full lagged vector ``w_k = [Z_k; Z_{k-1}; ...; Z_{k-L}]`` (float64)."""

    def __init__(self, size: int):
        self.n = 0
        self.s = np.zeros(size)
        self.W = np.zeros((size, size))

    def add(self, n, s, W):
        self.n += n
        self.s += s
        self.W += W

    def minus(self, other: "_Moments") -> "_Moments":
        out = _Moments(self.s.size)
        out.n, out.s, out.W = self.n - other.n, self.s - other.s, self.W - other.W
        return out


#: Rows of a chunk multiplied at a time, for every lag, while they stay in cache: with 72 channels and 5 or 10 lags,
#: one thread's products ran at 44 GF/s in blocks of 2,048–4,096 rows against 36–40 GF/s over 16,384 rows at once
#: (this machine's ``dgemm`` peak: about 49 GF/s per core); with 23 channels and 150 lags alike (22 GF/s).
_BLOCK_ROWS = 4096


def _chunk_products(B: np.ndarray, n_lags: int, spectra: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Sums and lag products over the rows of one chunk, without building the lagged design.

    Parameters
    ----------
    B : ndarray, shape (L + n, c)
        Samples ``Z``: the ``L`` samples before the chunk's first row, then its ``n`` rows.
    n_lags : int
        ``L``, the longest lag.
    spectra : bool, default True
        Whether long lagged vectors may take the FFT route; False keeps the direct products, whose rounding bound
        (``γ_n`` per entry) a caller may rely on.

    Returns
    -------
    S : ndarray, shape (c,)
        ``sum_t Z_t`` over the chunk's rows.
    X : ndarray, shape (L + 1, c, c)
        ``X[δ] = sum_t Z_t Z_{t-δ}ᵀ`` over the chunk's rows ``t`` (``Z_{t-δ}`` may lie in the lead-in): one
        product of two ``(n × c)`` matrices per lag difference (in blocks of :data:`_BLOCK_ROWS` rows, every lag of a
        block before the next block); for long lagged vectors (:func:`_lag_spectra.uses_spectra`), by short FFTs
        instead (:func:`_lag_spectra.spectral_products`, the same sums to rounding).
    """
    L = n_lags
    n, c = B.shape[0] - L, B.shape[1]
    if n > 0 and spectra and uses_spectra(L, c):  # long windows: short FFTs, a few c² per row whatever L
        return B[L:].sum(axis=0), spectral_products(B, L)
    X = np.empty((L + 1, c, c)) if n > 0 else np.zeros((L + 1, c, c))
    part = np.empty((c, c)) if n > _BLOCK_ROWS else None
    for k0 in range(0, n, _BLOCK_ROWS):  # one block of rows, every lag, while it is in cache
        k1 = min(n, k0 + _BLOCK_ROWS)
        rows = B[L + k0: L + k1]
        for delta in range(L + 1):
            lagged = B[L - delta + k0: L - delta + k1]
            if k0 == 0:
                np.matmul(rows.T, lagged, out=X[delta])
            else:
                np.matmul(rows.T, lagged, out=part)
                X[delta] += part
    return B[L:].sum(axis=0), X


def _chunks(pieces, chunk_rows: int):
    """``(k0, k1, fold, first, last)`` for consecutive row ranges of at most ``chunk_rows`` inside each piece."""
    for a, b, f in pieces:
        for k0 in range(a, b, chunk_rows):
            k1 = min(b, k0 + chunk_rows)
            yield k0, k1, f, k0 == a, k1 == b


def _reads_into(session) -> bool:
    """Whether the source's ``read`` takes ``out=`` (Session and SessionFile do; others need only ``read(start,
    stop)``); a method's signature is read once per function (once per chunk took 0.14 s of the demo's bench)."""
    read = getattr(session, "read", None)
    func = getattr(read, "__func__", None)
    return _takes_out(func) if func is not None else _takes_out.__wrapped__(read)


@functools.lru_cache(maxsize=64)
def _takes_out(read) -> bool:
    try:
        return "out" in inspect.signature(read).parameters
    except (TypeError, ValueError):
        return False


def _read_z(session, start: int, stop: int, shift: np.ndarray | None = None, buffer: np.ndarray | None = None,
            with_range: bool = True):
    """Samples ``[start, stop)`` as ``Z = [y u] − shift`` (float64) and the raw inputs' range ``(min, max)`` (None
    without ``with_range``: a pass that does not report the range skips its copy and reductions).

    ``Z`` is a fresh array, or the leading rows of ``buffer`` when given (re-using buffers spares the page faults of
    fresh allocations); the shift is subtracted while copying.
    """
    p = session.n_outputs
    Z = np.empty((stop - start, p + session.n_inputs)) if buffer is None else buffer[: stop - start]
    if _reads_into(session):
        u, _y, _mask = session.read(start, stop, out=(Z[:, p:], Z[:, :p]))
    else:
        u, y, _mask = session.read(start, stop)
        Z[:, :p], Z[:, p:] = y, u
    if not with_range:
        rng = None
    elif u.shape[0]:  # min and max along contiguous rows of a transposed copy: ~5x faster than down strided columns
        ut = np.ascontiguousarray(u.T)
        rng = (ut.min(axis=1), ut.max(axis=1))
    else:
        rng = (np.full(u.shape[1], np.inf), np.full(u.shape[1], -np.inf))
    if shift is not None:
        Z -= shift
    return Z, rng


# ------------------------------------------------------------------------------------------------ Gram from windows
class _LagSums:
    """Lag products of a set of pieces, kept compact: the Gram of their lagged vectors is assembled on demand.

    ``S`` and ``X[δ]`` sum ``Z_t`` and ``Z_t Z_{t-δ}ᵀ`` over the ``n`` rows ``t`` of every chunk (one product of two
    ``(n × c)`` matrices per lag difference, :func:`_chunk_products`). Block ``(a, a + δ)`` of the Gram of the
    lagged vectors over the pieces' rows ``[r0, r1)`` is the same sum with its window shifted back by ``a``: plus
    the ``a`` terms before ``r0``, minus the ``a`` terms before ``r1`` (the edge terms). Instead of the edge terms
    (one Gram-sized array per fold), the ``L`` samples before each piece's first row (sign +1) and its last ``L``
    samples (sign −1) are kept, ``L × c`` each: the Gram of any union or difference of folds is then assembled from
    these sums alone (:func:`_lagged_gram`), so the memory held per fold does not grow with the Gram."""

    def __init__(self, c: int, n_lags: int):
        self.n = 0
        self.S = np.zeros(c)
        self.X = np.zeros((n_lags + 1, c, c))
        self.windows: list = []  # (sign, samples (L, c))

    def plus(self, other: "_LagSums", sign: float = 1.0) -> "_LagSums":
        """``self + sign · other`` (a difference of folds is a sum with the other's windows sign-flipped)."""
        out = _LagSums(self.S.size, self.X.shape[0] - 1)
        out.n = self.n + int(sign) * other.n
        out.S = self.S + sign * other.S
        out.X = self.X + sign * other.X
        out.windows = self.windows + [(sign * s, w) for s, w in other.windows]
        return out

    def lagged_sums(self) -> np.ndarray:
        """``sum_k w_k`` of the full lagged vector over the rows."""
        Lp1, c = self.X.shape[0], self.X.shape[1]
        # sum_k Z_{k-a} = S + Σ_windows sign Σ_{j=1}^{a} W[L-j]
        e = np.zeros((Lp1, c))
        for sign, w in self.windows:
            e[1:] += sign * np.cumsum(w[::-1], axis=0)
        return (self.S[None, :] + e).reshape(-1)

    def moments(self) -> _Moments:
        """Row count, sums and Gram of the full lagged vector ``w_k = [Z_k; ...; Z_{k-L}]`` over the rows."""
        out = _Moments(self.X.shape[0] * self.X.shape[1])
        out.n = self.n
        out.s = self.lagged_sums()
        out.W = _lagged_gram(self)
        return out

    def lazy_moments(self) -> "_LazyMoments":
        """The moments with the Gram assembled each time it is asked for (memory: the compact sums only)."""
        return _LazyMoments(self)


class _LazyMoments:
    """Row count and sums of a fold's lagged vectors; its Gram ``W`` assembled from the compact sums on each access
    (a fold held this way costs ``(L + 1) c²`` numbers instead of ``((L + 1) c)²``)."""

    def __init__(self, sums: _LagSums):
        self.sums = sums
        self.n = sums.n
        self.s = sums.lagged_sums()

    @property
    def W(self) -> np.ndarray:
        return _lagged_gram(self.sums)


def _edge_correction(windows, n_lags: int, c: int):
    """Yield, for ``δ = 0 … L``, ``C[δ]`` with ``C[δ][a - 1] = Σ_windows sign Σ_{j=1}^{a} W[L-j] W[L-j-δ]ᵀ``, the edge
    term of Gram block ``(a, a + δ)``.

    A window ``W`` holds the ``L`` samples ending at a piece edge; the sum over ``j`` is a cumulative sum, and the
    sum over windows one batched product per ``δ``: ``O(L² c² × windows)`` work, not ``O(L³ c²)``. One ``δ`` at a
    time, so the terms held never exceed one lag's ``L × c × c`` (all at once they were ``L²/2 × c²``: 48 MB at
    150 lags of 23 channels). Each ``C[δ]`` is written into one buffer, reused: it is valid until the next one is
    asked for (a fresh array per ``δ`` cost page faults: at 150 lags of 23 channels and 50 windows the terms took
    0.068 s that way and 0.040 s in one buffer, the same numbers bit for bit).
    """
    L = n_lags
    if not windows or L == 0:
        for d in range(L + 1):
            yield np.zeros((L - d, c, c))
        return
    R = np.stack([w[::-1] for _s, w in windows])  # R[:, j - 1] = W[L - j]
    signs = np.array([s for s, _w in windows])
    Rs = R * signs[:, None, None]
    buffer = np.empty((L, c, c))
    for d in range(L + 1):
        if d == L:
            yield np.zeros((0, c, c))
            continue
        # Q[j] = Σ_w sign R_w[j] R_w[j + d]ᵀ, j = 0 … L - d - 1, as a batch of (c × w)(w × c) products (these
        # operands as they are: laid out contiguously, NumPy may take another kernel, whose last digits differ)
        Q = buffer[: L - d]
        np.matmul(Rs[:, : L - d].transpose(1, 2, 0), R[:, d:].transpose(1, 0, 2), out=Q)
        np.cumsum(Q, axis=0, out=Q)
        yield Q


def _index_rectangles(index: np.ndarray) -> list[tuple[int, int, int, int, int, int]]:
    """``index`` (shape ``(L + 1, c)``) as rectangles ``(a0, a1, i0, i1, start, stride)`` with
    ``index[a, i] = start + (a − a0) · stride + (i − i0)`` for ``a0 ≤ a < a1``, ``i0 ≤ i < i1``: runs of
    consecutive rows per lag block, joined over lags while their starts step evenly. The identity is one
    rectangle; the Hankel data matrix's row order (:func:`~stimsteer.sysid.datadriven.gram.hankel_permutation`)
    four."""
    rects, open_ = [], {}
    for a, row in enumerate(np.asarray(index)):
        cuts = np.flatnonzero(np.diff(row) != 1) + 1
        for i0, i1 in zip(np.r_[0, cuts], np.r_[cuts, row.size]):
            key, start = (int(i0), int(i1)), int(row[i0])
            r = open_.get(key)
            if r is not None and r[1] == a and (r[1] - r[0] == 1 or start - r[4] == (a - r[0]) * r[5]):
                stride = start - r[4] if r[1] - r[0] == 1 else r[5]
                r[1], r[5] = a + 1, stride
            else:
                r = [a, a + 1, key[0], key[1], start, 0]
                rects.append(r)
                open_[key] = r
    return [tuple(r) for r in rects]


def _clip_rectangles(rects, r0: int, r1: int) -> list[tuple[int, int, int, int, int, int]]:
    """The parts of ``rects`` whose rows lie in ``[r0, r1)``, with their starts shifted by ``−r0``: the lags whose
    whole run lies inside keep one rectangle, a lag whose run crosses an edge keeps its rows inside as its own."""
    out = []
    for a0, a1, i0, i1, start, stride in rects:
        inside = []
        for a in range(a0, a1):
            s0 = start + (a - a0) * stride
            lo, hi = max(i0, i0 + r0 - s0), min(i1, i0 + r1 - s0)
            if lo < hi:
                inside.append((a, lo, hi, s0 + lo - i0 - r0))
        whole = [t for t in inside if (t[1], t[2]) == (i0, i1)]
        if whole:  # consecutive lags (the starts are monotone in a)
            out.append((whole[0][0], whole[-1][0] + 1, i0, i1, whole[0][3], stride))
        out.extend((a, a + 1, lo, hi, s, 0) for a, lo, hi, s in inside if (lo, hi) != (i0, i1))
    return out


def _write_blocks(W: np.ndarray, rects_a, rects_ad, blocks: np.ndarray, d: int, transposed: bool) -> None:
    """``W[index[a], index[a + d]] = blocks[a]`` (or its transpose at ``W[index[a + d], index[a]]``) for every
    ``a``, with lag ``a``'s rows in ``rects_a`` and lag ``a + d``'s in ``rects_ad``: one strided copy per pair of
    rectangles instead of a scatter of single entries."""
    N, item = W.shape[1], W.itemsize
    flat = W.reshape(-1)
    for aa0, aa1, ai0, ai1, astart, astride in rects_a:
        for ca0, ca1, ci0, ci1, cstart, cstride in rects_ad:
            lo, hi = max(aa0, ca0 - d), min(aa1, ca1 - d)
            if lo >= hi:
                continue
            r, c = astart + (lo - aa0) * astride, cstart + (lo + d - ca0) * cstride
            src = blocks[lo:hi, ai0:ai1, ci0:ci1]
            step = astride * N + cstride
            if transposed:
                r, c, step, src = c, r, cstride * N + astride, src.transpose(0, 2, 1)
            view = as_strided(flat[r * N + c:], shape=src.shape, strides=(step * item, N * item, item))
            view[...] = src


def _lagged_gram(sums: _LagSums, index: np.ndarray | None = None, rows: tuple[int, int] | None = None,
                 average_same_lag: bool = False, fortran: bool = False, out: np.ndarray | None = None) -> np.ndarray:
    """Gram of the lagged vectors ``w_k = [Z_k; Z_{k-1}; ...; Z_{k-L}]`` over the rows of ``sums``.

    Block ``(a, a + δ)`` is ``X[δ] + C[δ][a - 1]`` (``a ≥ 1``; :func:`_edge_correction`), block ``(0, δ)`` is
    ``X[δ]``; the lower blocks are the transposes. With ``index`` (a permutation, shape ``(L + 1, c)``), entry
    ``(a, i)`` of the lagged vector is row ``index[a, i]`` of the result, with no second Gram-sized copy; with
    ``rows = (r0, r1)`` only those rows (the same numbers); with ``average_same_lag`` the blocks ``(a, a)`` are
    averaged with their transposes. Written as strided copies over the rectangles of ``index``
    (:func:`_index_rectangles`; short vectors: :data:`_SMALL_ASSEMBLY`). With ``fortran`` the rows come
    Fortran-ordered: written as the columns ``[r0, r1)`` of a C-ordered array (the Gram is symmetric; every block
    below the diagonal is written as the exact transpose of the one above, the same-lag blocks as they are). With
    ``out`` (a flat float64 array of at least the result's size) the result is written into its front and returned
    as a view of it: a buffer already touched spares a fresh Gram-sized array's first-touch page faults."""
    Lp1, c = sums.X.shape[0], sums.X.shape[1]
    r0, r1 = (0, Lp1 * c) if rows is None else (int(rows[0]), int(rows[1]))
    order = None if index is None or Lp1 * c > _SMALL_ASSEMBLY else _small_order(np.asarray(index).reshape(-1))
    if Lp1 * c <= _SMALL_ASSEMBLY and (index is None or order is not None):
        W = _small_lagged_gram(sums, average_same_lag, None if index is None else np.asarray(index))
        W = W if (r0, r1) == (0, Lp1 * c) else W[r0:r1].copy()
        W = np.asfortranarray(W) if fortran else W
        if out is None:
            return W
        into = out[:W.size].reshape(W.shape[::-1] if fortran else W.shape)
        into[...] = W.T if fortran else W
        return into.T if fortran else into
    if index is None:
        index = np.arange(Lp1 * c).reshape(Lp1, c)
    full = _rectangles(index.shape, np.asarray(index, dtype=np.int64).tobytes())
    clipped = full if (r0, r1) == (0, Lp1 * c) else _clip_rectangles(full, r0, r1)
    shape = (Lp1 * c, r1 - r0) if fortran else (r1 - r0, Lp1 * c)
    W = np.empty(shape) if out is None else out[:shape[0] * shape[1]].reshape(shape)
    rows_cols = (full, clipped) if fortran else (clipped, full)
    for d, blocks in enumerate(_gram_blocks(sums, average_same_lag)):
        _write_blocks(W, *rows_cols, blocks, d, False)
        if d:
            _write_blocks(W, *rows_cols[::-1], blocks, d, True)
    return W.T if fortran else W


#: Grams of lagged vectors up to this length are assembled in lagged order by fancy-indexed copies, then permuted
#: and cut to ``rows`` by one more (:func:`_small_lagged_gram`): the numbers of the strided block copies, without
#: their per-block Python work. Longer ones by strided copies over the rectangles of the index.
_SMALL_ASSEMBLY = 1024


def _gram_blocks(sums: _LagSums, average_same_lag: bool):
    """Yield, for ``δ = 0 … L``, the Gram blocks ``(a, a + δ)`` of every ``a`` as one ``(L + 1 − δ, c, c)`` array:
    ``X[δ]``, plus the edge term ``C[δ][a − 1]`` for ``a ≥ 1`` (the same-lag blocks averaged with their transposes
    with ``average_same_lag``). Written into one buffer, reused (as :func:`_edge_correction`'s terms): each array
    is valid until the next one is asked for."""
    Lp1, c = sums.X.shape[0], sums.X.shape[1]
    buffer = np.empty((Lp1, c, c))
    for d, corr in enumerate(_edge_correction(sums.windows, Lp1 - 1, c)):
        blocks = buffer[: Lp1 - d]
        blocks[...] = sums.X[d]
        blocks[1:] += corr
        del corr
        if d == 0 and average_same_lag:
            blocks = 0.5 * (blocks + blocks.transpose(0, 2, 1))
        yield blocks


def _small_lagged_gram(sums: _LagSums, average_same_lag: bool, index: np.ndarray | None = None) -> np.ndarray:
    """:func:`_lagged_gram`, whole, for short lagged vectors: the blocks of each ``δ`` written by two fancy-indexed
    copies (the same numbers as the strided block copies, without their per-block Python work), in lagged order or
    straight to the rows and columns of ``index`` (a permutation)."""
    Lp1, c = sums.X.shape[0], sums.X.shape[1]
    lags = np.arange(Lp1)
    G = np.empty((Lp1, c, Lp1, c) if index is None else (Lp1 * c, Lp1 * c))
    for d, blocks in enumerate(_gram_blocks(sums, average_same_lag)):
        if index is None:
            G[lags[: Lp1 - d], :, lags[d:], :] = blocks
            if d:
                G[lags[d:], :, lags[: Lp1 - d], :] = blocks.transpose(0, 2, 1)
            continue
        r, q = index[: Lp1 - d], index[d:]
        G[r[:, :, None], q[:, None, :]] = blocks
        if d:
            G[q[:, :, None], r[:, None, :]] = blocks.transpose(0, 2, 1)
    return G.reshape(Lp1 * c, Lp1 * c)


def _small_order(index: np.ndarray) -> np.ndarray | None:
    """``order`` with ``order[index[k]] = k``, or None when ``index`` is not a permutation of ``0 … n − 1``."""
    if index.size and (index.min() < 0 or index.max() >= index.size):
        return None
    order = np.full(index.size, -1, dtype=np.intp)
    order[index] = np.arange(index.size)
    return order if index.size == 0 or order.min() >= 0 else None


@functools.lru_cache(maxsize=64)
def _rectangles(shape: tuple, index_bytes: bytes) -> list:
    """:func:`_index_rectangles` of an index given by its shape and int64 bytes, cached: the same few layouts are
    assembled again and again (every fold, every fit of a sweep)."""
    return _index_rectangles(np.frombuffer(index_bytes, dtype=np.int64).reshape(shape))


def _lagged_diagonal(sums: _LagSums) -> np.ndarray:
    """The diagonal of :func:`_lagged_gram` (lagged order), from the sums alone: ``X[0] + C[0][a − 1]``'s."""
    Lp1, c = sums.X.shape[0], sums.X.shape[1]
    d = np.tile(np.diagonal(sums.X[0]), (Lp1, 1))
    d[1:] += np.diagonal(next(_edge_correction(sums.windows, Lp1 - 1, c)), axis1=1, axis2=2)
    return d.reshape(-1)


def _window_task(B: np.ndarray, n_lags: int, first: bool, last: bool, spectra: bool = True):
    """Worker task: the chunk's sums and products, and the edge windows of its piece when it starts or ends one."""
    S, X = _chunk_products(B, n_lags, spectra)
    start = B[:n_lags].copy() if first else None
    end = B[B.shape[0] - n_lags:].copy() if last else None
    return S, X, start, end


def _stream_sums(session, pieces, n_folds: int, n_lags: int, chunk_rows: int, shift: np.ndarray):
    """One pass over the pieces: the compact sums of each fold (:class:`_LagSums`) and the raw inputs' range.

    ``Z = [y u] − shift`` (a shift near the mean keeps the sums accurate); see :func:`_stream_lag_sums`.
    """
    from ._progress import progress

    with progress(sum(b - a for a, b, _f in pieces), "lag products", unit="sample") as bar:
        return _stream_lag_sums(session, pieces, n_folds, n_lags, chunk_rows, bar.update, shift=shift,
                                with_range=True)


#: Multiply-adds of a pass's lag products (rows × lags × channels²) from which it runs on two worker threads even
#: where the caller limited BLAS to one thread (the fits do, for their factorisations; that limit otherwise sets
#: the workers): 5e9 at 1 kHz, past 100 / horizon 50, 0.8 s of one core by direct products; 8e7 for a fit of the
#: demo, whose passes run in the calling thread (no hand-offs). (By the FFT route that pass is 0.06 s of one core;
#: on two workers it took 0.047-0.081 s of wall and 0.07-0.13 s of CPU, on one thread 0.055-0.065 s: about even,
#: so the count stays that of the direct products.)
_TWO_CORE_WORK = 1e9


def _stream_lag_sums(session, pieces, n_folds: int, n_lags: int, chunk_rows: int = 16384, on_chunk=None, *,
                     shift=None, with_range: bool = False, spectra: bool = True):
    """One pass over the pieces (rows ``[k0, k1)`` with fold ``f``): the :class:`_LagSums` of each fold.

    ``Z = [y u] − shift`` (unshifted by default). Chunks are read into a ring of re-used buffers and reduced on
    worker threads with single-threaded BLAS; the sums are taken in chunk order, so every run gives the same
    numbers. Sources whose ``read`` takes ``out=`` (Session and SessionFile, whose reads are safe from any thread)
    are read by the workers themselves, which keeps both cores busy without a third thread; other sources are read
    in the calling thread only. ``on_chunk(rows)`` is called after each chunk (progress). With ``with_range``,
    returns ``(folds, lo, hi)`` with the raw inputs' range. ``spectra=False``: the direct products whatever the
    window (:func:`_chunk_products`).
    """
    c = int(session.n_outputs) + int(session.n_inputs)
    m = int(session.n_inputs)
    lo, hi = np.full(m, np.inf), np.full(m, -np.inf)
    folds = [_LagSums(c, n_lags) for _ in range(n_folds)]
    longest = max((min(b - a, chunk_rows) for a, b, _f in pieces), default=0) + n_lags
    in_workers = _reads_into(session)

    def load(item):
        (k0, k1, _f, first, last), buffer = item
        Z, rng = _read_z(session, k0 - n_lags, k1, shift, buffer, with_range)
        return Z, rng, first, last

    def task(loaded):
        Z, rng, first, last = loaded
        return _window_task(Z, n_lags, first, last, spectra), rng

    with _single_threaded_blas() as n_workers:
        if n_workers < 2 and sum(b - a for a, b, _f in pieces) * (n_lags + 1) * c * c >= _TWO_CORE_WORK:
            n_workers = min(2, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else 1)
        # _parallel_pass holds at most n_workers unconsumed chunks when it starts the next one, so n_workers + 1
        # buffers suffice; one more is a margin. Buffers are assigned in chunk order, in this thread.
        ring = [np.empty((longest, c)) for _ in range(n_workers + 2)]
        items = ((chunk, ring[i % len(ring)]) for i, chunk in enumerate(_chunks(pieces, chunk_rows)))
        if in_workers:
            stream = _parallel_pass(items, lambda item: item, lambda item: task(load(item)), n_workers)
        else:
            stream = _parallel_pass(items, load, task, n_workers)
        for ((k0, k1, f, _first, _last), _buffer), ((S, X, start, end), rng) in stream:
            if with_range:
                lo, hi = np.minimum(lo, rng[0]), np.maximum(hi, rng[1])
            acc = folds[f]
            acc.n += k1 - k0
            acc.S += S
            acc.X += X
            if start is not None:
                acc.windows.append((1.0, start))
            if end is not None:
                acc.windows.append((-1.0, end))
            if on_chunk is not None:
                on_chunk(k1 - k0)
    return (folds, lo, hi) if with_range else folds
