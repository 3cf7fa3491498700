"""The SPC ridge grids of every large fold, one strength at a time (``_by_strength``), as tasks of one pool.

Scored fold by fold, a fold's grid keeps both cores busy only while two of its strengths run: its training rows
``[G11 G12]`` were assembled on one core before it (0.1-0.25 s at past 100 / horizon 50, the GIL held in part),
its odd strength's factor ran alone before its right-hand sides were split over both workers, and the last
strengths of a fold ended one worker before the other. Here every fold's strengths are tasks of one
:class:`._task_pool.TaskPool` (two workers, one BLAS thread each), taken in the order of the folds, so the next
fold's strengths fill a core the last ones of a fold leave idle:

- folds' rows are assembled one at a time, two folds' held at most: the first fold's when the plan is made
  (``base._collect``'s ``early``: beside the total Gram's assembly), the second's beside the total's Cholesky
  factor, each next one's once a fold is scored; then the final map's rows (``gram.fitted_ridge_map``'s
  ``rows``), beside the last fold's last strengths instead of after them on one core;
- a fold's odd strength comes last: its factor, then its two halves of right-hand sides (the arithmetic of
  ``_Grid.split``) on whichever workers are free, which evens out the two workers' ends; a strength is factored
  in the fold's own ``G11`` when it is free, else in one more ``n × n`` array shared by the folds.

Each strength is computed by the same calls on the same arrays as fold by fold (``_by_strength.strength_errors``),
so the errors are the same, bit for bit, and so is the final map. Memory: beside the total's factor, the rows of
two folds (or of a fold and the final map: 68 MB each at past 100 / horizon 50), one ``n × n`` array and two
blocks of right-hand sides (measured there: peak 460 MB against 386 fold by fold).
"""

from __future__ import annotations

import queue
import threading
import weakref

import numpy as np

from ._by_strength import _Grid, base_term, gram_scale, held_out_constant, nogil_available, rhs_block
from ._eigen_folds import fits_in_memory, scored_parts
from .._lapack_nogil import eigh_nogil_available
from ._task_pool import TaskPool
from .base import regressor_rows
from .gram import _total_factor, release_freed_memory

__all__: list = []

#: Worker threads (the machine's two cores; each one BLAS thread).
WORKERS = 2
#: Folds whose training rows are held at once (68 MB each at past 100 / horizon 50): the one being scored and the
#: next, assembled beforehand.
MAX_HELD = 2


def wanted(total, n_b: int) -> bool:
    """Whether ``gram.ridge_grid_errors`` would score the folds of ``total`` by strength (large folds, scored from
    the total's factor) and the calls release the GIL."""
    # gram's route settings as they are now (tests change them), not as they were when this module was imported
    from .gram import BY_STRENGTH, FOLDS_SIDE_BY_SIDE, STRENGTH_WORKERS, TOTAL_FACTOR_ROWS

    folds = getattr(total, "parts", ())
    eigen = FOLDS_SIDE_BY_SIDE and eigh_nogil_available() and fits_in_memory(n_b, total.n_rows)
    return (len(folds) >= 2 and n_b >= TOTAL_FACTOR_ROWS and BY_STRENGTH and nogil_available()
            and STRENGTH_WORKERS > 1 and not eigen and 0 < n_b < total.n_rows)


def first_fold_hook(predictor, session, n_candidates: int):
    """``early(folds)`` for ``base._collect``: a :class:`StrengthPlan` begun before the total Gram is assembled,
    or None where the folds are not scored by strength."""
    def early(folds):  # called once the session and the windows are checked
        n_b = regressor_rows(session.n_inputs, session.n_outputs, predictor.past_steps, predictor.horizon_steps)
        return StrengthPlan(folds.total, n_b) if wanted(folds.total, n_b) else None
    return early if n_candidates > 1 else None


