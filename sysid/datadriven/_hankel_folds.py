"""The Hankel predictor's held-out errors on large Gram-route problems: the folds side by side, in place.

Each fold's error is that of :func:`~stimsteer.sysid.datadriven.gram.unregularised_fold_error` from the total
Gram's factor (``_fold_error_from_total``: no validation Gram), computed on the training Gram's first ``n_b`` rows
as assembled, seen as the column-major ``n × n_b`` panel ``[G11; G21]`` (the Gram is symmetric):

1. ``G11 = C Cᵀ`` in place (``potrf``) and its condition estimate (``pocon``);
2. ``G21 := G21 C⁻ᵀ = L21``, whose row sums of squares are ``diag(Θ G12)``;
3. ``L21 := L21 C⁻¹ = Θ``, then ``Θ := Θ Ct = Z`` (``Ct`` the total's leading factor);
4. the error ``Σ w² (diag(G22v) + ||Z − Lt21||²_rows − ||Lt21||²_rows + diag(Θ G12))``.

The same arithmetic as that function, transposed, with no copy of ``G11`` or ``G12`` (one 2,450 × 3,450 array per
fold at past 100 / horizon 50, and ``Θ``'s 20 MB). The LAPACK and BLAS calls release the GIL
(:func:`~stimsteer.sysid._lapack_nogil.strided_cholesky_calls`), so two worker threads (one BLAS thread each) keep
both cores busy; steps 2-4 are cut in pieces of the fold's ``pN`` rows (rows of ``G21`` are independent in
``B := B L⁻ᵀ``): :data:`PIECES` per half, cut at multiples of 16 rows from the half's start, which keeps the BLAS
kernels' groups of rows, so the numbers are those of whole halves (measured: bit for bit at past 100 / horizon 50;
cut at 250 rows they moved by 4e-15).

The steps are tasks of one pool (:class:`._task_pool.TaskPool`, :class:`_FoldPlan`) begun before the total Gram is
assembled for its condition check (``gram.gram_condition_of``'s ``begin``): the first fold's rows are assembled
first, alone (two assemblies at once hold the GIL in turns: measured, each took 2-3 times as long), while the main
thread touches the total Gram's array; the total's rows follow (``run.before_rows``) beside the fold's factor
(GIL-free), then the fold's solves (steps 1-3 up to ``Θ``) run beside the total's Cholesky factor, itself a task of
the pool (``run``). Step 3's product with ``Ct`` waits for that factor; ``Θ``'s rows are copied out of the fold's
array, which is reused once the fold's solves are done (one buffer for every fold: a fresh array's first touch costs
more than its assembly), so the next fold is assembled and factored (the chain every later step waits for: it runs
first) while the products of the previous ones and the extra tasks (the closed-form predictor, its plan gaps) fill
the other core. One fold's array is held at a time (and the copies of ``Θ`` of folds whose products wait).
"""

from __future__ import annotations

import threading
import weakref
from concurrent.futures import Future

import numpy as np

from .._lapack_nogil import one_norm, strided_cholesky_calls
from ._task_pool import TaskPool
from .base import regressor_rows
from .gram import GRAM_CONDITION_LIMIT, _total_factor, release_freed_memory

__all__: list = []

_CALLS = strided_cholesky_calls()
#: Worker threads (the machine's two cores; each one BLAS thread).
WORKERS = 2
#: Regressor rows (``n_b``) from which the folds are scored here (and the total's factor is kept: also from
#: ``gram.TOTAL_FACTOR_ROWS``); smaller fits score their folds one by one (threads would cost more than they save).
SIDE_BY_SIDE_ROWS = 512
#: Pieces of each half of a fold's predicted rows solved and multiplied as separate tasks. One (whole halves, 500
#: rows at past 100 / horizon 50): per row, ``trsm`` took 15 % and ``trmm`` 10 % more CPU in pieces of 250 rows
#: than of 500 (one BLAS thread, measured on a fold's training Gram; 0.05 s of CPU per fold in all), and the two
#: halves still keep both workers busy.
PIECES = 1
#: Task priorities (lowest first): a fold's factor, then its triangular solves (the chain every later fold waits
#: for), then the total's factor (``run``) and the products (which need it: they fill the other core beside a
#: fold's factor and free their copies of ``Θ``, 20 MB a fold), then the extra tasks.
_FACTOR, _SOLVE, _TOTAL, _PRODUCT, _EXTRA = 0, 1, 2, 2, 3


