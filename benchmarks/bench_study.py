"""Speed, memory, resumption and fault tolerance of a study (control/study/), on an invented cohort made here.

Measured in one run (targets printed, never asserted):

* the study on a Dask LocalCluster (127.0.0.1) with 1 worker and with 2 (one thread each); speed-up of 2 over 1
  (baseline: the 1-worker cluster, same tasks), target >= 1.8; the two must give identical numbers (checked).
  Printed beside it: the machine's own 2-vs-1 ceiling, a pure-CPU job run on the same cluster before and after each
  study run (what any 2-worker speed-up can reach under the load of that moment), and the load average. 1 and 2
  workers run back to back, ``--repeats`` times; each row also says where the time went: the share of the 2-worker
  run's wall time the workers spent in tasks (the rest: start, round trips, the serial description and tables in
  this process, the tail), the tasks' own time with 2 workers against 1 (above 1: the two workers slow each other
  down, or other work took the cores; a task's ``cpu_s`` is its process's CPU time while it ran, so it counts the
  helper threads of its fits and the worker's background work over the task), the workers' whole CPU time per task,
  and the CPU seconds spent beyond the tasks in the workers (Dask's event loop,
  monitors, serialisation) and in this process (client, LocalCluster's scheduler, the study's table), and the
  2-vs-1 ratio these CPU seconds would allow if nothing else ran (Dask's monitors cost CPU per second of wall time,
  so a loaded machine inflates the part beyond the tasks and this estimate is then pessimistic);
* the clusters are made by :func:`~stimsteer.control.study.local_cluster` (Dask's background work turned down,
  glibc's adaptive malloc kept; ``--dask-defaults`` makes them with Dask's own configuration, to compare); each row
  also gives the minor page faults per task in the workers. The study is described once, cold, before the runs
  (printed); both runs then find its files in the description memo;
* peak traced memory (tracemalloc) of the heaviest task of each analysis against the fit of the largest session
  alone (load it, fit both methods on all its trials), target <= 2;
* a rerun after one new session was added, from the cache: tasks computed (printed with the tasks that the new
  session's data touches: its own, and the pooled tasks whose bottom-k draw now takes one of its trials);
* a Dask worker killed (SIGKILL) mid-study: the study completes; rows and numbers identical to the undisturbed run.

Run from the repository root::

    .venv/bin/python benchmarks/bench_study.py [--subjects 40] [--sessions 3] [--analyses sessions,days,subjects,sites]
        [--stages memory,speed,killed,rerun] [--splits N] [--repeats 2] [--dask-defaults]
    .venv/bin/python benchmarks/bench_study.py --speed-only     # the speed-up alone, a few minutes when quiet
"""

from __future__ import annotations

import argparse
import os
import shutil
import signal
import statistics
import tempfile
import threading
import time
import tracemalloc
from pathlib import Path

import pandas as pd

from stimsteer.control.study import StudySettings, describe_study, local_cluster, run_study, run_task, study_tasks
from stimsteer.demo_data.make_study import StudyScenario, make_study
from stimsteer.sysid import load_session, make_estimator

NUMBERS = ["analysis", "subject", "session", "label", "split", "status", "r2_mean", "r2_step1", "r2_last",
           "nrmse_mean", "n_train_trials", "tracking_rms", "energy_ua2", "violations"]


def _numbers(result) -> pd.DataFrame:
    return result.tasks[NUMBERS].sort_values(NUMBERS[:5], ignore_index=True)


DASK_DEFAULTS = False  # --dask-defaults: Dask's own configuration instead of the study's CLUSTER_CONFIG (the before)


def _cluster(n: int):
    if DASK_DEFAULTS:
        from distributed import LocalCluster

        return LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                            dashboard_address=None, silence_logs=50)
    return local_cluster(n, silence_logs=50)


def _traced(fn) -> int:
    tracemalloc.start()
    fn()
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak


