"""Where a study's tasks run, and the cache that makes a rerun compute only what is missing.

* **Batches**: the tasks are sent to workers in batches, one per (analysis, scored session), each in (split,
  method) order, the longest batches first (so the study does not end with one worker finishing a long batch while
  the others wait): a batch reads its scored session once and pools each split's training trials once, and costs one
  round trip to the scheduler instead of one per task. Each task in a batch runs exactly as it would alone
  (:func:`~.tasks.run_task`) and is cached under its own key as its batch returns.
* **Local processes** by default (``n_workers`` of them; 1 runs in this process), or a **Dask cluster** given by
  its scheduler address. Every task runs with single-threaded BLAS and results are kept by task key, so the numbers
  do not depend on where or in which order tasks ran.
* **Cache**: a folder with one JSON file per completed task, named by the task's key (a SHA-256 over the sessions'
  content hashes, the method, the split and the settings). Only this process writes it, atomically, as each result
  arrives; a rerun after a failure, or after a session was added, runs only the tasks whose key has no file.
* **A worker that dies** (killed, out of memory) breaks the local pool: the results already in are kept, a new
  pool runs the tasks still missing, up to ``max_retries`` times. On Dask the scheduler reschedules the dead
  worker's batches itself, and ``retries`` resubmits a failed one. Results are stored by key, so a task that ran
  twice is kept once and a task that never finished is run again: no duplicated or lost rows.
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

from ...sysid import InvalidParameterError, StimsteerError
from ...sysid._files import atomic_path
from .settings import StudySettings
from .table import DESCRIPTIONS_FILE
from .tasks import run_task

__all__ = ["TaskCache", "execute_tasks", "batches", "run_batch"]


class TaskCache:
    """A folder of completed task results, one JSON file per task key.

    Parameters
    ----------
    folder : str or Path
        Created when missing.
    """

    def __init__(self, folder):
        self.folder = Path(folder)
        if self.folder.exists() and not self.folder.is_dir():
            raise StimsteerError(f"task cache {self.folder} is a file; give a folder (--cache).")
        self.folder.mkdir(parents=True, exist_ok=True)

    def _path(self, key: str) -> Path:
        return self.folder / f"{key}.json"

    def get(self, key: str):
        """The cached result of ``key``, or None (an unreadable file counts as missing and is recomputed)."""
        p = self._path(key)
        try:
            return json.loads(p.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None

    def put(self, key: str, result: dict) -> None:
        if "error" in result:
            return  # a failed task is tried again on the next run
        with atomic_path(self._path(key)) as tmp:
            tmp.write_text(json.dumps(result), encoding="utf-8")

    def __len__(self) -> int:
        """Completed tasks kept (the study's record of its session files is not one)."""
        return sum(1 for p in self.folder.glob("*.json") if p.name != DESCRIPTIONS_FILE)


_SETTINGS: dict = {}


def _install(st: StudySettings) -> None:
    _SETTINGS["st"] = st


def batches(tasks) -> list:
    """The tasks grouped into batches (module docstring): one per (analysis, scored session), in (split, method)
    order; the longest batches first (see :func:`_cost`)."""
    groups: dict = {}
    for t in tasks:
        groups.setdefault((t.kind, t.test.content_hash), []).append(t)
    ordered = [sorted(g, key=lambda t: (t.split, t.method_index)) for g in groups.values()]
    return sorted(ordered, key=_cost, reverse=True)  # stable: equal estimates keep the grid's order


def _cost(batch) -> tuple:
    """A batch's estimated length, for scheduling the longest first (a long batch started last would keep one worker
    busy while the others wait at the end of the study): per-session batches first (they also steer), then tasks x
    samples of the scored session (a transfer task draws as many training trials as the session's own fit)."""
    return (batch[0].kind == "sessions", len(batch) * int(batch[0].test.n_samples))


def run_batch(st: StudySettings, batch) -> list:
    """Run the tasks of a batch one after the other: ``[(key, result), ...]``, each result what :func:`run_task`
    gives for that task alone."""
    return [(t.key, run_task(st, t)) for t in batch]


def _run_installed(batch):
    return run_batch(_SETTINGS["st"], batch)


def _bar(total: int, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="stimsteer study", unit="task", disable=not enabled, file=sys.stderr, leave=False)


def execute_tasks(st: StudySettings, tasks, *, cache: TaskCache | None = None, scheduler: str | None = None,
                  n_workers: int | None = None, progress: bool = False) -> tuple[dict, dict]:
    """Run the tasks not in the cache; return every result by task key and a record of the execution.

    Returns
    -------
    results : dict of str to dict
    execution : dict
        ``mode``, ``n_workers``, ``n_tasks``, ``n_cached``, ``n_computed``, ``n_retries``, ``n_batches`` (sent to
        workers: one per analysis and scored session with tasks to compute).
    """
    results, missing = {}, {}
    for t in tasks:
        hit = cache.get(t.key) if cache is not None else None
        if hit is not None:
            results[t.key] = hit
        else:
            missing.setdefault(t.key, t)
    todo, n_cached = list(missing.values()), len(results)

    def keep(key, res):
        results[key] = res
        if cache is not None:
            cache.put(key, res)

    with _bar(len(todo), progress) as bar:
        if scheduler:
            used = _run_dask(st, todo, scheduler, keep, bar)
            info, retries = {"mode": "dask", "scheduler": str(scheduler), "n_workers": used}, 0
        else:
            n = _cores() if n_workers is None else n_workers
            if isinstance(n, bool) or not isinstance(n, int) or n < 1:
                raise InvalidParameterError(f"n_workers must be an integer >= 1; got {n_workers!r}.")
            n = max(1, min(n, len(todo)))
            retries = _run_local(st, todo, n, keep, bar)
            info = {"mode": "sequential" if n == 1 else "local processes", "n_workers": n}
    info.update(n_tasks=len({t.key for t in tasks}), n_cached=n_cached, n_computed=len(todo), n_retries=retries,
                n_batches=len(batches(todo)))
    return results, info


def _cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def _run_local(st, todo, n: int, keep, bar) -> int:
    if n == 1:
        for batch in batches(todo):
            for key, res in run_batch(st, batch):
                keep(key, res)
                bar.update()
        return 0
    from concurrent.futures import ProcessPoolExecutor, as_completed
    from concurrent.futures.process import BrokenProcessPool

    from ..evaluation.execute import _stop_workers, check_descriptors

    check_descriptors(n)  # a pool the open-file limit cannot hold is refused, never left waiting
    pending, retries = list(todo), 0
    while pending:
        done = set()
        try:
            with ProcessPoolExecutor(max_workers=n, initializer=_install, initargs=(st,)) as pool:
                futures = [pool.submit(_run_installed, b) for b in batches(pending)]
                try:
                    for fut in as_completed(futures):
                        for key, res in fut.result():
                            keep(key, res)
                            done.add(key)
                            bar.update()
                except KeyboardInterrupt:  # Ctrl-C, or SIGTERM raised as one: the workers end now, as the bench's do
                    _stop_workers(pool, futures)
                    raise
        except BrokenProcessPool:
            retries += 1
            if retries > st.max_retries:
                raise StimsteerError(f"a worker process died {retries} times (killed, or out of memory); "
                                     f"{len(pending) - len(done)} tasks did not finish. The finished ones are "
                                     "cached: run the study again (with fewer workers if memory ran out).") from None
        pending = [t for t in pending if t.key not in done]
    return retries


def _connect(address: str, timeout: float):
    try:
        from distributed import Client
    except ImportError:
        raise StimsteerError("running on a Dask cluster (--scheduler) needs Dask's distributed package; install "
                             "the extra: pip install 'stimsteer[dist]'. Or run locally without --scheduler.") from None
    try:
        client = Client(str(address), timeout=f"{timeout}s", set_as_default=False)
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        raise StimsteerError(f"could not use a Dask scheduler at {address!r} within {timeout:g} s ({exc}). Check "
                             "the address (e.g. tcp://127.0.0.1:8786) and that a worker joined, or run locally "
                             "without --scheduler.") from None
    return client


def _run_dask(st, todo, address, keep, bar) -> int:
    from distributed import as_completed

    client = _connect(address, st.scheduler_timeout_s)
    try:
        todo_batches = batches(todo)  # the longest first, and the scheduler keeps that order (priority)
        futures = [client.submit(run_batch, st, b, key=f"stimsteer-study-{b[0].key}", pure=False,
                                 retries=st.max_retries, priority=len(todo_batches) - i)
                   for i, b in enumerate(todo_batches)]
        try:
            for fut in as_completed(futures, loop=client.loop):
                for key, res in fut.result():
                    keep(key, res)
                    bar.update()
        except Exception as exc:  # KilledWorker and the like: the cache keeps what finished
            if isinstance(exc, StimsteerError):
                raise
            raise StimsteerError(f"the Dask cluster lost tasks ({type(exc).__name__}: {exc}); the finished ones are "
                                 "cached: run the study again.") from None
        n_workers = len(client.scheduler_info().get("workers", {}))
    finally:
        client.close()
    return n_workers
