"""CPU time of drawing every figure ``stimsteer demo`` writes, per figure and in total, before and after in one run.

The demo writes 9 PNGs in its own process (``predict`` ×2, ``network`` ×3, ``plan`` ×2 and the pulse plan's
``plan.png`` + ``plan_pulses.png``) and 8 in the bench report. This script first runs the demo once in this process
with the figure functions' arguments recorded (``--inputs DIR``, reused when it already holds them), then draws
every figure from those arguments with this tree's ``control/figures`` and with the same package at a git commit
(``--before REF``, loaded beside it under another name), the two versions back to back for each figure (their
order alternating), and prints the CPU time
(``process_time``: build + save to PNG bytes) of each figure, the minimum over the rounds after a warm-up round, the
totals, their ratio, the PNG sizes, and the 1-minute load average before and after.

Run from the repository root::

    .venv/bin/python benchmarks/bench_figures.py [--inputs DIR] [--before REF] [--rounds 3] [--png DIR]

``--png DIR`` writes both versions' PNGs there (``before_<name>.png``, ``after_<name>.png``) to look at them side
by side.
"""

from __future__ import annotations

import argparse
import gc
import importlib.util
import io
import os
import pickle
import subprocess
import sys
import tempfile
import time
from pathlib import Path

_ROOT = Path(__file__).resolve().parents[1]
_INPUTS = "figure_inputs.pkl"
# (module, function) recorded while the demo runs; the network figures and the bench report's input
_RECORDED = [("predict", "prediction_figure"), ("network", "gramian_spectrum_figure"),
             ("network", "impulse_response_figure"), ("network", "ranking_figure"), ("plan", "plan_figure"),
             ("pulse_plan", "pulse_plan_figure"), ("bench", "drawing")]
# the bench report's figures, as report_figures makes them (name, function, extra arguments)
_REPORT = [("predictions", "fig_predictions", ()), ("accuracy_vs_steps", "fig_accuracy", ()),
           ("closed_loop", "fig_closed_loop", ()), ("tracking_vs_energy", "fig_tradeoff", ()),
           ("training_data", "fig_sweep", ("train_trials", "training trials [count]",
                                           "Accuracy and control vs amount of training data")),
           ("noise", "fig_sweep", ("noise_scale", "noise level [× the plant's]",
                                   "Accuracy and control vs noise (re-recorded from the plant)")),
           ("horizon", "fig_sweep", ("horizon_steps", "horizon N [steps]",
                                     "Accuracy at the horizon and control vs horizon")),
           ("compute_time", "fig_compute", ())]
_STEM = {"prediction_figure": "predict", "gramian_spectrum_figure": "network_spectrum",
         "impulse_response_figure": "network_impulse", "ranking_figure": "network_ranking", "plan_figure": "plan",
         "pulse_plan_figure": "plan_pulses"}


def capture(folder: Path) -> list:
    """Run the demo in this process with every recorded figure function's arguments kept; write and return them."""
    import importlib

    from stimsteer.control.cli import main
    from stimsteer.control.demo import run_demo

    calls = []
    log = folder / "calls"
    log.mkdir(parents=True, exist_ok=True)

    def recording(mod, name, fn):
        def wrapper(*args, **kwargs):
            # the bench step runs in a forked child: each call is written to a file of its own at once
            with open(log / f"{os.getpid()}_{time.perf_counter_ns()}.pkl", "wb") as fh:
                pickle.dump((mod, name, args, kwargs), fh)
            return fn(*args, **kwargs)
        return wrapper

    for mod, name in _RECORDED:
        module = importlib.import_module(f"stimsteer.control.figures.{mod}")
        setattr(module, name, recording(mod, name, getattr(module, name)))
    for command in ("predict", "plan"):  # the commands hold their own references to the figure functions
        cmd = importlib.import_module(f"stimsteer.control.commands.{command}")
        for mod, name in _RECORDED:
            if hasattr(cmd, name):
                setattr(cmd, name, getattr(importlib.import_module(f"stimsteer.control.figures.{mod}"), name))
    run_demo(folder / "demo", run_step=main, force=True, echo=lambda text: None)
    for path in sorted(log.glob("*.pkl"), key=lambda p: int(p.stem.split("_")[1])):
        calls.append(pickle.loads(path.read_bytes()))
    (folder / _INPUTS).write_bytes(pickle.dumps(calls))
    return calls


def _package_at(ref: str):
    """``stimsteer.control.figures`` as it is at ``ref``, loaded as ``stimsteer.control._figures_at_ref``."""
    names = subprocess.run(["git", "ls-tree", "--name-only", ref, "control/figures/"], cwd=_ROOT, check=True,
                           capture_output=True, text=True).stdout.split()
    tmp = Path(tempfile.mkdtemp(prefix="figures_before_"))
    for name in names:
        if name.endswith(".py"):
            text = subprocess.run(["git", "show", f"{ref}:{name}"], cwd=_ROOT, check=True, capture_output=True,
                                  text=True).stdout
            (tmp / Path(name).name).write_text(text, encoding="utf-8")
    import stimsteer.control  # noqa: F401  the parent package of the relative imports

    full = "stimsteer.control._figures_at_ref"
    spec = importlib.util.spec_from_file_location(full, tmp / "__init__.py", submodule_search_locations=[str(tmp)])
    package = importlib.util.module_from_spec(spec)
    sys.modules[full] = package
    spec.loader.exec_module(package)
    return full


