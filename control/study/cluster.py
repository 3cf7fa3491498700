"""A Dask cluster that spends its cores on the study: Dask's background work turned down, glibc's malloc left alone.

A study's tasks are short (a fraction of a second each on the small sessions of the benchmark), so what Dask does
beside them weighs on a 2-worker speed-up. With Dask's defaults, an idle 2-worker ``LocalCluster`` on 127.0.0.1
spent about 0.04 of a core in each worker process and 0.06 in the process that holds the scheduler (measured with
psutil over 10 s, this session); with :data:`CLUSTER_CONFIG`, 0.003-0.005 and 0.009. With one worker that work
runs on the other core and costs nothing; with two it takes time from the tasks. The settings, and why each:

* ``distributed.worker.profile.enabled: False``: the statistical profiler samples the running task's stack every
  10 ms (its figures feed the dashboard, which a study does not use).
* ``distributed.admin.tick.interval: 1s`` (default 20 ms): the event loop's health check, on every server.
* ``distributed.admin.system-monitor.interval: 5s`` (default 500 ms), ``distributed.worker.memory.monitor-interval:
  1s`` (default 100 ms): CPU, memory and disk polls for the dashboard and for the memory thresholds; a study task is
  bounded by one session, so a one-second memory check is enough to pause or restart a runaway worker.
* ``distributed.admin.system-monitor.gil.enabled: False``: GIL contention polling every 1 ms when ``gilknocker`` is
  installed.
* ``MALLOC_TRIM_THRESHOLD_`` unset in the workers' environment (Dask's nanny sets it to 65536 to hand memory back to
  the system sooner): any explicit value turns off glibc's adaptive mmap threshold, so every array above 128 KiB is
  mapped and unmapped again, and each task took about 2,300 page faults instead of 14 (measured last session).

For a cluster started by hand (``dask scheduler``, ``dask worker``), the same settings go in the environment of
those commands (Dask reads ``DASK_`` variables with ``__`` for each level), for example::

    export DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED=False DASK_DISTRIBUTED__ADMIN__TICK__INTERVAL=1s
    export DASK_DISTRIBUTED__NANNY__PRE_SPAWN_ENVIRON__MALLOC_TRIM_THRESHOLD_=None

None of them changes a number: they decide how often Dask looks at its workers, not what the tasks compute.
"""

from __future__ import annotations

import logging

from ...sysid import StimsteerError

__all__ = ["CLUSTER_CONFIG", "local_cluster"]

#: Dask configuration (dotted keys, for ``dask.config.set``) of a cluster that runs a study; see the module docstring.
CLUSTER_CONFIG = {
    "distributed.worker.profile.enabled": False,
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.system-monitor.interval": "5s",
    "distributed.admin.system-monitor.gil.enabled": False,
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
}


def local_cluster(n_workers: int, *, silence_logs: int = logging.WARNING):
    """A Dask ``LocalCluster`` on 127.0.0.1 for a study: ``n_workers`` processes of one thread, no dashboard, with
    :data:`CLUSTER_CONFIG` (its workers keep it: a nanny hands the configuration of its creation to its worker).

    Parameters
    ----------
    n_workers : int
    silence_logs : int, default logging.WARNING
        The level below which the cluster's own log messages are not shown.

    Returns
    -------
    distributed.LocalCluster
        Use it as a context manager; give ``cluster.scheduler_address`` to ``run_study(..., scheduler=...)``.

    Raises
    ------
    StimsteerError
        Dask's distributed package is not installed.
    """
    try:
        import dask
        from distributed import LocalCluster
    except ImportError:
        raise StimsteerError("a Dask cluster needs Dask's distributed package; install the extra: "
                             "pip install 'stimsteer[dist]'. Or run the study locally without --scheduler.") from None
    kwargs = {"n_workers": int(n_workers), "threads_per_worker": 1, "processes": True, "host": "127.0.0.1",
              "dashboard_address": None, "silence_logs": int(silence_logs)}
    with dask.config.set(CLUSTER_CONFIG):
        return LocalCluster(**kwargs)
