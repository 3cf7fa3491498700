"""Real-time scheduling and locked memory for a live run, on request: :func:`request`, :func:`restore`.

A loop in a lab typically runs with a real-time scheduling class (``SCHED_FIFO``: no ordinary process preempts it),
on one core, with its memory locked (no page of it is paged out or faulted in from disk mid-run). A process gets
those only when the system allows it (root, or ``CAP_SYS_NICE`` / an ``RLIMIT_RTPRIO``, and ``CAP_IPC_LOCK`` / an
``RLIMIT_MEMLOCK`` large enough). So they are asked for, never required: each one that is refused is reported with
the system's reason and the run goes on without it. Everything granted is undone when the run ends.

Decisions
    * The scheduling class applies to the calling thread only (Linux: ``pid`` 0 is the caller), the one that runs
      the loop; its priority is the middle of the ``SCHED_FIFO`` range (above ordinary work, below the kernel's own
      real-time threads).
    * The core: the highest one the process may run on (core 0 takes most interrupts on a typical machine).
    * Memory: ``mlockall(MCL_CURRENT | MCL_FUTURE | MCL_ONFAULT)``: resident pages stay resident and pages touched
      later are locked as they are touched, without faulting in every mapped page of every library at once (the
      runner touches its buffers before the run). A system without ``MCL_ONFAULT`` (Linux < 4.4) reports it refused.
    * Under ``SCHED_FIFO`` the runner sleeps until 30 µs before a tick and spins only from there (a real-time
      thread's sleep wakes within ~25 µs, p99 on a loaded 2-core VM), instead of 0.5 ms: a loop spinning its core
      full would meet the kernel's real-time throttling (by default 0.95 s of each second, then a 50 ms stall).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os

__all__: list = []

_MCL_CURRENT, _MCL_FUTURE, _MCL_ONFAULT = 1, 2, 4


def _libc():
    name = ctypes.util.find_library("c")
    return None if name is None else ctypes.CDLL(name, use_errno=True)


def request() -> tuple[dict, list]:
    """Ask for ``SCHED_FIFO``, one core and locked memory; ``(report, undo)``: what was granted or why not (JSON
    ready), and the steps that undo what was granted (for :func:`restore`)."""
    report, undo = {"requested": True}, []
    report["sched_fifo"] = _fifo(undo)
    report["cpu"] = _affinity(undo)
    report["memory_locked"] = _lock(undo)
    return report, undo


def restore(undo) -> None:
    """Undo what :func:`request` granted, last first; a step that fails does not stop the others."""
    for step in reversed(undo):
        try:
            step()
        except OSError:
            pass


def _fifo(undo):
    if not hasattr(os, "sched_setscheduler"):
        return "refused: this system has no sched_setscheduler"
    try:
        policy, param = os.sched_getscheduler(0), os.sched_getparam(0)
        prio = (os.sched_get_priority_min(os.SCHED_FIFO) + os.sched_get_priority_max(os.SCHED_FIFO)) // 2
        os.sched_setscheduler(0, os.SCHED_FIFO, os.sched_param(prio))
    except OSError as exc:
        return f"refused: {exc.strerror or exc}"
    undo.append(lambda: os.sched_setscheduler(0, policy, param))
    return f"granted, priority {prio}"


def _affinity(undo):
    if not hasattr(os, "sched_setaffinity"):
        return "refused: this system has no sched_setaffinity"
    try:
        before = os.sched_getaffinity(0)
        core = max(before)
        os.sched_setaffinity(0, {core})
    except (OSError, ValueError) as exc:
        return f"refused: {getattr(exc, 'strerror', None) or exc}"
    undo.append(lambda: os.sched_setaffinity(0, before))
    return f"granted, core {core}"


def _lock(undo):
    libc = _libc()
    if libc is None or not hasattr(libc, "mlockall"):
        return "refused: no C library with mlockall"
    if libc.mlockall(_MCL_CURRENT | _MCL_FUTURE | _MCL_ONFAULT) != 0:
        return f"refused: {os.strerror(ctypes.get_errno())}"
    undo.append(lambda: libc.munlockall())
    return "granted"
