"""Cross-validation of ridge ARX over several lag structures and a grid of strengths, from one set of moments.

Every candidate structure's regressors are a subset of one lagged vector (:mod:`stimsteer.sysid.arx_structure`),
and its standardised normal equations ``(R_s + α I) β = r_s`` are the sub-block of one standardised Gram ``R`` over
the union of the candidates' regressors: centring and scaling are per regressor, the same in every structure. The
regressors common to all candidates (the *core*) are factored once per fold and strength,

    R_core + α I = L Lᵀ   (Cholesky),

and each structure adds its few other regressors ``e`` by a block Cholesky step (``L⁻¹ R_core,e``, a Cholesky of the
``|e| × |e|`` Schur complement): ``O(|core|² |e|)`` per structure instead of a factorisation of its own. With one
candidate the core is the whole structure.

Numerical care: a Cholesky solve is backward stable like the eigendecomposition it replaces (errors
``~ κ(R + α I) · eps`` in both; Golub & Van Loan 2013, Matrix Computations, 4th ed., sec. 4.2). Where the factor
does not exist in floating point (a strength at or below the rounding level of ``R``, where the eigen route drops
the null directions, or a semi-definite Schur complement) the structure falls back to the eigendecomposition route
of :func:`stimsteer.sysid.arx_regression._ridge_path` for that fold.

Cost: small Grams (moments held whole, :func:`_cv_errors`) factor the strengths of a fold on worker threads (one
per BLAS thread the machine has, each with one BLAS thread; multi-threaded OpenBLAS stalls on a busy machine), each
strength computed exactly as on one thread, so the numbers do not depend on the number of workers. Large Grams (held
as lag sums, :func:`_cv_errors_large`) run their folds on the worker threads instead; each fold's Gram is assembled
straight into the order ``[union, targets, rest]`` and centred in place, and from :data:`_BAND_FROM` core
regressors on the core is reduced once per fold to band form (:mod:`stimsteer.sysid.arx_band`): every strength is
then a banded factor and two applications of an orthogonal matrix, not a dense factor of its own. A full
eigendecomposition per fold would give every strength too, but its tridiagonal reduction is matrix-vector work:
measured 17 dense factors' time at 2,300 rows, against about four for the band reduction (its ``symm``/``syr2k``
run at matrix-matrix speed). The fold Grams differ by their centring and per-fold scaling (a full-rank diagonal
change), so no factor or reduction is updated from another fold's. The banded route is backward stable like the
dense one (orthogonal reductions; errors ``~ κ(R + α I) · eps``), and its factor exists exactly when the dense one
does (same eigenvalues); where it does not, the structure takes the eigen route as above.
"""

from __future__ import annotations

import queue
import warnings
from concurrent.futures import ThreadPoolExecutor
from functools import reduce

import numpy as np
import pandas as pd
import scipy.linalg as sla

from ._lagged import _lagged_gram, _single_threaded_blas
from .arx_band import band_betas, in_place_available
from .arx_regression import _Problem, _ridge_path, _rounding_level, centred_lead, lead_index, lead_order

__all__ = ["cv_errors", "cv_table"]


def _core_factor(Rc: np.ndarray, rc: np.ndarray, alpha: float, buffer: np.ndarray):
    """``L`` with ``L Lᵀ = R_core + α I`` (in ``buffer``) and ``L⁻¹ r_core``; None when the factor does not exist.

    A Fortran-ordered buffer takes ``R_core`` as before (small problems, bit for bit); a C-ordered one (large
    problems) takes it by a row-wise copy and is factored as its transpose (the same symmetric matrix), which spares
    the strided transposing copy of a Gram-sized array.
    """
    if Rc.shape[0] == 0:
        return Rc, rc
    if not buffer.flags.f_contiguous:
        np.copyto(buffer, Rc)
        A = buffer.T
        A[np.diag_indices_from(A)] += alpha
        L, info = sla.lapack.dpotrf(A, lower=1, clean=0, overwrite_a=1)
        if info != 0:
            return None
        return L, sla.solve_triangular(L, rc, lower=True, check_finite=False)
    np.copyto(buffer, Rc)
    buffer[np.diag_indices_from(buffer)] += alpha
    # the LAPACK calls of scipy.linalg.cholesky and solve_triangular (the same numbers), without their wrappers
    L, info = _POTRF(buffer, lower=1, overwrite_a=1, clean=1)
    if info != 0:
        return None
    return L, _trsolve(L, rc)