def available(total, n_b: int) -> bool:
    """Whether the folds can be scored here: the total's lower factor kept, column-major, GIL-free calls found."""
    F = getattr(total, "_factor", None)
    return (_CALLS is not None and F is not None and F.flags.f_contiguous and F.dtype == np.float64
            and 0 < n_b < F.shape[0])


def _factor_fold(train, n_b: int, out=None, assembled=None):
    """Step 1: the training Gram's first ``n_b`` rows (C-ordered: the column-major panel ``[G11; G21]``; in the
    front of the flat buffer ``out`` where given) with ``G11`` factored in place, or None (not positive definite, or
    its estimated condition number above ``GRAM_CONDITION_LIMIT``, as ``gram.unregularised_fold_error``: the caller
    takes the general route). ``assembled()`` is called once the rows are assembled, before the factor."""
    Gt = train.gram_rows(0, n_b, out=out)  # C-ordered n_b × n: the memory of the column-major panel [G11; G21]
    if assembled is not None:
        assembled()
    n = Gt.shape[1]
    norm = one_norm(Gt[:, :n_b])
    if _CALLS.potrf(Gt, 0, n_b, n) != 0:
        return None
    rcond = _CALLS.pocon(Gt, 0, n_b, n, norm)
    if not (rcond > 0 and 1.0 / rcond <= GRAM_CONDITION_LIMIT):
        return None
    return Gt


def _solve_half(Gt, n_b: int, i0: int, i1: int):
    """Steps 2-3 up to ``Θ`` for the predicted rows ``[i0, i1)``: ``(diag(Θ G12), Θ)``, ``Θ``'s rows copied out of
    ``Gt`` (C-ordered ``n_b × m``: the column-major ``m × n_b`` block)."""
    n, m = Gt.shape[1], i1 - i0
    _CALLS.trsm(Gt, 0, n_b, n, Gt, n_b + i0, m, n, True)  # L21 = G21 C⁻ᵀ
    rows = Gt[:, n_b + i0:n_b + i1]  # (n_b × m) C-ordered view: column i holds row i of the panel's block
    own = np.einsum("ji,ji->i", rows, rows)  # diag(Θ G12)
    _CALLS.trsm(Gt, 0, n_b, n, Gt, n_b + i0, m, n, False)  # Θ = L21 C⁻¹
    return own, np.array(rows)


def _half_residual(theta, own, F, n_b: int, i0: int, i1: int, lt21_sq: np.ndarray) -> np.ndarray:
    """Steps 3-4 for the predicted rows ``[i0, i1)`` from :func:`_solve_half`'s output: their squared held-out
    residuals (without ``G22v``; weighted and summed by the caller)."""
    m = i1 - i0
    _CALLS.trmm(F, 0, n_b, F.shape[0], theta, 0, m, m)  # Z = Θ Ct
    theta -= F[n_b + i0:n_b + i1, :n_b].T  # (Z − Lt21)ᵀ
    return np.einsum("ji,ji->i", theta, theta) - lt21_sq[i0:i1] + own


