"""The Hankel predictor's held-out errors on large Gram-route problems: the folds side by side, in place.

Each fold's error is that of :func:`~stimsteer.sysid.datadriven.gram.unregularised_fold_error` from the total
Gram's factor (``_fold_error_from_total``: no validation Gram), computed on the training Gram's first ``n_b`` rows
as assembled, seen as the column-major ``n × n_b`` panel ``[G11; G21]`` (the Gram is symmetric):

1. ``G11 = C Cᵀ`` in place (``potrf``) and its condition estimate (``pocon``);
2. ``G21 := G21 C⁻ᵀ = L21``, whose row sums of squares are ``diag(Θ G12)``;
3. ``L21 := L21 C⁻¹ = Θ``, then ``Θ := Θ Ct = Z`` (``Ct`` the total's leading factor);
4. the error ``Σ w² (diag(G22v) + ||Z − Lt21||²_rows − ||Lt21||²_rows + diag(Θ G12))``.

The same arithmetic as that function, transposed, with no copy of ``G11``, ``G12`` or ``Θ`` (one 2,450 × 3,450
array per fold at past 100 / horizon 50, against three more of 48, 20 and 20 MB). The LAPACK and BLAS calls release
the GIL (:func:`~stimsteer.sysid._lapack_nogil.strided_cholesky_calls`), so two worker threads (one BLAS thread
each) keep both cores busy in the triangular steps of a fold, cut in two halves of its ``pN`` rows (rows of ``G21``
are independent in ``B := B L⁻ᵀ``). One fold's array is held at a time (:data:`FOLDS_IN_FLIGHT`).
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .._lapack_nogil import strided_cholesky_calls
from .gram import GRAM_CONDITION_LIMIT, _one_norm, _total_factor, release_freed_memory

__all__: list = []

_CALLS = strided_cholesky_calls()
#: Worker threads (the machine's two cores; each one BLAS thread).
WORKERS = 2
#: Folds whose assembled arrays are held at once. 1: the next fold is assembled and factored once the current one is
#: scored (its two halves side by side), so the fit holds the total's factor and one fold's ``n_b × n`` array; 2
#: overlaps them (two folds assembled and factored side by side, one more array: 68 MB at past 100 / horizon 50,
#: where the fit's peak resident memory was 441-483 MB against the 500 MB target; issue 14).
FOLDS_IN_FLIGHT = 1
#: Regressor rows (``n_b``) from which the folds are scored here (and the total's factor is kept: also from
#: ``gram.TOTAL_FACTOR_ROWS``); smaller fits score their folds one by one (threads would cost more than they save).
SIDE_BY_SIDE_ROWS = 512


def available(total, n_b: int) -> bool:
    """Whether the folds can be scored here: the total's lower factor kept, column-major, GIL-free calls found."""
    F = getattr(total, "_factor", None)
    return (_CALLS is not None and F is not None and F.flags.f_contiguous and F.dtype == np.float64
            and 0 < n_b < F.shape[0])


def _factor_fold(train, n_b: int):
    """Step 1: the training Gram's first ``n_b`` rows (C-ordered: the column-major panel ``[G11; G21]``) with
    ``G11`` factored in place, or None (not positive definite, or its estimated condition number above
    ``GRAM_CONDITION_LIMIT``, as ``gram.unregularised_fold_error``: the caller takes the general route)."""
    Gt = train.gram_rows(0, n_b)  # C-ordered n_b × n: the memory of the column-major panel [G11; G21]
    n = Gt.shape[1]
    norm = _one_norm(Gt, n_b)
    if _CALLS.potrf(Gt, 0, n_b, n) != 0:
        return None
    rcond = _CALLS.pocon(Gt, 0, n_b, n, norm)
    if not (rcond > 0 and 1.0 / rcond <= GRAM_CONDITION_LIMIT):
        return None
    return Gt


def _half(Gt, F, n_b: int, i0: int, i1: int, lt21_sq: np.ndarray, w2: np.ndarray) -> float:
    """Steps 2–4 for the predicted rows ``[i0, i1)``: their share of the weighted error (without ``G22v``)."""
    n, m = Gt.shape[1], i1 - i0
    _CALLS.trsm(Gt, 0, n_b, n, Gt, n_b + i0, m, n, True)  # L21 = G21 C⁻ᵀ
    rows = Gt[:, n_b + i0:n_b + i1]  # (n_b × m) C-ordered view: column i holds row i of the panel's block
    own = np.einsum("ji,ji->i", rows, rows)  # diag(Θ G12)
    _CALLS.trsm(Gt, 0, n_b, n, Gt, n_b + i0, m, n, False)  # Θ = L21 C⁻¹
    _CALLS.trmm(F, 0, n_b, n, Gt, n_b + i0, m, n)  # Z = Θ Ct
    rows -= F[n_b + i0:n_b + i1, :n_b].T  # (Z − Lt21)ᵀ
    resid = np.einsum("ji,ji->i", rows, rows) - lt21_sq[i0:i1] + own
    return float(w2[i0:i1] @ resid)


def _others(folds, i: int):
    """The training data of fold ``i`` as the sum of the other folds, not the total minus the fold: its lag sums
    keep only their own pieces' edge windows (the total minus the fold holds the fold's twice, with opposite signs,
    and its Gram's edge terms cost twice as much to assemble)."""
    rest = [f for j, f in enumerate(folds) if j != i]
    out = rest[0]
    for f in rest[1:]:
        out = out.plus(f)
    return out