def _trsolve(L: np.ndarray, b: np.ndarray, trans: int = 0) -> np.ndarray:
    """``scipy.linalg.solve_triangular(L, b, lower=True, trans=trans, check_finite=False)`` by the same LAPACK call
    (``trtrs``, on the transpose for a C-ordered ``L``) without its wrapper's per-call checks (~30 µs each; the
    structure search makes thousands of these solves on small blocks)."""
    if L.flags.f_contiguous:
        x, info = _TRTRS(L, b, overwrite_b=0, lower=1, trans=trans, unitdiag=0)
    else:
        x, info = _TRTRS(L.T, b, overwrite_b=0, lower=0, trans=int(not trans), unitdiag=0)
    if info != 0:
        raise np.linalg.LinAlgError(f"singular triangular factor (trtrs info {info})")
    return x


def _cho_solve_small(S: np.ndarray, b: np.ndarray):
    """``cho_solve(cho_factor(S, lower=True), b)`` (check_finite off) by the same two LAPACK calls (``potrf``,
    ``potrs``) without the wrappers; None when ``S`` has no Cholesky factor."""
    c, info = _POTRF(S, lower=1, overwrite_a=0, clean=0)
    if info > 0:
        return None
    if info < 0:  # pragma: no cover - a bad argument is a bug
        raise ValueError(f"illegal value in argument {-info} of potrf")
    x, info = _POTRS(c, b, lower=1, overwrite_b=0)
    if info != 0:  # pragma: no cover
        raise ValueError(f"illegal value in argument {-info} of potrs")
    return x


_POTRF, _POTRS, _TRTRS = sla.lapack.dpotrf, sla.lapack.dpotrs, sla.lapack.dtrtrs


class _Extras:
    """Index bookkeeping of one fold's live structures, shared by its strengths: the union of their extra
    regressors, and per structure its extras' columns in that union and its ``R[e, e]`` block."""

    def __init__(self, R, r, extras, live):
        self.union = np.unique(np.concatenate([extras[i] for i in live])) if live else np.zeros(0, dtype=np.intp)
        self.cols = {i: np.searchsorted(self.union, extras[i]) for i in live}
        self.Ree = {i: R[np.ix_(extras[i], extras[i])] for i in live}
        self.re = {i: r[extras[i]] for i in live}


def _strength_betas(R, r, n_core: int, extras, live, alpha, factor, shared: _Extras | None = None) -> dict:
    """Standardised coefficients on ``[core, extras[i]]`` of each live structure at one strength, from the core's
    factor by a block Cholesky step (None for a structure whose Schur complement has no factor). ``shared``: the
    fold's :class:`_Extras` (made here when not given). The LAPACK calls of SciPy's wrappers, made directly."""
    L, z = factor
    shared = _Extras(R, r, extras, live) if shared is None else shared
    union_e = shared.union
    Xall = _trsolve(L, R[:n_core, union_e]) if n_core and union_e.size else \
        np.zeros((n_core, union_e.size))  # L⁻¹ R_core,e for every extra regressor at once
    out, back = {}, []
    for i in live:
        e = extras[i]
        if not e.size:
            out[i] = np.zeros((0, r.shape[1]))
            back.append((i, z))
            continue
        X = Xall[:, shared.cols[i]]
        XT = X.T
        S = shared.Ree[i] - XT @ X
        diagonal = S.reshape(-1)[:: S.shape[0] + 1]  # a view (S is a fresh C-ordered array)
        diagonal += alpha
        be = _cho_solve_small(S, shared.re[i] - XT @ z)
        out[i] = be
        if be is not None:
            back.append((i, z - X @ be))
    if back and n_core:  # the back substitutions of every structure in one triangular solve
        bc = _trsolve(L, np.hstack([v for _i, v in back]), trans=1)
        for j, (i, _v) in enumerate(back):
            out[i] = np.concatenate([bc[:, j * r.shape[1]:(j + 1) * r.shape[1]], out[i]])
    return out


