"""Where the tasks run: in this process, on a local process pool, or on a Dask cluster.

Results come back in task order whatever the order of completion, and every task limits BLAS to one thread, so the
numbers do not depend on where a task ran; only the timing columns do.
"""

from __future__ import annotations

import os
import sys

from ...sysid import InvalidParameterError, StimsteerError
from .task_body import _run_task
from .tasks import _Context, _Task

_INSTALLED: dict = {}


def _install(ctx: _Context) -> None:
    _INSTALLED["ctx"] = ctx


def _run_installed(task: _Task) -> dict:
    return _run_task(_INSTALLED["ctx"], task)


def _available_cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def _progress_bar(total: int, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="stimsteer bench", unit="task", disable=not enabled, file=sys.stderr,
                dynamic_ncols=True, leave=False)


def _run_local(ctx: _Context, tasks, n_workers: int, bar) -> list:
    results = [None] * len(tasks)
    if n_workers <= 1:
        for t in tasks:
            results[t.index] = _run_task(ctx, t)
            bar.update()
        return results
    from concurrent.futures import ProcessPoolExecutor, as_completed

    with ProcessPoolExecutor(max_workers=n_workers, initializer=_install, initargs=(ctx,)) as pool:
        futures = {pool.submit(_run_installed, t): t.index for t in tasks}
        try:
            for fut in as_completed(futures):
                results[futures[fut]] = fut.result()
                bar.update()
        except BaseException:
            pool.shutdown(wait=False, cancel_futures=True)
            raise
    return results


def _connect(address: str, timeout: float):
    try:
        from distributed import Client
    except ImportError:
        raise StimsteerError("running on a Dask cluster (--scheduler) needs Dask's distributed package; install "
                             "the extra: pip install 'stimsteer[dist]'. Or run locally without --scheduler.") from None
    try:
        client = Client(str(address), timeout=f"{timeout}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        raise StimsteerError(
            f"could not reach a Dask scheduler at {address!r} within {timeout:g} s ({exc}). Check the address "
            "(e.g. tcp://host:8786) and that the scheduler is running, or run locally without --scheduler."
        ) from None
    try:
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError) as exc:
        client.close()
        raise StimsteerError(f"the Dask scheduler at {address!r} answered but no worker joined within {timeout:g} s "
                             f"({exc}); start workers (`dask worker {address}`) or run locally.") from None
    return client


def _run_dask(ctx: _Context, tasks, client, bar) -> tuple[list, int]:
    from distributed import as_completed

    results = [None] * len(tasks)
    try:
        ctx_future = client.scatter(ctx, broadcast=True, hash=False)
        futures = [client.submit(_run_task, ctx_future, t, pure=False) for t in tasks]
        index = {f.key: t.index for f, t in zip(futures, tasks)}
        for fut in as_completed(futures, loop=client.loop):
            results[index[fut.key]] = fut.result()
            bar.update()
        n_workers = len(client.scheduler_info().get("workers", {}))
    finally:
        client.close()
    return results, n_workers


def _execute(ctx: _Context, tasks, scheduler, n_workers, progress) -> tuple[list, dict]:
    """Run every task; results come back in task order whatever the order of completion."""
    if scheduler:
        client = _connect(scheduler, ctx.settings.scheduler_timeout_s)
        with _progress_bar(len(tasks), progress) as bar:
            results, used = _run_dask(ctx, tasks, client, bar)
        return results, {"mode": "dask", "scheduler": str(scheduler), "n_workers": used}
    n = _available_cores() if n_workers is None else int(n_workers)
    if n < 1:
        raise InvalidParameterError(f"n_workers must be at least 1; got {n_workers!r}.")
    n = min(n, len(tasks))
    with _progress_bar(len(tasks), progress) as bar:
        results = _run_local(ctx, tasks, n, bar)
    return results, {"mode": "sequential" if n <= 1 else "local processes", "n_workers": n}

