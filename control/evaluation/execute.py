"""Where the tasks run: in this process, on a local process pool, or on a Dask cluster.

Results come back in task order whatever the order of completion, and every task limits BLAS to one thread, so the
numbers do not depend on where a task ran; only the timing columns do.
"""

from __future__ import annotations

import contextlib
import copy
import dataclasses
import os
import signal
import socket
import sys
import threading
import time

from ...sysid import InvalidParameterError, StimsteerError
from .references import base_tasks, has_references, reference_rows
from .task_body import (_run_task, _session_at, chooses_routes, inner_score_of, one_thread, route_choice_of, run_group,
                        skip_reason)
from .tasks import _cached, _Context, _Task, fit_groups

_INSTALLED: dict = {}


def _install(ctx: _Context, parent_pid: int | None = None) -> None:
    _INSTALLED["ctx"] = ctx
    if parent_pid is not None:
        _follow_parent(parent_pid)


def _follow_parent(parent_pid: int) -> None:
    """Make a pool worker end with the run that started it, however that run ends.

    Workers are forked, so they inherit the parent's signal handlers: SIGTERM gets its default action back (end at
    once; the parent's handler would unwind a task and print its traceback), and SIGINT is ignored (Ctrl-C reaches
    the whole process group; the parent stops the workers). When the parent dies without stopping them (kill -9),
    Linux sends them SIGTERM (``prctl(PR_SET_PDEATHSIG)``); elsewhere a watchdog thread checks the parent's id.
    """
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # the death signal follows the process that forked us: only when that is the run itself (the "fork" start
    # method; a "forkserver" or "spawn" worker has another parent and is watched instead)
    if os.getppid() == parent_pid and _death_signal(signal.SIGTERM):
        if os.getppid() != parent_pid:  # the run died before the death signal was set up
            os._exit(1)
        return
    threading.Thread(target=_watch_parent, args=(parent_pid,), daemon=True).start()


def _death_signal(signum: int) -> bool:
    """``prctl(PR_SET_PDEATHSIG, signum)`` on Linux (1 is PR_SET_PDEATHSIG in <linux/prctl.h>); False elsewhere."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes

        return ctypes.CDLL(None, use_errno=True).prctl(1, int(signum), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def _watch_parent(parent_pid: int, every_s: float = 1.0) -> None:
    while _running(parent_pid):
        time.sleep(every_s)
    os._exit(1)


def _running(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def _release_held(futures) -> None:
    """Release every lock of ``futures`` this thread still holds after an interruption.

    ``concurrent.futures.wait`` takes the lock of every future one by one before it waits, and a Ctrl-C or SIGTERM
    raised part-way through leaves the ones already taken held (the taking cannot be undone half-way; CPython 3.11).
    The pool's management thread, marking those futures cancelled or broken at shutdown, then waits on them forever,
    and so does the shutdown: seen once in about 15 runs of ``tests/cli/test_interruption.py``."""
    for fut in futures:
        cond = getattr(fut, "_condition", None)
        owned = getattr(cond, "_is_owned", None)
        while owned is not None and owned():
            cond.release()


def _stop_workers(pool, futures=()) -> None:
    """End a process pool's workers now (an interruption): running tasks are abandoned, not awaited; the locks of
    ``futures`` (the pool's jobs) that the interruption left held are released first (:func:`_release_held`)."""
    pending = getattr(pool, "_pending_work_items", None) or {}
    _release_held([*futures, *(getattr(w, "future", None) for w in list(pending.values()))])
    # ProcessPoolExecutor has no public way to end running workers; its ``_processes`` maps pid -> Process.
    for proc in list((getattr(pool, "_processes", None) or {}).values()):
        with contextlib.suppress(Exception):
            proc.terminate()
    # A worker ended while it wrote a result leaves half a message in the result pipe, and the management thread
    # would wait for the rest forever (and the shutdown on it). With this process's write end closed, the pipe ends
    # (EOF) once the workers are gone, and the management thread takes the pool as broken and ends.
    with contextlib.suppress(Exception):
        pool._result_queue._writer.close()
    pool.shutdown(wait=True, cancel_futures=True)


def _group_installed(group, sessions: dict) -> list:
    """:func:`~.task_body.run_group` on a worker, with the re-recorded sessions the parent already has (as
    :func:`_packed` forms)."""
    ctx = _INSTALLED["ctx"]
    for scale, packed in sessions.items():  # computed once on one worker (_session_installed), not again here
        _cached((ctx.token, "session", scale), lambda p=packed: _unpacked(p, ctx.session.metadata))
    return run_group(ctx, group)


def _session_installed(scale: float) -> tuple:
    """The session re-recorded at ``scale`` on a worker, as :func:`_packed` sends it."""
    ctx = _INSTALLED["ctx"]
    return _packed(_session_at(ctx, scale), ctx.session.metadata)


def _packed(session, base: dict) -> tuple:
    """``(session, keys, shared)`` to send a session derived from the run's session to another process: the
    metadata values it shares with the run's session ``base`` (the same objects, e.g. the recording's pulse table)
    left out (every process of the pool has them), ``keys`` the metadata's keys in order, ``shared`` those left out.

    The demo's re-recorded session went through the pool's pipes seven times with a 1.1 MB pulse table of Python
    lists in its metadata: 25-35 ms to pickle and as much to unpickle each time, more than its arrays."""
    meta = session.metadata
    shared = frozenset(k for k, v in meta.items() if k in base and base[k] is v)
    if not shared:
        return session, None, shared
    light = copy.copy(session)  # a frozen dataclass: copied without validating its arrays again
    object.__setattr__(light, "metadata", {k: v for k, v in meta.items() if k not in shared})
    return light, tuple(meta), shared


def _unpacked(packed: tuple, base: dict):
    """The session :func:`_packed` sent, with its metadata whole again (in its order) from ``base``."""
    light, keys, shared = packed
    if keys is None:
        return light
    session = copy.copy(light)
    object.__setattr__(session, "metadata", {k: base[k] if k in shared else light.metadata[k] for k in keys})
    return session


def _inner_installed(split_index: int, split, method_index: int) -> tuple:
    """The inner score of one method on one split and the seconds it took (to put the longest jobs first)."""
    t0 = time.perf_counter()
    score = inner_score_of(_INSTALLED["ctx"], split_index, split, method_index)
    return score, time.perf_counter() - t0


def _available_cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


class _NoBar:
    """The progress bar when none is shown: counts nothing, and tqdm is not imported (0.04 s, with asyncio, before
    the pool's workers start)."""

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        return None

    def update(self, n: int = 1) -> None:
        pass


def _progress_bar(total: int, enabled: bool):
    if not enabled:
        return _NoBar()
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="stimsteer bench", unit="task", disable=not enabled, file=sys.stderr,
                dynamic_ncols=True, leave=False)


