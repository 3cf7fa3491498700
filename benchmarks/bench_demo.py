"""Wall time of ``stimsteer demo``, end to end in a fresh process, per step and in total, beside the load average.

Target (issue 20): the whole demo in 12 s or less on an idle 2-core machine. The demo runs in a child process, as
``stimsteer demo --out DIR`` does; a small driver times each step's start and end (the benchmark step runs in a
process of its own beside the others, so steps overlap), the imports before the first step, and the process as a
whole. The 1-minute load average is printed before and after: on a shared machine the figures are only comparable
with a run made just before or after under the same load.

Run from the repository root::

    .venv/bin/python benchmarks/bench_demo.py [--repeats 1] [--keep DIR] [--bench-parts] [--parts-only]

Each step's CPU time is printed beside its wall time (the process's own and that of its children that ended, so the
bench step's includes its pool's workers): less sensitive to the load than wall time. ``--bench-parts`` then runs
the demo's bench step again in this process and prints the wall and CPU time of its parts (worker pool, assembly,
figures, page).

Python's bytecode cache: a default Python writes each module's compiled form beside it (``__pycache__``) the first
time it is imported, so from the second run on a user's demo does not compile the package again. An environment
that sets ``PYTHONDONTWRITEBYTECODE`` (some containers and CI images do) compiles every module in every run: about
0.8 s more on the demo's critical path. By default the benchmark measures as a default install does: it compiles the
package's modules first (``compileall``, once) and runs the demo without that variable. ``--no-bytecode-cache``
measures as this environment is set instead (both are printed with the setting used).

``--keep DIR`` keeps the last run's output folder (e.g. to compare it with the stored golden numbers:
``python -c "import sys; sys.path.insert(0, 'tests'); import golden; print(golden.compare(golden.load_stored(),
golden.snapshot('DIR')))"``).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# The child: import the command line, time every step through the demo's step runner, run the demo. Step times
# are appended to a file, one JSON line each, from whichever process ran the step.
_DRIVER = r"""
import json, os, sys, time
t0 = time.time()
from stimsteer.control.cli import leave, main
from stimsteer.control.demo import run_demo
log, out = sys.argv[1], sys.argv[2]
def cpu():  # this process and its children that have ended (a step's pool workers are joined when it ends)
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system
def step(argv):
    start, c0 = time.time(), cpu()
    code = main(argv)
    with open(log, "a", encoding="utf-8") as fh:
        fh.write(json.dumps({"step": argv[0], "out": argv[argv.index("--out") + 1] if "--out" in argv else "",
                             "start": start, "end": time.time(), "pid": os.getpid(), "code": code,
                             "cpu": cpu() - c0}) + "\n")
    return code
with open(log, "a", encoding="utf-8") as fh:
    fh.write(json.dumps({"imports": time.time() - t0}) + "\n")
