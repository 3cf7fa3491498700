"""The figure builders' cost, before and after in one run: ``bench_figures.py`` with the bench report's figures
recorded too (through ``figures.bench.drawing``, which the bench step calls), and ``--calls``: the Python function
calls of each figure's build + save (cProfile's count: a measure of the work that the machine's load does not move).

Run from the repository root::

    .venv/bin/python benchmarks/bench_figure_builders.py --inputs DIR --before REF [--rounds 5] [--png DIR]
    .venv/bin/python benchmarks/bench_figure_builders.py --inputs DIR --before REF --calls
"""

from __future__ import annotations

import os
import pickle
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_figures as bf  # noqa: E402


def capture(folder: Path) -> list:
    """``bench_figures.capture`` with the ``BenchResult`` the report's figures are drawn from recorded as well."""
    from stimsteer.control.figures import bench as fb

    log = folder / "calls"
    log.mkdir(parents=True, exist_ok=True)
    drawing = fb.drawing

    def recording(result, processes=1):
        with open(log / f"{os.getpid()}_{time.perf_counter_ns()}.pkl", "wb") as fh:  # the bench step is forked
            pickle.dump(("bench", "report_figures", (result,), {}), fh)
        return drawing(result, processes)

    fb.drawing = recording
    return bf.capture(folder)


def calls(folder: Path, before: str) -> None:
    """Python calls of each figure (build + save), before and after, after a warm-up draw of each."""
    import cProfile
    import pstats

    recorded = pickle.loads((folder / bf._INPUTS).read_bytes())
    packages = {"before": bf._package_at(before), "after": "stimsteer.control.figures"}
    count = {}
    for version, package in packages.items():
        jobs = bf._jobs(recorded, package)
        for _name, make in jobs:
            make()
        for name, make in jobs:
            profile = cProfile.Profile()
            profile.enable()
            make()
            profile.disable()
            count[(version, name)] = pstats.Stats(profile).total_calls
    names = [n for n, _ in bf._jobs(recorded, "stimsteer.control.figures")]
    print(f"{'figure':<28} {'before calls':>13} {'after calls':>13}  ratio")
    for name in names + ["total"]:
        b, a = ((sum(count[(v, n)] for n in names) if name == "total" else count[(v, name)])
                for v in ("before", "after"))
        print(f"{name:<28} {b:13d} {a:13d}  {a / b:5.3f}")


def main(argv=None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    folder = Path(argv[argv.index("--inputs") + 1]) if "--inputs" in argv else Path(tempfile.gettempdir()) / "stimsteer_builders"
    if not (folder / bf._INPUTS).is_file():
        print(f"recording the figure inputs of one demo run into {folder} ...", flush=True)
        capture(folder)
    if "--calls" in argv:
        calls(folder, argv[argv.index("--before") + 1])
        return 0
    return bf.main([*argv, "--inputs", str(folder)] if "--inputs" not in argv else argv)


if __name__ == "__main__":
    sys.exit(main())