# File descriptors a process pool needs beyond what the parent already holds: the pool's own queues and wake-up
# pipe (8, measured with CPython 3.11's ProcessPoolExecutor on Linux), one sentinel and one spare per worker, and
# room for a task to open its session and write its results in a worker that inherits the parent's table.
_POOL_FDS, _PER_WORKER_FDS, _TASK_FDS = 8, 2, 4


def check_descriptors(n_workers: int) -> None:
    """Refuse, before any worker starts, a pool the open-file limit cannot hold.

    A pool that runs out of descriptors part-way can fail inside its management thread and then wait forever for
    workers that never started; checking first turns that into one clear line.

    Raises
    ------
    StimsteerError
        Fewer free descriptors (``ulimit -n``) than ``n_workers`` processes need.
    """
    import resource

    soft, _ = resource.getrlimit(resource.RLIMIT_NOFILE)
    try:
        in_use = len(os.listdir("/proc/self/fd")) - 1  # the listing's own descriptor is closed again
    except OSError:  # no /proc (not Linux): nothing to measure against
        return
    need = in_use + _POOL_FDS + _PER_WORKER_FDS * n_workers + _TASK_FDS
    if soft != resource.RLIM_INFINITY and need > soft:
        raise StimsteerError(
            f"too few file descriptors for {n_workers} worker processes: the open-file limit is {soft}, {in_use} are "
            f"in use and the workers need about {need}. Raise the limit (e.g. ulimit -n 1024) or run with "
            "--workers 1.")


def _run_local(ctx: _Context, tasks, n_workers: int, bar) -> tuple[list, object]:
    """The tasks' results in task order, and the references' rows when the pool computed them (else None).

    Tasks that fit the same model (:func:`~.tasks.fit_groups`) run as one job with one fit, here and on the pool.
    """
    results = [None] * len(tasks)
    if n_workers > 1:
        check_descriptors(n_workers)
    if n_workers <= 1:
        for group in fit_groups(ctx.settings, tasks):
            for t, out in zip(group, run_group(ctx, group)):
                results[t.index] = out
                bar.update()
        return results, None
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(max_workers=n_workers, initializer=_install, initargs=(ctx, os.getpid())) as pool:
        schedule = _PoolSchedule(pool, ctx, tasks, results, bar, n_workers)
        try:
            refs = schedule.run()
        except BaseException:  # Ctrl-C, SIGTERM, a failure: no worker outlives the run
            _stop_workers(pool, schedule.submitted)
            raise
    return results, refs