def memory(root, st) -> None:
    table = describe_study(root)
    big = table.sessions.sort_values("n_samples").iloc[-1]

    def fit_largest():
        s = load_session(big.file)
        for m in st.methods:
            make_estimator(m.route, m.method, m.settings, past_steps=st.past_steps,
                           horizon_steps=st.horizon_steps).fit(s)
    baseline = _traced(fit_largest)
    tasks, _ = study_tasks(table, st)
    print(f"memory: fit of the largest session ({big.subject}/{big.session}, {big.n_samples} samples) "
          f"{baseline / 1e6:.2f} MB traced (baseline)")
    for kind in ("sessions", "days", "subjects"):
        sample = [t for t in tasks if t.kind == kind][:4]
        if sample:
            peak = max(_traced(lambda t=t: run_task(st, t)) for t in sample)
            print(f"  {kind:9s} task peak {peak / 1e6:.2f} MB  ratio {peak / baseline:.2f}  (target <= 2)")


def _spin(n: int) -> float:
    """A fixed amount of pure-CPU work (no memory traffic to speak of); returns its own wall time."""
    t0 = time.perf_counter()
    x = 0.0
    for i in range(n):
        x += (i % 7) * 0.5
    return time.perf_counter() - t0


def _spin_size(seconds: float) -> int:
    """Iterations of :func:`_spin` that take about ``seconds`` here, now."""
    n = 200_000
    return max(1000, int(n * seconds / max(_spin(n), 1e-6)))


def _warm() -> None:
    """Import what a study task uses, so that neither run times a worker's one-off start-up."""
    import stimsteer.control.study  # noqa: F401 (the study, the benchmark's closed loop, the controllers, sysid)


def cpu_job(address: str, n_tasks: int, size: int) -> float:
    """Wall time of ``n_tasks`` equal pure-CPU tasks submitted to the cluster at ``address``: the same path as the
    study's batches (client, scheduler, worker processes), with nothing to read and no memory to speak of."""
    from distributed import Client

    client = Client(address, set_as_default=False)
    try:
        client.run(_warm)  # every worker warm
        client.gather(client.map(_spin, [1000] * 4, pure=False))
        t0 = time.perf_counter()
        client.gather(client.map(_spin, [size] * n_tasks, pure=False))
        return time.perf_counter() - t0
    finally:
        client.close()


def _load() -> str:
    return "/".join(f"{v:.1f}" for v in os.getloadavg())


def _process_cpu() -> tuple:
    """This process's CPU seconds and minor page faults so far."""
    import resource

    return time.process_time(), resource.getrusage(resource.RUSAGE_SELF).ru_minflt


def _timed_study(address: str, root, st) -> dict:
    """One study run on the cluster at ``address``: wall time, and where the CPU time went (the tasks' own threads;
    the worker processes beyond their tasks: Dask's event loop, (de)serialisation, monitors; this process: client
    and LocalCluster's scheduler)."""
    from distributed import Client

    client = Client(address, set_as_default=False)
    try:
        workers0, here0, t0 = client.run(_process_cpu), time.process_time(), time.perf_counter()
        result = run_study(root, st, scheduler=address)
        wall, here = time.perf_counter() - t0, time.process_time() - here0
        workers1 = client.run(_process_cpu)
    finally:
        client.close()
    workers = sum(workers1[w][0] - workers0[w][0] for w in workers0)
    faults = sum(workers1[w][1] - workers0[w][1] for w in workers0)
    tasks_cpu, tasks_wall = float(result.tasks["cpu_s"].sum()), float(result.tasks["total_s"].sum())
    return {"result": result, "wall": wall, "tasks_cpu": tasks_cpu, "tasks_wall": tasks_wall,
            "workers_extra": workers - tasks_cpu, "client_scheduler": here, "faults": faults / len(result.tasks)}


def _per_task_ms(run: dict) -> float:
    """The workers' whole CPU time (tasks, the helper threads of their fits, Dask's work) per task, in ms."""
    return 1e3 * (run["tasks_cpu"] + run["workers_extra"]) / len(run["result"].tasks)


def _cpu_ratio(one: dict, two: dict) -> float:
    """The 2-vs-1 ratio the CPU seconds allow on an otherwise idle machine: 1 worker takes its tasks' CPU time (Dask
    and this process run on the other core); 2 workers share both cores with everything the run spent."""
    spent = two["tasks_cpu"] + two["workers_extra"] + two["client_scheduler"]
    return 2 * one["tasks_cpu"] / spent