class _Runner:
    """The worker threads of a cross-validation (each with single-threaded BLAS)."""

    def __init__(self, pool, n_workers: int):
        self.pool, self.n = pool, n_workers


def _fold_betas(R, r, n_core: int, extras, live, alphas, run: _Runner, order: str = "F", buffer=None) -> dict:
    """Standardised coefficients ``{structure: [β per strength] or None}`` of one fold (the core leads ``R``):
    one core factor per strength, the strengths shared among the worker threads (the results are taken in
    strength order, each computed as on one thread). ``buffer``: a core-sized array of ``order`` to use as the
    first worker's buffer."""
    Rc, rc = R[:n_core, :n_core], r[:n_core]
    if not (n_core == 0 or min(alphas) > _rounding_level(Rc)):
        return {i: None for i in live}
    buffers: queue.SimpleQueue = queue.SimpleQueue()  # one per worker, re-used over the strengths of this fold
    for j in range(min(run.n, len(alphas))):  # (a fresh core-sized array per strength costs page faults)
        buffers.put(buffer if j == 0 and buffer is not None else np.empty(Rc.shape, order=order))

    shared = _Extras(R, r, extras, live)

    def one(alpha):
        buffer = buffers.get()
        try:
            factor = _core_factor(Rc, rc, alpha, buffer)
            return _strength_betas(R, r, n_core, extras, live, alpha, factor, shared) if factor is not None else {}
        finally:
            buffers.put(buffer)

    found = list(run.pool.map(one, alphas))
    return {i: None if any(fd.get(i) is None for fd in found) else [fd[i] for fd in found] for i in live}


def _union_layout(probs: list[_Problem]):
    """The union of the candidates' regressors with the shared core first, the core's size, and each candidate's
    extra regressors as positions in that order."""
    union = np.unique(np.concatenate([q.x_idx for q in probs]))
    shared = union
    for q in probs:
        shared = np.intersect1d(shared, q.x_idx)
    order = np.concatenate([shared, np.setdiff1d(union, shared)])
    where = {int(v): j for j, v in enumerate(order)}
    extras = [np.sort(np.array([where[int(v)] for v in np.setdiff1d(q.x_idx, shared)], dtype=np.intp))
              for q in probs]
    return order, shared.size, extras


def _centred_block(W, s, n, mu, xi, yi):
    """``(Σ (w − μ)(w − μ)ᵀ)`` on rows ``xi`` and columns ``[xi, yi]``: ``W − μ (s − n μ)ᵀ − s μᵀ``, formed in place
    (two rank-one updates, no Gram-sized temporaries)."""
    cols = np.concatenate([xi, yi])
    C = W[np.ix_(xi, cols)]
    ger, = sla.get_blas_funcs(("ger",), (C,))
    # C is C-ordered: its transpose is Fortran-ordered, updated in place by ger with the factors swapped
    ger(-1.0, s[cols] - n * mu[cols], mu[xi], a=C.T, overwrite_a=True)
    ger(-1.0, mu[cols], s[xi], a=C.T, overwrite_a=True)
    return C


