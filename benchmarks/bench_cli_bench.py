"""The route benchmark at realistic windows as a user runs it: ``stimsteer bench --quick`` end to end.

Setup (not timed): the session of ``bench_windows.py`` (the demo network at 1 kHz: 3 stimulation sites, 20 contacts,
25 trials of 2.5 s), written once to a temporary HDF5 file.

Measured, in fresh processes (``bench_cli_fit.measured``: wall and CPU seconds, the peak resident memory of the
command's process and its children as the kernel reports them, the exit code):

1. ``stimsteer bench SESSION --quick --past P --horizon H --out DIR`` (default 100 ms / 50 ms): every default method
   on two splits, the data-length, noise and horizon sweeps at one point each, the closed loops; then the report's
   own task table (``tables/tasks.csv``): the slowest fits, with the training trials each had;
2. (``--few-trials K``, default 4) ``stimsteer fit --route direct --method M`` for the least-squares and the
   regularised Hankel predictor (``--few-methods``) on a session of the first ``K`` trials alone (the command holds
   one of four out: three training trials, as the data-length sweep's smallest point), where the Gram of the
   lagged data is too ill-conditioned for the Gram route and the fit takes its QR route.

Usage::

    python benchmarks/bench_cli_bench.py
    python benchmarks/bench_cli_bench.py --few-only
"""

from __future__ import annotations

import argparse
import csv
import os
import platform
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_cli_fit import _command, _row, measured  # noqa: E402  (the same child measurement and rows)
from bench_windows import make_session  # noqa: E402  (the same session)


#: The direct methods of the few-trial fits (their QR route), as the table names them.
_FEW = {"lsq": "least-squares predictor", "hankel": "regularised Hankel predictor"}


def _slowest_fits(folder: Path, n: int = 6) -> list:
    rows = list(csv.DictReader(open(folder / "tables" / "tasks.csv")))
    rows = [r for r in rows if r.get("fit_s")]
    rows.sort(key=lambda r: -float(r["fit_s"]))
    return [f"#   {r['label']}, split {r['split']}, {r['n_train_trials']} training trials, noise x{r['noise_scale']}: "
            f"fit {float(r['fit_s']):.1f} s ({r['selection']})" for r in rows[:n]]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--past", default="100ms")
    ap.add_argument("--horizon", default="50ms")
    ap.add_argument("--few-trials", type=int, default=4, help="trials of the least-squares fit on few trials")
    ap.add_argument("--few-only", action="store_true", help="only the fits on few trials")
    ap.add_argument("--few-methods", nargs="+", choices=sorted(_FEW), default=["lsq", "hankel"],
                    help="direct methods fitted on few trials")
    ap.add_argument("--timeout", type=float, default=1800.0, help="seconds per command before it is killed")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)
    from stimsteer.sysid.io import save_session

    print(f"# {platform.machine()} {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f} at the start")
    with tempfile.TemporaryDirectory() as tmp:
        session = make_session(args.seed)
        path, few = Path(tmp) / "session.h5", Path(tmp) / "few.h5"
        save_session(session, path)
        save_session(session.select_trials(range(args.few_trials)), few)
        print(f"# session: {session.u.shape[0]} samples at 1 kHz, {session.n_inputs} inputs, {session.n_outputs} "
              f"outputs, {len(session.trials)} trials; --past {args.past} --horizon {args.horizon}")
        print("| command | wall | CPU | peak resident | model file | exit code | load |")
        print("| --- | --- | --- | --- | --- | --- | --- |")
        for method in args.few_methods:
            r = measured(_command() + ["fit", str(few), "--route", "direct", "--method", method, "--past", args.past,
                                       "--horizon", args.horizon, "--out", str(Path(tmp) / f"few_{method}.h5")],
                         args.timeout)
            print(_row(f"fit, {_FEW[method]}, first {args.few_trials} trials", r, ""), flush=True)
        if not args.few_only:
            out = Path(tmp) / "bench"
            r = measured(_command() + ["bench", str(path), "--quick", "--past", args.past, "--horizon", args.horizon,
                                       "--out", str(out)], args.timeout)
            print(_row("bench --quick", r, ""), flush=True)
            if (out / "tables" / "tasks.csv").exists():
                print("# the slowest fits of that run (its tables/tasks.csv):")
                print("\n".join(_slowest_fits(out)))
    print(f"# load average {os.getloadavg()[0]:.1f} at the end")
    return 0


if __name__ == "__main__":
    sys.exit(main())