def speed(root, st, repeats: int = 2, cpu_tasks: int = 16, cpu_task_s: float = 0.25):
    """The study on 1 worker and on 2, back to back, ``repeats`` times; each run between two runs of a pure-CPU job
    on the same cluster (the machine's own 2-vs-1 ceiling under the load of that moment, measured the same way).
    Workers have imported the toolkit before either is timed (a one-off start-up per worker, not part of a study's
    throughput), the same for 1 and 2 workers."""
    size, t_start, rows, runs = _spin_size(cpu_task_s), time.perf_counter(), [], {}
    # the description is made once here, cold (both runs then find each file's content in this process's memo by
    # path, size and modification time: the 2-worker run, which comes second, gains nothing the 1-worker run lacks)
    t0, c0 = time.perf_counter(), time.process_time()
    describe_study(root)
    t1, c1 = time.perf_counter(), time.process_time()
    describe_study(root)
    print(f"  description: {t1 - t0:.2f} s ({c1 - c0:.2f} s CPU) cold, {time.perf_counter() - t1:.3f} s again; "
          f"cluster configuration: {'Dask defaults' if DASK_DEFAULTS else 'CLUSTER_CONFIG'}")
    print("  | rep | load before | 1 worker | 2 workers | study 2-vs-1 | pure-CPU 2-vs-1 (ceiling) | study / ceiling "
          "| 2 workers: workers busy | task time 2w / 1w | CPU beyond tasks (workers; client+scheduler) "
          "| CPU-accounted 2-vs-1 | worker page faults per task 1w; 2w | worker CPU per task 1w; 2w |")
    print("  | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for rep in range(repeats):
        load, cpu = _load(), {}
        for n in (1, 2):
            with _cluster(n) as cluster:
                before = cpu_job(cluster.scheduler_address, cpu_tasks, size)
                runs[n] = _timed_study(cluster.scheduler_address, root, st)
                cpu[n] = before + cpu_job(cluster.scheduler_address, cpu_tasks, size)
        one, two = runs[1], runs[2]
        ratio, ceiling = one["wall"] / two["wall"], cpu[1] / cpu[2]
        busy = two["tasks_wall"] / (2 * two["wall"])
        rows.append((ratio, ceiling, _numbers(one["result"]).equals(_numbers(two["result"]))))
        print(f"  | {rep + 1} | {load} | {one['wall']:.1f} s | {two['wall']:.1f} s | {ratio:.2f}x | {ceiling:.2f}x | "
              f"{ratio / ceiling:.2f} | {busy:.0%} | {two['tasks_wall'] / one['tasks_wall']:.2f} (CPU "
              f"{two['tasks_cpu'] / one['tasks_cpu']:.2f}) | 1w {one['workers_extra']:.1f}; {one['client_scheduler']:.1f} s"
              f" - 2w {two['workers_extra']:.1f}; {two['client_scheduler']:.1f} s | {_cpu_ratio(one, two):.2f}x | "
              f"{one['faults']:.0f}; {two['faults']:.0f} | {_per_task_ms(one):.0f}; {_per_task_ms(two):.0f} ms |")
    ex = runs[2]["result"].provenance["execution"]
    ratio, rel = statistics.median(r[0] for r in rows), statistics.median(r[0] / r[1] for r in rows)
    print(f"speed: {len(runs[1]['result'].tasks)} tasks in {ex['n_batches']} batches; study 2-vs-1 median "
          f"{ratio:.2f}x (target >= 1.8), study / ceiling median {rel:.2f}; "
          f"identical numbers with 1 and 2 workers: {all(r[2] for r in rows)}; load now {_load()}; "
          f"section wall time {time.perf_counter() - t_start:.0f} s")
    return runs[2]["result"]


def killed(root, st, reference, cache) -> None:
    from distributed import Client

    with _cluster(2) as cluster:
        client = Client(cluster.scheduler_address, set_as_default=False)
        pids = list(client.run(os.getpid).values())
        client.close()
        box = {}
        thread = threading.Thread(target=lambda: box.update(r=run_study(root, st, scheduler=cluster.scheduler_address,
                                                                       cache=cache)))
        thread.start()
        n_tasks = len(reference.tasks)
        while len(list(Path(cache).glob("*.json"))) < n_tasks // 3 and thread.is_alive():
            time.sleep(0.05)
        os.kill(pids[0], signal.SIGKILL)
        thread.join()
    r = box["r"]
    same = _numbers(r).equals(_numbers(reference))
    print(f"killed worker (pid {pids[0]}) after a third of the tasks: rows {len(r.tasks)} (undisturbed "
          f"{n_tasks}), duplicated {int(r.tasks.duplicated(NUMBERS[:5]).sum())}, identical numbers: {same}")


def rerun(root, st, cache, tmp: Path) -> None:
    extra = StudyScenario(n_subjects=1, n_sessions=4, n_trials=st_trials(root))
    make_study(tmp / "extra", extra)
    shutil.copy(tmp / "extra" / "s01" / "day4.h5", Path(root) / "s01" / "day4.h5")
    table = describe_study(root)
    new = table.sessions.set_index(["subject", "session"]).loc[("s01", "day4"), "content_hash"]
    tasks, _ = study_tasks(table, st)
    own = sum(t.test.content_hash == new for t in tasks)
    pooled = sum(t.test.content_hash != new and new in {r.content_hash for r in t.train} for t in tasks)
    result = run_study(table, st, cache=cache, n_workers=2)
    print(f"rerun with one new session: {result.n_computed} of {len(tasks)} tasks computed; the new session's own "
          f"tasks {own}, pooled tasks whose draw now takes one of its trials {pooled} (expected {own + pooled})")


def st_trials(root) -> int:
    return int(describe_study(root).sessions["n_trials"].max())


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--subjects", type=int, default=40)
    p.add_argument("--sessions", type=int, default=3)
    p.add_argument("--trials", type=int, default=6)
    p.add_argument("--splits", type=int, default=None, help="seeded splits per session (default: the quick 2)")
    p.add_argument("--analyses", default="sessions,days,subjects,sites")
    p.add_argument("--stages", default="memory,speed,killed,rerun", help="which measurements to run")
    p.add_argument("--repeats", type=int, default=2, help="back-to-back 1- and 2-worker runs of the speed stage")
    p.add_argument("--speed-only", action="store_true",
                   help="only the 2-vs-1 speed-up, on 40 x 3 sessions, per-session analysis with its closed loops, "
                        "one split (a few minutes on a quiet 2-core machine)")
    p.add_argument("--dask-defaults", action="store_true",
                   help="clusters with Dask's own configuration instead of the study's CLUSTER_CONFIG (to compare)")
    a = p.parse_args()
    global DASK_DEFAULTS
    DASK_DEFAULTS = a.dask_defaults
    if a.speed_only:
        a.stages, a.analyses, a.splits = "speed", "sessions", a.splits or 1
    stages = set(a.stages.split(","))
    st = StudySettings.quick(analyses=tuple(a.analyses.split(",")))
    if a.splits is not None:
        st = st.replace(n_splits=a.splits)
    t_start = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        root = tmp / "study"
        make_study(root, StudyScenario(n_subjects=a.subjects, n_sessions=a.sessions, n_trials=a.trials))
        print(f"study: {a.subjects} subjects x {a.sessions} sessions x {a.trials} trials; analyses {st.analyses}; "
              f"{st.n_splits} split(s); closed loop {'on' if st.control is not None else 'off'}; "
              f"{os.cpu_count()} cores; load average {_load()}")
        if "memory" in stages:
            memory(root, st)
        if "speed" in stages:
            reference = speed(root, st, repeats=a.repeats)
        elif stages & {"killed", "rerun"}:  # the undisturbed reference for the killed-worker run, without timing it
            reference = run_study(root, st, n_workers=2)
        if "killed" in stages:
            killed(root, st, reference, tmp / "cache")
        if "rerun" in stages:
            rerun(root, st, tmp / "cache", tmp)
    print(f"total wall time {time.perf_counter() - t_start:.0f} s")


if __name__ == "__main__":
    main()