def cv_errors(probs: list[_Problem], folds, total, alphas, keep: dict | None = None,
              ahead: dict | None = None) -> list[np.ndarray]:
    """Validation errors ``(n_alphas, n_folds)`` of each candidate. ``keep`` (a dict, large Grams only) receives
    the total Gram the cross-validation assembled (``"index"``, ``"gram"``), for the final fit to reuse.

    ``ahead`` (a dict with ``"work"``, large Grams on two or more workers only): once fewer folds remain than
    workers, ``ahead["work"](errors so far)`` (NaN columns for the folds still running) runs on the worker the
    folds leave idle; its return value is put in ``ahead["result"]`` before this function returns."""
    # factorisations of this size gain nothing from multi-threaded BLAS on a busy machine (it stalls): the
    # strengths run on worker threads instead, each with one BLAS thread
    with _single_threaded_blas() as n_workers:
        if n_workers == 1:  # one worker: in the calling thread (the same numbers, no hand-offs between threads)
            return _cv_run(probs, folds, total, alphas, _SERIAL, keep, None)
        with ThreadPoolExecutor(max_workers=n_workers, thread_name_prefix="stimsteer-ridge-cv") as pool:
            return _cv_run(probs, folds, total, alphas, _Runner(pool, n_workers), keep, ahead)


def _cv_run(probs, folds, total, alphas, run, keep, ahead):
    if hasattr(total, "sums"):  # a large Gram, held as lag sums: folds assembled one at a time, in place
        return _cv_errors_large(probs, folds, total, alphas, run, keep, ahead)
    return _cv_errors(probs, folds, total, alphas, run)


def _cv_errors(probs: list[_Problem], folds, total, alphas, run: _Runner) -> list[np.ndarray]:
    """Validation errors ``(n_alphas, n_folds)`` of each candidate (NaN where a fold cannot be scored).

    Each fold: training moments = total − fold; the error is the mean over outputs of SSE / SST on the held-out
    rows (:meth:`_Problem.validation_errors`), for every strength, from one set of centred moments of the union.
    A fold's Gram is asked for once (folds may assemble it on demand from compact sums).
    """
    k = len(folds)
    errors = [np.full((len(alphas), k), np.nan) for _ in probs]
    xi, n_core, extras = _union_layout(probs)
    yi, nx = probs[0].y_idx, xi.size
    fit_intercept = probs[0].fit_intercept
    for f, held in enumerate(folds):
        n_tr = total.n - held.n
        live = [i for i, q in enumerate(probs) if held.n and n_tr > q.x_idx.size]
        if not live:
            continue
        W_h = held.W
        s_tr = total.s - held.s
        mu = s_tr / n_tr if fit_intercept else np.zeros_like(s_tr)
        W_tr = total.W - W_h
        R = _centred_block(W_tr, s_tr, n_tr, mu, xi, yi)
        del W_tr
        Q = _centred_block(W_h, held.s, held.n, mu, xi, yi)
        w_yy, s_y, m_y = np.diag(W_h)[yi], held.s[yi], mu[yi]
        sst = w_yy - s_y ** 2 / held.n
        qyy = w_yy - 2.0 * m_y * s_y + held.n * m_y ** 2
        del W_h
        scale = np.sqrt(np.clip(np.diag(R)[:nx], 0.0, None) / n_tr)
        scale[scale == 0] = 1.0
        R /= n_tr * scale[:, None]
        R[:, :nx] /= scale[None, :]
        R, r = R[:, :nx], R[:, nx:]  # standardised R (views) and r
        found = _fold_betas(R, r, n_core, extras, live, alphas, run)
        for i in live:
            idx = np.concatenate([np.arange(n_core), extras[i]])
            betas = found[i]
            if betas is None:  # no Cholesky factor: the eigen route, in this structure alone
                betas = _ridge_path(R[np.ix_(idx, idx)], r[idx], alphas, route="eigh")[0]
            errors[i][:, f] = _errors(betas, scale, idx, Q, qyy, sst)
    return errors


#: From this many core regressors on, a fold's strengths are solved from one band reduction of its core
#: (:mod:`stimsteer.sysid.arx_band`, ~4/3 d³ flops) instead of one Cholesky factor per strength (d³/3 each); below
#: it the factors are cheap, and the numbers are those of before, bit for bit.
_BAND_FROM = 512


class _InThread:
    """A pool stand-in that maps in the calling thread (the folds of a large Gram already run on the workers)."""

    @staticmethod
    def map(fn, items):
        return map(fn, items)