def _jobs(calls, package: str) -> list:
    """``(name, make)`` for every figure of the recorded calls, ``make()`` returning the PNG bytes."""
    import importlib

    def save(fig, dpi):
        buf = io.BytesIO()
        if dpi is None:
            fig.savefig(buf, format="png")
        else:
            fig.savefig(buf, format="png", dpi=dpi)
        return buf.getvalue()

    jobs, seen = [], {}
    for mod, name, args, kwargs in calls:
        module = importlib.import_module(f"{package}.{mod}")
        if name in ("report_figures", "drawing"):  # the bench report: its result
            result = args[0]
            colours = module.method_colours(result)
            for stem, fn, extra in _REPORT:
                make = getattr(module, fn)
                jobs.append((f"report_{stem}", lambda m=make, e=extra: save(m(result, colours, *e), None)))
            continue
        stem = _STEM[name]
        seen[stem] = seen.get(stem, 0) + 1
        jobs.append((f"{stem}_{seen[stem]}", lambda f=getattr(module, name), a=args, k=kwargs: save(f(*a, **k), 110)))
    return jobs


def _forget(package: str) -> None:
    """Empty what the figures keep across saves in a process: each round draws as a fresh demo process does."""
    import importlib

    try:
        importlib.import_module(f"{package}._fast_agg").forget()
    except ImportError:  # a version without the kept text work
        pass


def _timed(versions: dict, packages: dict, rnd: int) -> dict:
    """``{(version, figure): (CPU s, PNG)}`` of one round: the versions draw each figure back to back (their order
    alternating from figure to figure and round to round), so that both see the same load."""
    out = {}
    for package in packages.values():
        _forget(package)
    names = [name for name, _ in next(iter(versions.values()))]
    for k, name in enumerate(names):
        if name == "report_predictions":  # the report's figures are drawn in the bench step's own process
            for package in packages.values():
                _forget(package)
        order = list(versions) if (k + rnd) % 2 == 0 else list(versions)[::-1]
        for version in order:
            make = dict(versions[version])[name]
            gc.collect()  # the previous figures' garbage is not this figure's time
            c0 = time.process_time()
            png = make()
            out[(version, name)] = (time.process_time() - c0, png)
    return out


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--inputs", default=str(Path(tempfile.gettempdir()) / "stimsteer_bench_figures"),
                        help="folder of the recorded demo figure inputs (made by a demo run when missing)")
    parser.add_argument("--before", default=None, help="git commit of the 'before' figures (default: none)")
    parser.add_argument("--rounds", type=int, default=3, help="timed rounds after the warm-up round (default 3)")
    parser.add_argument("--png", default=None, help="write every PNG of both versions into this folder")
    args = parser.parse_args(argv)
    from threadpoolctl import threadpool_limits

    folder = Path(args.inputs)
    path = folder / _INPUTS
    if path.is_file():
        calls = pickle.loads(path.read_bytes())
    else:
        print(f"recording the figure inputs of one demo run into {folder} ...", flush=True)
        calls = capture(folder)
    packages = {"after": "stimsteer.control.figures"}
    if args.before:
        packages = {"before": _package_at(args.before), **packages}
    versions = {version: _jobs(calls, package) for version, package in packages.items()}
    load0 = os.getloadavg()[0]
    best: dict = {}
    with threadpool_limits(limits=1):
        for rnd in range(args.rounds + 1):
            times = _timed(versions, packages, rnd)
            if rnd == 0:  # warm-up: imports, font caches
                continue
            for key, (cpu, png) in times.items():
                old = best.get(key)
                best[key] = (min(cpu, old[0]) if old else cpu, png)
    load1 = os.getloadavg()[0]
    _print(versions, best, args, load0, load1)
    return 0


def _print(versions, best, args, load0, load1) -> None:
    names = [n for n, _ in versions["after"]]
    cols = list(versions)
    print(f"{'figure':<28}" + "".join(f" {v + ' CPU s':>13} {v + ' kB':>10}" for v in cols)
          + ("   ratio" if len(cols) == 2 else ""))
    totals = dict.fromkeys(cols, 0.0)
    for name in names:
        row = f"{name:<28}"
        for v in cols:
            cpu, png = best[(v, name)]
            totals[v] += cpu
            row += f" {cpu:13.3f} {len(png) / 1e3:10.1f}"
            if args.png:
                Path(args.png).mkdir(parents=True, exist_ok=True)
                (Path(args.png) / f"{v}_{name}.png").write_bytes(png)
        if len(cols) == 2:
            row += f"   {best[('after', name)][0] / best[('before', name)][0]:5.2f}"
        print(row)
    parent = {v: sum(best[(v, n)][0] for n in names if not n.startswith("report_")) for v in cols}
    for label, tot in (("demo's own process (9 PNGs)", parent), ("all figures", totals)):
        line = f"{label:<28}" + "".join(f" {tot[v]:13.3f} {'':>10}" for v in cols)
        if len(cols) == 2:
            line += f"   {tot['after'] / tot['before']:5.2f}"
        print(line)
    print(f"CPU time: minimum of {args.rounds} rounds after a warm-up, one BLAS thread, build + save per figure; "
          f"1-minute load average {load0:.2f} before, {load1:.2f} after")


if __name__ == "__main__":
    sys.exit(main())