class _PoolSchedule:
    """The pool's jobs, each submitted as soon as what it needs is known, so that no worker waits on another.

    First the jobs the tasks wait for: the noise sweep's re-recorded sessions (one job per noise level, shipped to
    the tasks that need them instead of computed again on every worker) and the inner scores of the route choice
    (one job per split and method). A split's tasks are submitted when its own inner scores are in (not when every
    split's are): those that steer a closed loop (the longest) at once, the others held back and submitted after
    the references, longest method first (by the inner jobs' measured time), so that short jobs fill the workers at
    the end; held jobs are submitted early whenever fewer than ``n_workers + 1`` jobs are in flight. Skipped tasks
    get their result here, as the task would decide it. Results are placed by task index: the order of execution
    never changes a number.
    """

    def __init__(self, pool, ctx: _Context, tasks, results, bar, n_workers: int):
        self.pool, self.ctx, self.tasks, self.results, self.bar = pool, ctx, tasks, results, bar
        self.depth = n_workers + 1
        self.futures: dict = {}  # future -> (kind, what)
        self.submitted: list = []  # every future, done or not (their locks are released on an interruption)
        self.scores: dict = {}  # (split, method index) -> (score, seconds)
        self.sessions: dict = {}  # noise scale -> re-recorded session
        self.waiting: list = []  # groups that wait for a re-recorded session
        self.held: list = []  # groups without a closed loop, submitted last
        self.unreleased = sorted({t.split_index for t in tasks})
        self.refs, self.tail_sent = None, False

    def run(self) -> object:
        from concurrent.futures import FIRST_COMPLETED, wait

        st = self.ctx.settings
        for scale in sorted({t.setting.noise_scale for t in self.tasks} - {1.0}):
            self._submit(("session", scale), _session_installed, scale)
        if chooses_routes(st):
            splits = {t.split_index: t.split for t in self.tasks}
            for i, split in splits.items():
                for k in range(len(st.methods)):
                    self._submit(("inner", (i, k)), _inner_installed, i, split, k)
        else:
            for i in list(self.unreleased):
                self._release(i, None)
        self._fill()
        while self.futures:
            done, _ = wait(list(self.futures), return_when=FIRST_COMPLETED)
            for fut in done:
                self._done(fut, *self.futures.pop(fut))
            self._fill()
        return _reference_results(self.refs or [])

    def _submit(self, what, fn, *args) -> None:
        fut = self.pool.submit(fn, *args)
        self.futures[fut] = what
        self.submitted.append(fut)

    def _done(self, fut, kind, what) -> None:
        if kind == "group":
            for t, out in zip(what, fut.result()):
                self.results[t.index] = out
                self.bar.update()
        elif kind == "session":
            self.sessions[what] = fut.result()
            ready = [g for g in self.waiting if g[0].setting.noise_scale in self.sessions]
            self.waiting = [g for g in self.waiting if g[0].setting.noise_scale not in self.sessions]
            for group in ready:
                self._submit_group(group)
        elif kind == "inner":
            self.scores[what] = fut.result()
            i, n = what[0], len(self.ctx.settings.methods)
            if all((i, k) in self.scores for k in range(n)):
                st = self.ctx.settings
                self._release(i, route_choice_of(st, {m.label: self.scores[(i, k)][0]
                                                      for k, m in enumerate(st.methods)}))

    def _release(self, split_index: int, choice) -> None:
        """Submit the split's tasks that steer a closed loop, hold the others; record the skipped ones."""
        self.unreleased.remove(split_index)
        runs = []
        for t in self.tasks:
            if t.split_index != split_index:
                continue
            t = dataclasses.replace(t, choice=choice)
            skipped = skip_reason(self.ctx.settings, t, choice)
            if skipped:
                self.results[t.index] = {"skipped": skipped, "warnings": [], "task": t.index, "total_s": 0.0}
                self.bar.update()
            else:
                runs.append(t)
        groups = sorted(fit_groups(self.ctx.settings, runs), key=self._cost, reverse=True)
        for group in groups:
            if any(_steers(self.ctx, t) for t in group):
                self._submit_group(group)
            else:
                self.held.append(group)
        self.held.sort(key=self._cost, reverse=True)

    def _submit_group(self, group) -> None:
        scale = group[0].setting.noise_scale
        if scale != 1.0 and scale not in self.sessions:
            self.waiting.append(group)
            return
        self._submit(("group", group), _group_installed, group,
                     {scale: self.sessions[scale]} if scale != 1.0 else {})

    def _fill(self) -> None:
        """The references and the held groups once every split is out; before that, enough to keep workers busy."""
        if not self.unreleased and not self.waiting and not self.tail_sent:
            self.tail_sent = True
            if has_references(self.ctx):
                self.refs = [self.pool.submit(_reference_installed, t) for t in base_tasks(self.tasks,
                                                                                            self.ctx.settings)]
            while self.held:
                self._submit_group(self.held.pop(0))
        while self.held and len(self.futures) < self.depth:
            self._submit_group(self.held.pop(0))

    def _cost(self, group) -> tuple:
        """Measured seconds of the method's inner jobs (0 when there were none), then the tasks in the group."""
        k = group[0].method_index
        seconds = [v[1] for (i, m), v in self.scores.items() if m == k]
        return (sum(seconds) / len(seconds) if seconds else 0.0, len(group))


