"""Worker threads with single-threaded BLAS for the streamed lag products (:mod:`._lagged`), and the process's
one BLAS thread controller.
"""

from __future__ import annotations

import contextlib
import functools
import threading
from collections import deque
from concurrent.futures import ThreadPoolExecutor

_CONTROLLER: list = []
#: The BLAS thread count before the outermost :func:`_one_blas_thread` call of this thread (``count``), if any.
_BEFORE = threading.local()


def blas_controller():
    """The process's one ``threadpoolctl.ThreadpoolController`` (None without threadpoolctl).

    Created on first use and reused: a fresh ``threadpool_limits`` or ``threadpool_info`` scans every loaded library
    on each call (~30 ms under load, as long as a small fit's algebra). Created after NumPy's and SciPy's linear
    algebra are loaded, so it controls both of their BLAS libraries.
    """
    if not _CONTROLLER:
        try:
            from threadpoolctl import ThreadpoolController
        except ImportError:  # pragma: no cover - scikit-learn installs it
            return None
        import scipy.linalg  # noqa: F401  (SciPy's own BLAS must be loaded before the libraries are found)

        _CONTROLLER.append(ThreadpoolController())
    return _CONTROLLER[0]


def blas_threads(limit: int = 1):
    """Context that limits BLAS/LAPACK to ``limit`` threads (process-wide, restored afterwards); a no-op without
    threadpoolctl. Uses the cached :func:`blas_controller`."""
    ctl = blas_controller()
    return contextlib.nullcontext() if ctl is None else ctl.limit(limits=limit, user_api="blas")


def blas_thread_count() -> int:
    """The largest thread count of the loaded BLAS libraries (1 without threadpoolctl)."""
    ctl = blas_controller()
    if ctl is None:
        return 1
    return max((int(lib.num_threads or 1) for lib in ctl.select(user_api="blas").lib_controllers), default=1)


@contextlib.contextmanager
def _single_threaded_blas():
    """Yield the number of worker threads to use, with BLAS limited to one thread meanwhile.

    The Gram products of one chunk are small (``(p+m) × (p+m)`` outputs): several chunks computed at once, each with
    single-threaded BLAS, use the cores better than one chunk at a time with multi-threaded BLAS, and do not
    oversubscribe the CPU while the main thread reads (multi-threaded OpenBLAS slows down many times over when a
    busy extra thread competes for its cores). The limit is process-wide for the duration of the pass and restored
    afterwards; without threadpoolctl (a scikit-learn dependency) one worker is used and nothing is changed.
    """
    n = blas_thread_count()
    with blas_threads(1):
        yield max(1, n)


def _parallel_pass(chunks, load, task, n_workers: int):
    """Yield ``(chunk, task(load(chunk)))`` in chunk order; loads run here, tasks on ``n_workers`` threads (here,
    with one).

    Reading overlaps with the tasks (BLAS releases the GIL; an identity ``load`` moves the reading into the tasks). At most
    ``n_workers + 1`` loaded chunks wait or run at a time, which bounds memory; results come back in order, so the
    sums they feed are the same in every run.
    """
    if n_workers < 2:  # one worker: run the tasks here (the same numbers, without a thread's hand-offs)
        for chunk in chunks:
            yield chunk, task(load(chunk))
        return
    pending: deque = deque()
    pool = ThreadPoolExecutor(max_workers=n_workers, thread_name_prefix="stimsteer-arx")
    try:
        for chunk in chunks:
            pending.append((chunk, pool.submit(task, load(chunk))))
            if len(pending) > n_workers:
                done, fut = pending.popleft()
                yield done, fut.result()
        while pending:
            done, fut = pending.popleft()
            yield done, fut.result()
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def _single_blas_thread():
    """Context that runs BLAS/LAPACK on one thread (process-wide, restored afterwards).

    The factorisations here are of a few hundred rows; on a machine whose cores are busy, multi-threaded OpenBLAS
    slows them down ten times or more (seen on the shared 2-core development machine), while one thread loses
    little. Through the process's one controller (:func:`blas_threads`); without threadpoolctl (a scikit-learn
    dependency) nothing is changed.
    """
    return blas_threads(1)


def _one_blas_thread(func):
    """Decorator: run ``func`` inside :func:`_single_blas_thread` (the count before it kept for
    :func:`fit_blas_threads`)."""
    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        outer = getattr(_BEFORE, "count", None)
        _BEFORE.count = blas_thread_count() if outer is None else outer
        try:
            with _single_blas_thread():
                return func(*args, **kwargs)
        finally:
            _BEFORE.count = outer
    return wrapper


def fit_blas_threads():
    """Context that gives BLAS back the threads it had before the enclosing :func:`_one_blas_thread` (outside any,
    BLAS is left as it is): for a fit's sequential algebra on large matrices, which runs alone (a 2,450-row SVD:
    7.8 s on one thread, 4.0 s on two; benchmarks/README.md, sixteenth session)."""
    count = getattr(_BEFORE, "count", None)
    return contextlib.nullcontext() if count is None else blas_threads(max(1, int(count)))