def _pieces(pN: int) -> list:
    """The row ranges of a fold's solves and products: :data:`PIECES` per half of the ``pN`` predicted rows."""
    out = []
    for a, b in ((0, pN // 2), (pN // 2, pN)):
        cuts = [a + 16 * round((b - a) * k / PIECES / 16) for k in range(PIECES)] + [b]
        out.extend((c, d) for c, d in zip(cuts[:-1], cuts[1:]) if d > c)
    return out


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


class _TotalRun:
    """The total's Cholesky factor among a :class:`_FoldPlan`'s work, as ``gram.gram_condition_of`` takes it:
    ``run(task)`` computes it on the plan's workers (:meth:`_FoldPlan._run_total`), and ``before_rows()`` waits for
    the first fold's rows, so that the total's rows are assembled after them (beside that fold's factor,
    GIL-free). It holds the plan weakly: a plan dropped unused still ends its threads."""

    def __init__(self, plan: "_FoldPlan"):
        self._plan = weakref.proxy(plan)

    def __call__(self, task):
        return self._plan._run_total(task)

    def before_rows(self) -> None:
        self._plan.first_rows.wait()


class _FoldPlan:
    """The folds' steps as tasks of one :class:`TaskPool`: each fold's factor (one at a time: the next begins once
    the previous fold's array is freed), its two halves' solves, and, once :meth:`products` gives the total's
    factor, their products (``errors[i]``: a future of fold ``i``'s squared residuals per half, or None where the
    fold is refused; :meth:`error` weighs them)."""

    def __init__(self, folds, total, n_b: int):
        self.folds, self.n_b = folds, n_b
        self.queue = _todo(folds, total)
        self.errors = {i: Future() for i in self.queue}
        self.pool = TaskPool(WORKERS, WORKERS, "stimsteer-hankel-folds")
        self._lock = threading.Lock()
        self._waiting: list = []  # products waiting for the total's factor
        self._product_args = None  # (F, lt21_sq) once given
        self._stopped = False
        #: Set once the first fold's rows are assembled (or its step ended without them).
        self.first_rows = threading.Event()
        #: The folds' arrays, one after the other (a fresh array's first touch costs more than its assembly).
        self._buffer = np.empty(n_b * total.n_rows) if self.queue else None
        #: ``run`` as ``gram.gram_condition_of`` takes it (:class:`_TotalRun`).
        self.run = _TotalRun(self)
        weakref.finalize(self, self.pool.close, False)  # an unused plan dropped (an error in between): threads end
        self._next_fold()

    def _next_fold(self) -> None:
        with self._lock:
            i = None if self._stopped or not self.queue else self.queue.pop(0)
            out = self._buffer
            if not self.queue or self._stopped:
                self._buffer = None  # the last fold's array: freed with it
        if i is not None:
            self.pool.submit(_FACTOR, self._run, i, self._factor, i, out)
        else:
            self.first_rows.set()

    def _run(self, i: int, step, *args) -> None:
        """``step(*args)`` of fold ``i``; an error it raises stops the plan and becomes every unfinished fold's (the
        pool's own futures are not read)."""
        try:
            step(*args)
        except BaseException as exc:  # noqa: BLE001 - raised again by fold_errors
            with self._lock:
                self._stopped = True
            for future in self.errors.values():
                if not future.done():
                    future.set_exception(exc)

    def _factor(self, i: int, out) -> None:
        try:
            Gt = _factor_fold(_others(self.folds, i), self.n_b, out, self.first_rows.set)
        finally:
            self.first_rows.set()
        del out
        if Gt is None:
            self.errors[i].set_result(None)
            del Gt
            release_freed_memory()
            return self._next_fold()
        pieces = _pieces(Gt.shape[1] - self.n_b)
        state = {"Gt": Gt, "left": len(pieces), "parts": {}, "pieces": len(pieces)}
        del Gt
        for h, (a, b) in enumerate(pieces):
            self.pool.submit(_SOLVE, self._run, i, self._solve, i, state, h, a, b)

    def _solve(self, i: int, state: dict, h: int, a: int, b: int) -> None:
        own, theta = _solve_half(state["Gt"], self.n_b, a, b)
        with self._lock:
            state["left"] -= 1
            last = state["left"] == 0
            if last:
                state["Gt"] = None  # the fold's array: freed here (its halves hold copies of Θ)
        if last:
            release_freed_memory()  # before the next fold's array is assembled
            self._next_fold()
        task = (i, state, h, a, b, own, theta)
        with self._lock:
            ready = self._product_args is not None
            if not ready:
                self._waiting.append(task)
        if ready:
            self.pool.submit(_PRODUCT, self._run, i, self._product, *task)

    def _product(self, i: int, state: dict, h: int, a: int, b: int, own, theta) -> None:
        F, lt21_sq = self._product_args
        resid = _half_residual(theta, own, F, self.n_b, a, b, lt21_sq)
        with self._lock:
            state["parts"][h] = resid
            done = len(state["parts"]) == state["pieces"]
        if done:
            self.errors[i].set_result([state["parts"][k] for k in range(len(state["parts"]))])

    def products(self, F: np.ndarray) -> None:
        """Give the total's lower factor ``F``: the halves' products begin."""
        L21t = F[self.n_b:, :self.n_b].T
        with self._lock:
            if self._product_args is not None:
                return
            self._product_args = (F, np.einsum("ji,ji->i", L21t, L21t))
            waiting, self._waiting = self._waiting, []
        for task in waiting:
            self.pool.submit(_PRODUCT, self._run, task[0], self._product, *task)

    def _run_total(self, task):
        """``task()`` (the total's Cholesky factor, ``gram.gram_condition_of``) on the workers, before the
        products and extra tasks and after the folds' own steps; its factor, if it has one, starts the products."""
        try:
            F, info = self.pool.submit(_TOTAL, task).result()
        except BaseException:
            self.stop()
            raise
        if info == 0:
            self.products(F)
        return F, info

    def error(self, i: int, weights: np.ndarray):
        """Fold ``i``'s weighted held-out error (None: refused, the general route), once its steps are done."""
        parts = self.errors[i].result()
        if parts is None:
            return None
        w2 = np.asarray(weights, dtype=np.float64) ** 2
        diag22 = self.folds[i].gram_diagonal()[self.n_b:]
        pN, halves = w2.size, []
        for a, b in ((0, pN // 2), (pN // 2, pN)):  # each half's weighted sum, then the two (as before the pieces)
            resid = np.concatenate([r for (c, _d), r in zip(_pieces(pN), parts) if a <= c < b])
            halves.append(float(w2[a:b] @ resid))
        return float(w2 @ diag22) + sum(halves)

    def stop(self) -> None:
        """Begin no other fold, wait for the tasks begun and end the threads (the plan is not used)."""
        with self._lock:
            self._stopped = True
            self._waiting, self._buffer = [], None
        self.pool.close()


def start_first_fold(folds, n_b: int):
    """A :class:`_FoldPlan` begun (its first fold assembled, factored and solved, then the next fold's), or None
    (nothing to score here). Called before the total Gram is assembled for its condition check, it runs before that
    assembly (``run.before_rows``), beside it and beside the total's Cholesky factor (``run``) instead of after
    them. One fold's array more is held
    meanwhile, as while the folds are scored (the total's factor and one fold's array). :func:`fold_errors` or
    ``stop()`` ends it (and, as a last resort, dropping it: its threads end once their tasks are done)."""
    total = getattr(folds, "total", None)
    if _CALLS is None or total is None or len(folds) < 2 or n_b < SIDE_BY_SIDE_ROWS or not _todo(folds, total):
        return None
    return _FoldPlan(folds, total, n_b)


def first_fold_hook(predictor, session):
    """For the "projection" regulariser: ``early(folds)`` for ``base._collect``, which begins the held-out folds
    (:func:`start_first_fold`) before the total Gram is assembled; None for the others."""
    if predictor.regularizer != "projection":
        return None

    def early(folds):  # called once the session and the windows are checked (the settings read here are valid)
        return start_first_fold(folds, regressor_rows(session.n_inputs, session.n_outputs, predictor.past_steps,
                                                      predictor.horizon_steps))
    return early


def _chain(pool: TaskPool, tasks: list, done: list) -> None:
    """Submit ``tasks[0]``, which submits the next when it ends; ``done`` receives their futures. A tuple in
    ``tasks`` is a group of tasks submitted together (side by side, on both workers); the next item is submitted
    once the last of them ends."""
    if not tasks:
        return
    group = tasks[0] if isinstance(tasks[0], tuple) else (tasks[0],)
    left, lock = [len(group)], threading.Lock()

    def run(task):
        try:
            task()
        finally:
            with lock:
                left[0] -= 1
                last = left[0] == 0
            if last:
                _chain(pool, tasks[1:], done)
    for task in group:
        done.append(pool.submit(_EXTRA, run, task))


def fold_errors(folds, total, n_b: int, weights: np.ndarray, extra=None) -> dict:
    """``{i: error or None}`` for every fold ``i`` with windows in it and in its training data (None: the caller
    scores that fold by the general route). ``folds.first_fold``: :func:`start_first_fold`'s plan (taken from
    there, so that no reference but the plan's tasks keeps a fold's array). ``extra``: tasks run one after the
    other beside the folds (a tuple among them: tasks side by side, :func:`_chain`), all ended when this returns."""
    plan = getattr(folds, "first_fold", None)
    if plan is not None:
        folds.first_fold = None
    else:
        plan = _FoldPlan(folds, total, n_b)
    plan.products(total._factor)
    done: list = []
    _chain(plan.pool, list(extra or ()), done)
    plan.pool.close()
    for future in done:
        future.result()
    return {i: plan.error(i, weights) for i in plan.errors}


def errors_by_fold(folds, n_b: int, weights, n_candidates: int, extra=None) -> dict:
    """``{id(fold): error or None}`` of every fold scored side by side (:func:`fold_errors`) on large problems
    (:data:`SIDE_BY_SIDE_ROWS`); empty elsewhere (each fold is then scored when the selection reaches it). The
    plan begun by :func:`start_first_fold` is taken from ``folds.first_fold``; ``extra`` as :func:`fold_errors`
    (not called where the folds are not scored here)."""
    total = getattr(folds, "total", None)
    if n_candidates < 2 or len(folds) < 2 or n_b < SIDE_BY_SIDE_ROWS or _total_factor(total, n_b) is None or \
            not available(total, n_b):
        if getattr(folds, "first_fold", None) is not None:
            folds.first_fold.stop()  # not used: its threads end before the fit goes on
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
