"""Speed of the route benchmark (control/evaluation/) on the shipped demo session.

Measured in one run:

* the same sweep (>= 16 independent tasks: splits × sweep points × both routes) with 1 local worker and with 2;
  the speed-up of 2 workers over 1 (baseline: 1 worker, the same tasks in this process), target >= 1.7 on 2 cores;
  the two runs must give identical numbers (checked, not timed);
* the wall time of ``stimsteer demo --out DIR`` end to end in a fresh process (target: under 2 minutes on 2
  cores). If the demo command fails, ``stimsteer bench`` on the demo session with its plant and limits (the
  demo's benchmark step) is timed instead, and the script says so.

Run from the repository root::

    .venv/bin/python benchmarks/bench_sweep.py [--splits 2] [--steps 100] [--no-demo]
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pandas as pd

from stimsteer.control.evaluation import BenchSettings, ControlSettings, run_bench
from stimsteer.control.limits import load_limits
from stimsteer.control.plants import load_plant
from stimsteer.sysid.io import load_session

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "demo_data"
_TIMING = ("fit_s", "predict_s", "control_s", "total_s", "predict_ms_per_window", "solve_ms_median", "solve_ms_p95",
           "solve_ms_max", "warnings")


def _setup():
    session = load_session(DEMO / "demo_session.h5")
    plant = load_plant(DEMO / "demo_plant.h5")
    limits = load_limits(DEMO / "demo_limits.toml")
    return session, plant, limits


def _settings(n_splits: int, n_steps: int) -> BenchSettings:
    return BenchSettings(n_splits=n_splits, train_trials=(3, 9), noise_scales=(2.0,), horizons=(10,),
                         control=ControlSettings(n_steps=n_steps))


def _same_numbers(a, b) -> bool:
    for name in ("prediction", "control", "fits"):
        x, y = a.tables()[name], b.tables()[name]
        drop = [c for c in _TIMING if c in x.columns]
        try:
            pd.testing.assert_frame_equal(x.drop(columns=drop), y.drop(columns=drop), check_exact=True)
        except AssertionError:
            return False
    return True


def _cpu_s() -> float:
    """User + system CPU seconds of this process and of its finished child processes."""
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def _timed(session, plant, limits, settings, n_workers):
    c0, t0 = _cpu_s(), time.perf_counter()
    result = run_bench(session, settings, plant=plant, limits=limits, n_workers=n_workers, progress=False)
    return time.perf_counter() - t0, _cpu_s() - c0, result


def _bench_command(out: Path) -> list:
    return [sys.executable, "-m", "stimsteer.control.cli", "bench", str(DEMO / "demo_session.h5"), "--plant",
            str(DEMO / "demo_plant.h5"), "--limits", str(DEMO / "demo_limits.toml"), "--out", str(out)]


def _time_command(cmd) -> tuple[float, subprocess.CompletedProcess]:
    t0 = time.perf_counter()
    done = subprocess.run(cmd, capture_output=True, text=True)
    return time.perf_counter() - t0, done


def _time_demo() -> None:
    """Wall time of `stimsteer demo` in a fresh process; of `stimsteer bench` on the demo data if the demo fails."""
    with tempfile.TemporaryDirectory() as tmp:
        wall, done = _time_command([sys.executable, "-m", "stimsteer.control.cli", "demo", "--out", f"{tmp}/demo"])
        if done.returncode == 0:
            print(f"wall time of stimsteer demo, end to end in a fresh process: {wall:.1f} s   (target < 120 s)")
            return
        last = (done.stderr.strip().splitlines() or ["(no message)"])[-1]
        print(f"stimsteer demo failed (exit {done.returncode}: {last}); timing its bench step alone instead")
        wall, done = _time_command(_bench_command(Path(tmp) / "bench"))
        status = "" if done.returncode == 0 else f" (FAILED, exit {done.returncode})"
        print(f"wall time of stimsteer bench on the demo session (plant and limits), fresh process: {wall:.1f} s"
              f"{status}   (the demo's target < 120 s)")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--splits", type=int, default=2, help="repeated splits (tasks = splits x 5 points x 2)")
    parser.add_argument("--steps", type=int, default=100, help="closed-loop steps per task")
    parser.add_argument("--no-demo", action="store_true", help="skip the end-to-end demo timing")
    args = parser.parse_args(argv)
    session, plant, limits = _setup()
    settings = _settings(args.splits, args.steps)
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    load = os.getloadavg()[0]
    t1, c1, r1 = _timed(session, plant, limits, settings, 1)
    t2, c2, r2 = _timed(session, plant, limits, settings, 2)
    n_tasks = len(r1.tasks)
    print(f"demo session: {session.n_trials} trials, {session.n_samples} samples; {cores} core(s) available, "
          f"1-minute load average before the runs {load:.1f}")
    print(f"sweep: {n_tasks} tasks ({args.splits} splits x {n_tasks // (2 * args.splits)} sweep points x 2 routes), "
          f"{args.steps} closed-loop steps each, demo limits")
    print(f"1 worker (baseline): {t1:.1f} s; 2 workers: {t2:.1f} s, running "
          f"{r2.tasks['total_s'].sum() / t2:.2f} tasks at a time on average")
    print(f"speed-up of 2 workers over 1: {t1 / t2:.2f}   (target >= 1.7 on 2 cores)")
    print(f"CPU seconds of the tasks: {c1:.1f} (1 worker), {c2:.1f} (2 workers); cores kept busy: {c1 / t1:.2f} and "
          f"{c2 / t2:.2f} (a speed-up needs the second core to be free of other work)")
    print(f"identical numbers with 1 and 2 workers: {_same_numbers(r1, r2)}")
    if not args.no_demo:
        _time_demo()
    return 0


if __name__ == "__main__":
    sys.exit(main())