_SERIAL = _Runner(_InThread(), 1)


def _cv_errors_large(probs: list[_Problem], folds, total, alphas, run: _Runner, keep=None,
                     ahead=None) -> list[np.ndarray]:
    """As :func:`_cv_errors`, for Grams held as lag sums (``total`` and ``folds`` with ``.sums``).

    The total Gram is assembled once, in the order ``[union, targets, rest]``. Each fold's training Gram is
    assembled from the other folds' sums in that order (regressors and targets are then views), centred and
    standardised in place; the held-out moments are the total's minus the training's (:func:`_held_out`, in place
    of the training block once its strengths are solved), so a fold costs one Gram assembly, not two. The folds run
    on the worker threads (one BLAS thread each; each fold computed as on one thread, so the numbers do not depend
    on the number of workers). A band-route fold reduces its core in its own Gram (:class:`~stimsteer.sysid.arx_band.
    BandForm` in place), so the folds reduce side by side; otherwise one fold solves at a time, in the one
    core-sized buffer, while the other workers assemble and score theirs. Memory: the total, one fold's Gram per
    worker, its band form (and the buffer, off the band route).
    """
    k = len(folds)
    errors = [np.full((len(alphas), k), np.nan) for _ in probs]
    xi, n_core, extras = _union_layout(probs)
    yi, nx = probs[0].y_idx, xi.size
    index = lead_index(total.s.size, probs[0].c, np.concatenate([xi, yi]))
    whole = _Whole(_lagged_gram(total.sums, index), lead_order(total.s, index), total.n, nx + yi.size)
    works: queue.SimpleQueue = queue.SimpleQueue()  # one core-sized buffer, taken by one fold's solves at a time
    works.put(None)

    def one(f):
        held = folds[f]
        n_tr = total.n - held.n
        live = [i for i, q in enumerate(probs) if held.n and n_tr > q.x_idx.size]
        return _large_fold(probs, folds, f, whole, index, (n_core, extras, live), alphas, works) if live else {}

    # (five folds on two workers leave one core idle during the last fold; a third worker fills it, measured,
    # but at 498 MB peak on the 1 kHz benchmark session against 404 MB: over the 500 MB budget's margin; the
    # caller's work ahead, ``ahead``, fills it instead)
    later = None
    for f, found in enumerate(run.pool.map(one, range(k))):
        for i, col in found.items():
            errors[i][:, f] = col
        if ahead is not None and 1 <= f == k - run.n:  # fewer folds left than workers: one worker is free
            later = run.pool.submit(ahead["work"], [e.copy() for e in errors])
    if later is not None:
        ahead["result"] = later.result()
    if keep is not None:
        keep.update(index=index, gram=whole.W)
    return errors


def _large_fold(probs, folds, f, whole, index, layout, alphas, works) -> dict:
    """Validation errors ``{structure: (n_alphas,)}`` of fold ``f`` (:func:`_cv_errors_large`)."""
    n_core, extras, live = layout
    nx, ny = whole.k - probs[0].y_idx.size, probs[0].y_idx.size
    n_tr = whole.n - folds[f].n
    train = reduce(lambda a, b: a.plus(b), [g.sums for j, g in enumerate(folds) if j != f])
    s_tr = lead_order(train.lagged_sums(), index)
    mu = s_tr / n_tr if probs[0].fit_intercept else np.zeros_like(s_tr)
    W, C, raw = centred_lead(train, index, nx + ny, n_tr, s_tr, mu)
    del train
    if n_core >= _BAND_FROM and in_place_available():  # reduced in the fold's own Gram: folds side by side
        betas, scale = _large_betas(C, nx, n_tr, n_core, extras, live, alphas, None)
    else:
        work = works.get()  # the solves of one fold at a time (the other worker assembles, scores): one buffer
        try:
            work = np.empty(n_core * n_core) if work is None else work
            betas, scale = _large_betas(C, nx, n_tr, n_core, extras, live, alphas, work)
        finally:
            works.put(work)
    Q, qyy, sst = _held_out(whole, C, raw, scale, s_tr, n_tr, mu, nx)
    parts = betas.pop("parts", None)
    if parts is not None:  # every structure from the band route: their shared core solutions, one product
        return _shared_errors(parts, {i: betas[i] for i in live}, n_core, extras, scale, Q, qyy, sst)
    out = {}
    for i in live:
        idx = np.concatenate([np.arange(n_core), extras[i]])
        out[i] = _errors(betas[i], scale, idx, Q, qyy, sst)
    del W, C, Q
    return out