def _todo(folds, total) -> list:
    return [i for i, f in enumerate(folds) if f.n_columns and total.n_columns - f.n_columns]


def start_first_fold(folds, n_b: int):
    """The first fold's step 1 (:func:`_factor_fold`) started on a worker thread, as ``(i, future)``, or None
    (nothing to score here). Called before the total's condition check (a Cholesky factor of the whole Gram on one
    core, the GIL released: ``gram.gram_condition_of``), it runs on the other core instead of after it: at past 100
    / horizon 50 the fold's assembly and factor (~0.3 s) leave the serial part of the fit. One fold's array more is
    held meanwhile, as while the folds are scored (the total's factor and one fold's array)."""
    total = getattr(folds, "total", None)
    if _CALLS is None or total is None or len(folds) < 2 or n_b < SIDE_BY_SIDE_ROWS or not _todo(folds, total):
        return None
    i = _todo(folds, total)[0]
    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="stimsteer-hankel-first-fold")
    future = pool.submit(_factor_fold, _others(folds, i), n_b)
    pool.shutdown(wait=False)  # the thread ends with its one task
    return i, future


def first_fold_hook(predictor, session):
    """For the "projection" regulariser: ``early(folds)`` for ``base._collect``, which begins the first held-out
    fold (:func:`start_first_fold`) once the total Gram is assembled; None for the others."""
    if predictor.regularizer != "projection":
        return None
    m, p = int(session.n_inputs), int(session.n_outputs)
    n_b = (m + p) * int(predictor.past_steps) + m * int(predictor.horizon_steps)  # called once they are checked
    return lambda folds: start_first_fold(folds, n_b)


def fold_errors(folds, total, n_b: int, weights: np.ndarray, extra=None) -> dict:
    """``{i: error or None}`` for every fold ``i`` with windows in it and in its training data (None: the caller
    scores that fold by the general route). ``folds.first_fold``: :func:`start_first_fold`'s ``(i, future)`` (taken
    from there, so that no reference but ``factored``'s keeps the fold's array once it is scored). ``extra``: tasks,
    the ``k``-th begun beside the ``k + 2``-th fold's step 1 (which leaves a core free), all ended when this
    returns (any left over begin after the folds)."""
    first = getattr(folds, "first_fold", None)
    if first is not None:
        folds.first_fold = None
    F = total._factor
    L21t = F[n_b:, :n_b].T
    lt21_sq = np.einsum("ji,ji->i", L21t, L21t)
    w2 = np.asarray(weights, dtype=np.float64) ** 2
    pN = F.shape[0] - n_b
    cut = pN // 2
    todo = _todo(folds, total)
    out = {}
    with ThreadPoolExecutor(max_workers=WORKERS, thread_name_prefix="stimsteer-hankel-folds") as pool:
        factored = {i: pool.submit(_factor_fold, _others(folds, i), n_b) for i in todo[:FOLDS_IN_FLIGHT]
                    if first is None or i != first[0]}
        if first is not None:
            factored[first[0]] = first[1]
            first = None
        for k, i in enumerate(todo):
            Gt = factored.pop(i).result()
            if Gt is None:
                out[i] = None
            else:
                halves = [pool.submit(_half, Gt, F, n_b, a, b, lt21_sq, w2) for a, b in ((0, cut), (cut, pN))]
                diag22 = folds[i].gram_diagonal()[n_b:]
                out[i] = float(w2 @ diag22) + sum(h.result() for h in halves)
            del Gt
            release_freed_memory()  # this fold's array, before the next one is assembled
            if k + FOLDS_IN_FLIGHT < len(todo):
                j = todo[k + FOLDS_IN_FLIGHT]
                factored[j] = pool.submit(_factor_fold, _others(folds, j), n_b)
            if extra and k < len(extra):
                extra[k] = pool.submit(extra[k])
        for task in extra or ():
            (pool.submit(task) if callable(task) else task).result()
    return out


def errors_by_fold(folds, n_b: int, weights, n_candidates: int, extra=None) -> dict:
    """``{id(fold): error or None}`` of every fold scored side by side (:func:`fold_errors`) on large problems
    (:data:`SIDE_BY_SIDE_ROWS`); empty elsewhere (each fold is then scored when the selection reaches it). The
    first fold's step 1 is taken from ``folds.first_fold`` where :func:`start_first_fold` began it; ``extra`` as
    :func:`fold_errors` (not called where the folds are not scored here)."""
    total = getattr(folds, "total", None)
    if n_candidates < 2 or len(folds) < 2 or n_b < SIDE_BY_SIDE_ROWS or _total_factor(total, n_b) is None or \
            not available(total, n_b):
        if getattr(folds, "first_fold", None) is not None:
            folds.first_fold[1].result()  # not used: its thread ends before the fit goes on
            folds.first_fold = None
        return {}
    return {id(folds[i]): e for i, e in fold_errors(folds, total, n_b, weights, extra).items()}


def known_first(known: dict, score):
    """``score(train, val, weights, lambdas, lam_y)``, or the fold's error computed beforehand (``known[id(val)]``,
    the same for every strength) where there is one."""
    if not known:
        return score

    def scored(train, val, weights, lambdas, lam_y):
        err = known.get(id(val))
        return score(train, val, weights, lambdas, lam_y) if err is None else [err] * len(lambdas)
    return scored
