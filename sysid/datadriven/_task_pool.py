"""Worker threads that take tasks by priority, with a cap on how many run at once that the caller can raise.

The Hankel predictor's held-out folds (:mod:`._hankel_folds`) are a chain of steps (a fold's assembly and factor,
its triangular solves, its products with the total's factor) beside independent work (the closed-form predictor and
its plan gaps). A plain thread pool runs them first come first served, so a core idles while the next fold's
factor, which everything after it waits for, sits behind work that could wait; here the ready task of the lowest
priority number runs first. The cap (``cores``) lets the pool start beside the caller's own work on the other core
(the total Gram's Cholesky factor) with one task at a time, then take both cores once the caller waits for it.
"""

from __future__ import annotations

import heapq
import itertools
import threading
from concurrent.futures import Future

__all__: list = []


class TaskPool:
    """``threads`` worker threads running at most ``cores`` tasks at once, the ready task of lowest ``priority``
    first (first submitted first among equals). Tasks may submit further tasks. :meth:`close` waits for every task
    submitted until then (and those they submit) and ends the threads."""

    def __init__(self, threads: int, cores: int, name: str = "stimsteer-tasks"):
        self._cv = threading.Condition()
        self._heap: list = []
        self._order = itertools.count()
        self._cores, self._running, self._closing = int(cores), 0, False
        self._threads = [threading.Thread(target=self._loop, name=f"{name}_{k}", daemon=True)
                         for k in range(int(threads))]
        for t in self._threads:
            t.start()

    def submit(self, priority: float, fn, *args) -> Future:
        """``fn(*args)`` as a future, run when a worker is free and no ready task of lower ``priority`` waits."""
        future: Future = Future()
        with self._cv:
            heapq.heappush(self._heap, (priority, next(self._order), fn, args, future))
            self._cv.notify()
        return future

    def set_cores(self, cores: int) -> None:
        """Let up to ``cores`` tasks run at once from now on."""
        with self._cv:
            self._cores = int(cores)
            self._cv.notify_all()

    def _loop(self) -> None:
        while True:
            with self._cv:
                while not self._heap or self._running >= self._cores:
                    if self._closing and not self._heap and self._running == 0:
                        self._cv.notify_all()
                        return
                    self._cv.wait()
                _p, _k, fn, args, future = heapq.heappop(self._heap)
                self._running += 1
            try:
                if future.set_running_or_notify_cancel():
                    future.set_result(fn(*args))
            except BaseException as exc:  # noqa: BLE001 - handed to whoever waits for the future
                future.set_exception(exc)
            finally:
                del fn, args, future  # no reference to a task's arrays once it has run
                with self._cv:
                    self._running -= 1
                    self._cv.notify_all()

    def close(self, wait: bool = True) -> None:
        """End the threads once every task (including those submitted meanwhile) is done; with ``wait``, wait
        for that."""
        with self._cv:
            self._closing = True
            self._cv.notify_all()
        if wait:
            for t in self._threads:
                if t is not threading.current_thread():
                    t.join()