run_demo(out, run_step=step, echo=lambda text: None)
leave(0)  # as the `stimsteer` command ends (cli.run): exit handlers, no module teardown
"""


def _environment(bytecode_cache: bool) -> dict:
    """The demo's environment: this one, with Python's bytecode cache allowed when ``bytecode_cache`` (and the
    package compiled once beforehand, as a first run on a default install leaves it)."""
    env = dict(os.environ)
    if bytecode_cache:
        env.pop("PYTHONDONTWRITEBYTECODE", None)
        subprocess.run([sys.executable, "-m", "compileall", "-q", *_package_dirs()], env=env, check=True,
                       capture_output=True)
    return env


def _package_dirs() -> list:
    """The installed package's source folders (an editable install maps ``stimsteer.*`` onto the repository's
    top-level folders ``sysid``, ``control`` and ``demo_data``)."""
    import importlib

    return sorted({str(Path(importlib.import_module(f"stimsteer.{name}").__file__).parent)
                   for name in ("sysid", "control", "demo_data")})


def _one_run(out: Path, env: dict) -> dict:
    log = out.parent / "steps.jsonl"
    log.unlink(missing_ok=True)
    load = os.getloadavg()[0]
    c0 = _children_cpu()
    t0 = time.time()
    proc = subprocess.run([sys.executable, "-c", _DRIVER, str(log), str(out)], capture_output=True, text=True,
                          env=env)
    wall = time.time() - t0
    cpu = _children_cpu() - c0  # the demo's process and every process it waited for (steps, bench child, workers)
    if proc.returncode != 0:
        raise SystemExit(f"the demo failed (exit code {proc.returncode}): {proc.stderr.strip()[-2000:]}")
    lines = [json.loads(x) for x in log.read_text(encoding="utf-8").splitlines()]
    imports = next(x["imports"] for x in lines if "imports" in x)
    steps = [x for x in lines if "step" in x]
    return {"wall": wall, "imports": imports, "steps": steps, "t0": t0, "load_before": load,
            "load_after": os.getloadavg()[0], "cpu": cpu}


def _children_cpu() -> float:
    import resource

    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def _cores() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()


def _print_run(run: dict) -> None:
    main_pid = min(s["pid"] for s in run["steps"])  # the demo's own process (the background step is its child)
    print(f"{'step':<12} {'output':<26} {'start s':>8} {'wall s':>8} {'CPU s':>7}  process")
    for s in sorted(run["steps"], key=lambda s: s["start"]):
        where = "demo" if s["pid"] == main_pid else "beside (child)"
        print(f"{s['step']:<12} {Path(s['out']).name:<26} {s['start'] - run['t0']:8.2f} {s['end'] - s['start']:8.2f}"
              f" {s.get('cpu', float('nan')):7.2f}  {where}")
    parent = sum(s.get("cpu", 0.0) for s in run["steps"] if s["pid"] == main_pid)
    print(f"CPU of the steps in the demo's process {parent:.2f} s, of the step beside it (with its workers) "
          f"{sum(s.get('cpu', 0.0) for s in run['steps'] if s['pid'] != main_pid):.2f} s")
    print(f"imports before the first step: {run['imports']:.2f} s")
    print(f"CPU of the whole demo (every process) {run['cpu']:.2f} s: the {_cores()} cores were busy with it "
          f"{run['cpu'] / (_cores() * run['wall']):.0%} of its wall time (on an idle machine, 100 % is the floor "
          f"of {run['cpu'] / _cores():.1f} s)")
    print(f"stimsteer demo end to end (fresh process): {run['wall']:.2f} s   (target <= 12 s on an idle 2-core "
          f"machine); 1-minute load average {run['load_before']:.2f} before, {run['load_after']:.2f} after")


def _cpu() -> float:
    t = os.times()  # this process and its children that have ended (the pool's workers, joined with the pool)
    return t.user + t.system + t.children_user + t.children_system


def bench_parts(n_workers: int = 2) -> dict:
    """The demo's bench step in this process, by parts: ``(wall s, CPU s)`` of the worker pool (with the
    references when the pool runs them), the assembly of the result, the figures drawn one after the other and side
    by side, the page and tables, and the whole report folder as ``stimsteer bench`` writes it (figures side by side
    while this process writes the tables and JSON). The sum counts the figures twice (both ways)."""
    import io
    import contextlib

    from threadpoolctl import threadpool_limits

    from stimsteer.control.commands.bench import write_bench
    from stimsteer.control.evaluation import BenchSettings, result as result_module, run_bench
    from stimsteer.control.figures import bench as bench_figures
    from stimsteer.control.limits import load_limits
    from stimsteer.control.plants import load_plant
    from stimsteer.control.report import bench_run_id, report_html, results_json, summarize
    from stimsteer.demo_data import demo_file
    from stimsteer.sysid import load_session

    parts = {}

    def timed(name, fn):
        def wrapper(*args, **kwargs):
            w0, c0 = time.perf_counter(), _cpu()
            out = fn(*args, **kwargs)
            parts[name] = (time.perf_counter() - w0, _cpu() - c0)
            return out
        return wrapper

    session = load_session(str(demo_file("demo_session.h5")))
    plant, limits = load_plant(str(demo_file("demo_plant.h5"))), load_limits(str(demo_file("demo_limits.toml")))
    saved = result_module._execute, result_module._result
    result_module._execute = timed("worker pool", saved[0])
    result_module._result = timed("assembly (+ references when not on the pool)", saved[1])
    try:
        with threadpool_limits(limits=1), contextlib.redirect_stderr(io.StringIO()):
            w0, c0 = time.perf_counter(), _cpu()
            result = run_bench(session, BenchSettings(past_steps=10, horizon_steps=20), plant=plant, limits=limits,
                               n_workers=n_workers, progress=False)
            timed("figures, one after the other (as before s8)", bench_figures.report_figures)(result)
            figures = timed(f"figures side by side ({n_workers} processes)", bench_figures.report_figures)(
                result, processes=n_workers)

            def page():
                lines = summarize(result)
                run_id = bench_run_id(result)
                for table in result.tables().values():
                    table.to_csv(io.StringIO(), index=False)
                return results_json(result, lines, run_id), report_html(result, figures, lines, run_id)

            timed("page, JSON and tables", page)()
            with tempfile.TemporaryDirectory(prefix="bench_parts_") as tmp:
                timed(f"the report folder as the bench writes it ({n_workers} processes)", write_bench)(
                    result, Path(tmp) / "report", processes=n_workers)
            parts["all of the above (figures and report twice)"] = (time.perf_counter() - w0, _cpu() - c0)
    finally:
        result_module._execute, result_module._result = saved
    return parts


def _print_parts(n_workers: int) -> None:
    load = os.getloadavg()[0]
    parts = bench_parts(n_workers)
    print(f"\nthe demo's bench step by parts, {n_workers} worker(s), in this process (CPU includes the workers)")
    print(f"{'part':<58} {'wall s':>8} {'CPU s':>8}")
    for name, (wall, cpu) in parts.items():
        print(f"{name:<58} {wall:8.2f} {cpu:8.2f}")
    print(f"1-minute load average {load:.2f} before, {os.getloadavg()[0]:.2f} after")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1, help="demo runs, one after the other (default 1)")
    parser.add_argument("--keep", metavar="DIR", help="keep the last run's output folder here (must not exist)")
    parser.add_argument("--bench-parts", action="store_true",
                        help="also time the demo's bench step by parts in this process (wall and CPU time)")
    parser.add_argument("--parts-only", action="store_true",
                        help="only the bench step by parts (--bench-parts), no demo run")
    parser.add_argument("--no-bytecode-cache", action="store_true",
                        help="run the demo as this environment is set, without compiling the package first")
    args = parser.parse_args(argv)
    cores = _cores()
    env = _environment(not args.no_bytecode_cache)
    cache = ("off (PYTHONDONTWRITEBYTECODE set: every module compiled in every run)"
             if env.get("PYTHONDONTWRITEBYTECODE") else "on, as a default install (the package compiled beforehand)")
    print(f"{cores} core(s) available; demo data of the repository; Python's bytecode cache {cache}")
    walls = []
    with tempfile.TemporaryDirectory(prefix="bench_demo_") as tmp:
        for i in range(0 if args.parts_only else args.repeats):
            out = Path(tmp) / f"run{i}" / "demo"
            out.parent.mkdir()
            run = _one_run(out, env)
            print(f"\nrun {i + 1} of {args.repeats}")
            _print_run(run)
            walls.append(run["wall"])
        if args.keep and walls:
            shutil.copytree(out, args.keep)
    if len(walls) > 1:
        print(f"\nend to end over {len(walls)} runs: min {min(walls):.2f} s, max {max(walls):.2f} s")
    if args.bench_parts or args.parts_only:
        _print_parts(cores)
    return 0


if __name__ == "__main__":
    sys.exit(main())