#: Rows per block of the in-place centring updates (their temporaries are this many rows of the Gram; two folds
#: run at once).
_ROWS = 64


class _Whole:
    """The total Gram ``W`` in lead order, its sums ``s``, row count ``n`` and the raw diagonal of its leading
    ``k × k`` block."""

    def __init__(self, W, s, n, k):
        self.W, self.s, self.n, self.k, self.raw = W, s, n, k, np.diagonal(W)[:k].copy()


def _held_out(whole: _Whole, C, raw_tr, scale, s_tr, n_tr, mu, nx):
    """The held-out moments about the training mean ``mu``: ``[Qxx Qxy]`` (in place of the standardised training
    block ``C``, whose strengths are solved), the targets' ``qyy`` and their own-mean ``sst``.

    Centred moments about a fixed ``mu`` add over rows, so held-out = total − training:
    ``Q = (W − μ (s − n μ)ᵀ − s μᵀ) − n_tr · diag(σ) R diag(σ, 1)`` (``R`` the standardised training block, ``σ``
    the regressor scale), formed ``rows`` at a time (no Gram-sized temporaries). Rounding: the difference of two
    centred sums is exact to ``eps`` times the total's, the size of the total Gram's own rounding.
    """
    k = C.shape[1]
    W, s, n = whole.W, whole.s, whole.n
    a = s[:k] - n * mu[:k]
    col = np.concatenate([scale, np.ones(k - nx)]) * n_tr
    Q = C[:nx]
    for i in range(0, nx, _ROWS):
        j = min(nx, i + _ROWS)
        Q[i:j] *= col[None, :]
        Q[i:j] *= -scale[i:j, None]
        Q[i:j] += W[i:j, :k]
        Q[i:j] -= np.outer(mu[i:j], a)
        Q[i:j] -= np.outer(s[i:j], mu[:k])
    raw_h, s_h, n_h, m_y = whole.raw[nx:] - raw_tr[nx:], s[nx:k] - s_tr[nx:k], n - n_tr, mu[nx:k]
    qyy = raw_h - 2.0 * m_y * s_h + n_h * m_y ** 2
    return Q, qyy, raw_h - s_h ** 2 / n_h


def _large_betas(C, nx, n_tr, n_core, extras, live, alphas, work):
    """Standardised coefficients of each live structure on one fold's training rows; ``C`` (the centred training
    block ``[Cxx Cxy]``) is standardised in place. From :data:`_BAND_FROM` core regressors on by one band
    reduction of the core (in ``work``, a core-sized buffer, or None: in ``C`` itself, restored afterwards), below
    by a core factor per strength."""
    R = C[:nx]
    scale = np.sqrt(np.clip(np.diagonal(R)[:nx], 0.0, None) / n_tr)
    scale[scale == 0] = 1.0
    R /= n_tr * scale[:, None]
    R[:, :nx] /= scale[None, :]
    R, r = R[:, :nx], R[:, nx:]
    if n_core >= _BAND_FROM:
        parts: dict = {}
        found = band_betas(R, r, n_core, extras, live, alphas, work, parts)
        if parts and all(found[i] is not None for i in live):
            found["parts"] = parts
    else:
        found = _fold_betas(R, r, n_core, extras, live, alphas, _SERIAL, order="C",
                            buffer=work[:n_core * n_core].reshape(n_core, n_core))
    for i in live:
        if found[i] is None:  # no Cholesky factor: the eigen route, in this structure alone
            idx = np.concatenate([np.arange(n_core), extras[i]])
            found[i] = _ridge_path(R[np.ix_(idx, idx)], r[idx], alphas, route="eigh")[0]
    return found, scale