class StrengthPlan:
    """Every fold's grid (``total.parts`` with windows in the fold and in its training data) as pool tasks: the
    first fold's rows assembled from the start, the strengths once :meth:`errors` gives them."""

    def __init__(self, total, n_b: int):
        self.total, self.n_b = total, n_b
        self.folds = scored_parts(total)
        self.pool = TaskPool(WORKERS, WORKERS, "stimsteer-spc-folds")
        weakref.finalize(self, self.pool.close, False)  # dropped unused (an error in between): the threads end
        self._lock = threading.Lock()
        self._rows: dict = {}  # k: (training fold, its rows) once assembled, until its strengths are submitted
        self._setup = None  # (F, base, alphas, weights, extra K, free W) once the strengths are given
        self._result: dict = {}
        self._failure: list = []
        self._next, self._held, self._assembling = 0, 0, False  # next fold to assemble, folds' rows held
        self._stopped = False
        #: The total's first ``n_b`` rows (``gram.fitted_ridge_map``'s ``rows``), assembled at the end, or None.
        self.final_rows = None
        self._assemble()

    def _run(self, fn, *args) -> None:
        try:
            fn(*args)
        except BaseException as exc:  # noqa: BLE001 - raised again by errors()
            self._failure.append(exc)

    def _assemble(self) -> None:
        """The next fold's rows, one assembly at a time (they hold the GIL in part) and two folds' rows held at
        most (memory), before any strength (so that they are there when the previous fold's strengths end)."""
        with self._lock:
            k = self._next
            if self._stopped or self._assembling or self._held >= MAX_HELD or k > len(self.folds) or \
                    (k == len(self.folds) and self._setup is None):
                return
            self._next, self._held, self._assembling = k + 1, self._held + 1, True
        if k == len(self.folds):  # then the final map's rows, beside the last fold's odd strength (or last pair)
            n_s = len(self._setup[2])
            self.pool.submit((k - 1) * (n_s + 4) + n_s - n_s % 2 - 1.5, self._run, self._final_rows)
        else:
            self.pool.submit(-1.0, self._run, self._rows_of, k)

    def _final_rows(self) -> None:
        try:
            self.final_rows = self.total.gram_rows(0, self.n_b, fortran=True)  # as gram._ridge_map_from_kept
        finally:
            self._assembling = False

    def _rows_of(self, k: int) -> None:
        try:
            train = self.total.plus(self.folds[k], -1.0)  # as base._training: the total minus the fold
            rows = train.gram_rows(0, self.n_b, fortran=True)
            with self._lock:
                self._rows[k] = (train, rows)
                ready = self._setup is not None
        finally:
            self._assembling = False
        self._assemble()
        if ready:
            self._submit(k)

    def _submit(self, k: int) -> None:
        """Fold ``k``'s strengths as tasks (once its rows and the strengths are there), and the next fold's rows."""
        with self._lock:
            item = self._rows.pop(k, None)
        if item is None:
            return
        train, rows = item
        F, base, alphas, weights, _K, _W = self._setup
        val = self.folds[k]
        scale = gram_scale(train)  # as gram.ridge_grid_errors
        strengths = [float(s) for s in np.asarray(alphas) * scale]
        c0 = held_out_constant(val, self.n_b, weights)  # as gram._grid_by_strength
        grid = _Grid(rows, F, c0, weights, 0, base)
        del rows
        grid.free.put(grid.G11)  # the fold's own factor array
        paired = len(strengths) - len(strengths) % 2
        state = {"grid": grid, "errors": [None] * len(strengths), "left": len(strengths)}
        first = k * (len(strengths) + 4)  # this fold's tasks before the next fold's
        for j in range(paired):
            self.pool.submit(first + j, self._run, self._whole, k, state, j, strengths[j])
        if paired < len(strengths):  # the odd strength last: its halves even out the two workers' ends
            self.pool.submit(first + paired, self._run, self._odd, k, state, paired, strengths[paired], first)

    def _take(self, grid):
        try:
            return grid.free.get_nowait(), grid.free
        except queue.Empty:
            return self._setup[4].get(), self._setup[4]

    def _whole(self, k: int, state: dict, j: int, s: float) -> None:
        (K, home), W = self._take(state["grid"]), self._setup[5].get()
        try:
            e = state["grid"].score(K, W, s)
        finally:
            home.put(K)
            self._setup[5].put(W)
        self._done(k, state, j, e)

    def _odd(self, k: int, state: dict, j: int, s: float, first: float) -> None:
        grid = state["grid"]
        K, home = self._take(grid)
        if not grid._factor(K, s):
            home.put(K)
            return self._done(k, state, j, None)
        parts = {"K": K, "home": home, "left": 2}
        for h, cols in enumerate(grid.halves()):  # before any later task
            self.pool.submit(first - 0.5, self._run, self._half, k, state, j, s, parts, h, cols)

    def _half(self, k: int, state: dict, j: int, s: float, parts: dict, h: int, cols: range) -> None:
        grid, W = state["grid"], self._setup[5].get()
        try:
            part = grid._columns(parts["K"], W, cols)
        finally:
            self._setup[5].put(W)
        with self._lock:
            parts[h] = part
            parts["left"] -= 1
            last = parts["left"] == 0
        if last:
            parts["home"].put(parts["K"])
            self._done(k, state, j, grid._error(s, [parts[0], parts[1]]))

    def _done(self, k: int, state: dict, j: int, e) -> None:
        with self._lock:
            state["errors"][j] = e
            state["left"] -= 1
            last = state["left"] == 0
        if last:
            errors = state["errors"]
            self._result[id(self.folds[k])] = None if any(v is None for v in errors) else np.asarray(errors)
            state.clear()  # the fold's rows and factor array
            release_freed_memory()
            with self._lock:
                self._held -= 1
            self._assemble()

    def errors(self, val, alphas, weights):
        """Fold ``val``'s errors at ``alphas`` (``gram.ridge_grid_errors``' numbers), every fold scored at the
        first call; None where ``val`` was not scored here (not one of the folds, a strength not definite, no
        total factor): the caller's route."""
        if self._setup is None:
            F = _total_factor(self.total, self.n_b)
            if F is None:
                self.stop()
                self._setup = ()
                return None
            weights = np.asarray(weights, dtype=np.float64)
            n, pN = self.n_b, F.shape[0] - self.n_b
            free_w = queue.SimpleQueue()
            for _ in range(WORKERS):
                free_w.put(rhs_block(n, pN))
            extra = queue.SimpleQueue()
            extra.put(np.empty((n, n), order="F"))
            with self._lock:
                self._setup = (F, base_term(F, n, pN, weights), alphas, weights, extra, free_w)
                ready = list(self._rows)
            for k in ready:
                self._submit(k)
            self.pool.close()
            self._setup = (None,) * 6  # the arrays, freed
            if self._failure:
                raise self._failure[0]
        return self._result.get(id(val))

    def stop(self) -> None:
        """Begin no other assembly, wait for the tasks begun and end the threads."""
        with self._lock:
            self._stopped = True
        self.pool.close()
