"""One DeePC plan at realistic windows: the reduced form against the problem in the Hankel weights.

Setup (not timed): the session of ``bench_windows.py`` (the demo network at 1 kHz: 3 stimulation sites, 20 contacts,
25 trials of 2.5 s), the regularised Hankel predictor (projection regulariser, its defaults) fitted at ``--past`` /
``--horizon`` (default 100 / 50 samples: 3,450 Hankel columns, 1,000 predicted values) and saved once.

Measured, each case in a fresh child process (so its peak resident memory is its own; ``ru_maxrss`` from
``os.wait4``): the predictor loaded, the controller built (``DataPredictiveController``, the demo's limits file:
amplitude and slew limits, an energy budget, a soft bound on one output; the target ``rec_01 = 15``, ``rec_04 =
-10`` tracked) and one plan from the predictor's rest window, by

* ``fast``: the fast path (the dense warm-started QPs), and
* ``cvxpy``: the cvxpy problem (CLARABEL), the fallback the fast path hands over to,

each on the reduced form (``stimsteer.control.mpc._deepc_elimination``, the route from 512 columns on) and, with
``--weights``, on the problem in the Hankel weights ``g`` (the null-space route, forced; the cvxpy problem in ``g``
takes minutes and about 17 GB at the default windows). Printed: the build and plan seconds, the peak resident memory,
the solver, and the largest difference of the planned inputs from the reduced fast path's (µA).

Usage::

    python benchmarks/bench_deepc_plan.py                 # the reduced form, both paths
    python benchmarks/bench_deepc_plan.py --weights       # and the problem in g (slow, about 17 GB)
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_cli_fit import measured  # noqa: E402  (one fresh process, its peak memory)


def _case(model: str, route: str, path: str, out: str) -> None:
    """In the child: build the controller on ``route`` and make one plan by ``path``; the inputs go to ``out``."""
    from stimsteer.control.limits import load_limits
    from stimsteer.control.mpc import DataPredictiveController
    from stimsteer.control.mpc import _deepc_elimination
    from stimsteer.sysid import load_predictor

    if route == "weights":
        _deepc_elimination.REDUCED_MIN_COLUMNS = 10 ** 9
    pred, _ = load_predictor(model)
    limits = load_limits(ROOT / "demo_data" / "demo_limits.toml").aligned(pred.input_names_, pred.output_names_)
    weight = np.array([1.0 if n in ("rec_01", "rec_04") else 0.0 for n in pred.output_names_])
    target = np.array([15.0 if n == "rec_01" else -10.0 if n == "rec_04" else 0.0 for n in pred.output_names_])
    t0 = time.perf_counter()
    ctrl = DataPredictiveController(predictor=pred, limits=limits, output_weight=weight).fit()
    t1 = time.perf_counter()
    u_past, y_past = pred.rest_window()
    plan = ctrl.plan(u_past, y_past, target=target, use_fast_path=path == "fast")
    t2 = time.perf_counter()
    np.save(out, np.asarray(plan.inputs))
    print(json.dumps({"build_s": t1 - t0, "plan_s": t2 - t1, "solver": plan.solver, "ok": bool(plan.ok),
                      "reduced": ctrl._reduced is not None}))


def _run(model, route, path, out, timeout):
    r = measured([sys.executable, __file__, "--case", model, route, path, out], timeout, stdout=subprocess.PIPE)
    if r.get("killed"):
        return None
    lines = r["stdout"].strip().splitlines()
    if r["code"] != 0 or not lines:
        return {"failed": True}
    return {**json.loads(lines[-1]), "peak_mb": r["peak_mb"]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--past", type=int, default=100)
    ap.add_argument("--horizon", type=int, default=50)
    ap.add_argument("--weights", action="store_true", help="also the problem in the Hankel weights (slow)")
    ap.add_argument("--timeout", type=float, default=900.0)
    ap.add_argument("--case", nargs=4, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        _case(*args.case)
        return 0
    from bench_windows import make_session
    from stimsteer.sysid import HankelPredictor, save_predictor

    with tempfile.TemporaryDirectory() as tmp:
        model = str(Path(tmp) / "hankel.h5")
        session = make_session(1)
        pred = HankelPredictor(past_steps=args.past, horizon_steps=args.horizon).fit(session)
        save_predictor(pred, model, provenance={})
        print(f"# Hankel predictor at past {args.past} / horizon {args.horizon}: "
              f"{pred.data_blocks().Up.shape[1]} columns; load average {os.getloadavg()[0]:.1f}")
        print("| route | path | build | plan | peak resident | solver | max input difference |")
        print("| --- | --- | --- | --- | --- | --- | --- |")
        ref = None
        for route in ("reduced",) + (("weights",) if args.weights else ()):
            for path in ("fast", "cvxpy"):
                out = str(Path(tmp) / f"{route}_{path}.npy")
                r = _run(model, route, path, out, args.timeout)
                if r is None or r.get("failed"):
                    print(f"| {route} | {path} | {'killed (timeout)' if r is None else 'failed'} | | | | |")
                    continue
                u = np.load(out)
                ref = u if ref is None else ref
                print(f"| {route} | {path} | {r['build_s']:.2f} s | {r['plan_s']:.2f} s | {r['peak_mb']:.0f} MB | "
                      f"{r['solver']} | {np.abs(u - ref).max():.2g} µA |", flush=True)
    print(f"# load average {os.getloadavg()[0]:.1f} at the end")
    return 0


if __name__ == "__main__":
    sys.exit(main())