def _reference_installed(task: _Task) -> list:
    """:func:`~.references.reference_rows` of one split on a worker, with single-threaded BLAS (as a task); a
    toolkit error is returned, not raised (the references are then left out, the routes' results stand)."""
    with one_thread():
        try:
            return reference_rows(_INSTALLED["ctx"], task)
        except StimsteerError as exc:
            return exc


def _reference_results(futures) -> object:
    """The references' rows of every split, or None: none were submitted, or one failed (then they are computed
    again where the run assembles its result, which leaves them out the same way)."""
    rows = [f.result() for f in futures]
    if not rows or any(isinstance(r, StimsteerError) for r in rows):
        return None
    return rows


def _steers(ctx: _Context, task: _Task) -> bool:
    """Whether the task steers a closed loop (the longest tasks): control is on and it is its route's choice."""
    st, choice = ctx.settings, task.choice
    spec = st.methods[task.method_index]
    return st.control is not None and (choice is None or choice.get(spec.route, spec.label) == spec.label)


_SCHEMES = ("tcp", "tls", "ws", "wss", "ucx", "inproc")


def check_scheduler_address(address) -> str:
    """Check a Dask scheduler address (``tcp://host:8786``, ``host:8786``) without contacting it; return it.

    Raises
    ------
    InvalidParameterError
        An address that cannot be parsed (unknown protocol, no host, a port that is not a number in 1-65535).
    """
    text = str(address).strip()
    scheme, sep, rest = text.rpartition("://")
    scheme = scheme if sep else "tcp"
    host, colon, port = rest.rpartition(":")
    problem = None
    if scheme not in _SCHEMES:
        problem = f"unknown protocol {scheme!r} (expected one of {', '.join(_SCHEMES)})"
    elif scheme != "inproc" and (not colon or not host):
        problem = "expected a host and a port"
    elif any(c.isspace() for c in host):
        problem = f"the host {host!r} contains spaces"
    elif scheme != "inproc" and not (port.isdigit() and 0 < int(port) < 65536):
        problem = f"the port {port!r} is not a number between 1 and 65535"
    if problem:
        raise InvalidParameterError(f"--scheduler {text!r} is not a scheduler address: {problem}. Give it as "
                                    "tcp://HOST:PORT (e.g. tcp://127.0.0.1:8786), or run locally without --scheduler.")
    return text if sep else f"tcp://{text}"


def _reachable(address: str, timeout: float) -> None:
    """Open and close a TCP connection to a tcp:// scheduler first: a refused or unknown host fails here, at once,
    instead of inside Dask's client, whose clean-up after a failed start waits another 20 s."""
    scheme, _, rest = address.rpartition("://")
    if scheme != "tcp":
        return
    host, _, port = rest.rpartition(":")
    try:
        socket.create_connection((host.strip("[]"), int(port)), timeout=timeout).close()
    except OSError as exc:
        raise StimsteerError(
            f"could not reach a Dask scheduler at {address!r} within {timeout:g} s ({exc.strerror or exc}). Check "
            "the address (e.g. tcp://host:8786) and that the scheduler is running, or run locally without --scheduler."
        ) from None


def _connect(address: str, timeout: float):
    try:
        from distributed import Client
    except ImportError:
        raise StimsteerError("running on a Dask cluster (--scheduler) needs Dask's distributed package; install "
                             "the extra: pip install 'stimsteer[dist]'. Or run locally without --scheduler.") from None
    address = check_scheduler_address(address)
    _reachable(address, timeout)
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


def _execute(ctx: _Context, tasks, scheduler, n_workers, progress) -> tuple[list, dict, object]:
    """Run every task; results come back in task order whatever the order of completion. Also returns the
    references' rows when a local pool computed them beside the tasks (else None: computed by the caller)."""
    if scheduler:
        client = _connect(scheduler, ctx.settings.scheduler_timeout_s)
        with _progress_bar(len(tasks), progress) as bar:
            results, used = _run_dask(ctx, tasks, client, bar)
        return results, {"mode": "dask", "scheduler": str(scheduler), "n_workers": used}, None
    n = _available_cores() if n_workers is None else int(n_workers)
    if n < 1:
        raise InvalidParameterError(f"n_workers must be at least 1; got {n_workers!r}.")
    n = min(n, len(tasks))
    with _progress_bar(len(tasks), progress) as bar:
        results, refs = _run_local(ctx, tasks, n, bar)
    return results, {"mode": "sequential" if n <= 1 else "local processes", "n_workers": n}, refs