def _shared_errors(parts, betas, n_core, extras, scale, Q, qyy, sst) -> dict:
    """:func:`_errors` of every structure of a fold from the band route's shared core solutions (``parts``,
    :func:`~stimsteer.sysid.arx_band.band_betas`): structure ``s`` has ``β = Zr − Ze_s β_e`` on the core and
    ``β_e`` on its extras, so ``Q β = Q Zr − (Q Ze)_s β_e + Q_e β_e`` and one product of ``Q`` with the ``p +
    |union_e|`` columns of each strength serves every structure (before: ``p`` columns per structure and
    strength, four times the work at four structures)."""
    ok = sst > 0
    Z, union_e = parts["Z"], parts["union_e"]
    nx, (_nc, a, w) = scale.size, Z.shape
    p = qyy.size
    Y = Z / scale[:n_core, None, None]  # raw units
    QY = (Q[:, :n_core] @ Y.reshape(n_core, a * w)).reshape(nx, a, w)
    out = {}
    for i, found in betas.items():
        e = extras[i]
        pos = p + np.searchsorted(union_e, e)
        Qe = Q[:, e] / scale[e]
        errs = np.full(a, np.nan)
        for j, beta in enumerate(found):
            be = beta[n_core:] / scale[e, None]  # raw units
            QB = QY[:, j, :p] - QY[:, j, pos] @ (beta[n_core:]) + Qe @ (beta[n_core:])
            core = Y[:, j, :p] - Y[:, j, pos] @ beta[n_core:]
            sse = qyy - 2.0 * (np.einsum("xp,xp->p", core, Q[:n_core, nx:]) + np.einsum("xp,xp->p", be, Q[e, nx:])) \
                + np.einsum("xp,xp->p", core, QB[:n_core]) + np.einsum("xp,xp->p", be, QB[e])
            sse = np.clip(sse, 0.0, None)  # rounding can push an exact fit below zero
            errs[j] = np.mean(sse[ok] / sst[ok]) if ok.any() else np.nan
        out[i] = errs
    return out


def _errors(betas, scale, idx, Q, qyy, sst) -> np.ndarray:
    """Mean over outputs of SSE / SST for each coefficient set (all strengths in one product).

    ``Q`` holds the held-out centred moments ``[Qxx Qxy]`` over the union; the coefficients on ``idx`` are placed in
    union-length columns, so no structure-sized copy of ``Qxx`` is made.
    """
    ok = sst > 0
    if not ok.any():
        return np.full(len(betas), np.nan)
    nx = scale.size
    a, p = len(betas), betas[0].shape[1]
    B = np.zeros((nx, a, p))
    B[idx] = np.stack([b / scale[idx, None] for b in betas], axis=1)
    QB = (Q[:, :nx] @ B.reshape(nx, a * p)).reshape(nx, a, p)
    sse = qyy[None, :] - 2.0 * np.einsum("xap,xp->ap", B, Q[:, nx:]) + np.einsum("xap,xap->ap", B, QB)
    sse = np.clip(sse, 0.0, None)  # rounding can push an exact fit below zero
    return np.mean(sse[:, ok] / sst[ok], axis=1)


def cv_table(errors: np.ndarray, alphas: np.ndarray, k: int) -> pd.DataFrame:
    """The cross-validation table of one structure from its ``(n_alphas, k)`` validation errors."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows when no fold could be scored
        columns = {"alpha": alphas, "mean_error": np.nanmean(errors, axis=1), "std_error": np.nanstd(errors, axis=1)}
    columns.update((f"fold_{f}", errors[:, f]) for f in range(k))
    return pd.DataFrame(columns)  # one frame from all its columns (a column at a time costs ~1 ms each)
