"""A fingerprint of a demo run's numbers, to show that a change of layout left every number where it was.

``snapshot(out)`` reads the result tables of a ``stimsteer demo`` folder and keeps every number that the seeds fix:
the benchmark tables of ``report/results.json`` (less wall-clock timings and the comparisons made of them), the
plans, the predictions, the network tables and the schedule. ``compare(a, b, rtol)`` lists what differs.

Regenerate the stored snapshot (``tests/data/demo_golden.json.gz``) only when a change is meant to move the demo's
numbers, and say so in the commit: ``python tests/golden.py DEMO_OUT``.
"""

from __future__ import annotations

import gzip
import json
import math
import sys
from pathlib import Path

import pandas as pd

STORED = Path(__file__).resolve().parent / "data" / "demo_golden.json.gz"

# wall-clock figures (and everything computed from them) differ from run to run
_TIMING_COLUMNS = {"fit_s", "predict_s", "predict_ms_per_window", "control_s", "total_s", "solve_ms_median",
                   "solve_ms_p95", "solve_ms_max", "solve_time_s"}
_TIMING_METRICS = {"fit_s", "solve_ms", "solve_ms_median", "predict_ms_per_window", "total_s"}
_TABLE_FILES = ("plan_indirect/plan.csv", "plan_direct/plan.csv", "predict_indirect/prediction.csv",
                "predict_direct/prediction.csv", "network/controllability.csv", "network/gramian_spectrum.csv",
                "network/impulse_responses.csv", "network/site_controllability.csv", "network/site_ranking.csv",
                "network/transition.csv", "network/site_sets.csv", "plan_pulses/plan_parameters.csv",
                "plan_pulses/plan_pulses.csv")


def _keep(table: list[dict], name: str) -> list[dict]:
    rows = []
    for row in table:
        if name in ("sweeps", "comparison") and str(row.get("metric")) in _TIMING_METRICS:
            continue
        if name == "comparison" and str(row.get("sweep")) == "compute":
            continue
        # a fit's fingerprint hashes the names and values of all its fitted attributes: it changes when the
        # contract adds an attribute (e.g. output_units_), although no number moved; the numbers are compared here
        rows.append({k: v for k, v in row.items() if k not in _TIMING_COLUMNS and k not in ("warnings", "fingerprint")})
    return rows


def snapshot(out) -> dict:
    out = Path(out)
    results = json.loads((out / "report" / "results.json").read_text(encoding="utf-8"))
    snap = {f"bench:{k}": _keep(v, k) for k, v in results["tables"].items() if isinstance(v, list)}
    for rel in _TABLE_FILES:
        frame = pd.read_csv(out / rel, comment="#")
        snap[rel] = json.loads(frame.to_json(orient="split", double_precision=15))
    frame = pd.read_csv(out / "next_schedule.csv", comment="#")
    snap["next_schedule.csv"] = json.loads(frame.to_json(orient="split", double_precision=15))
    return snap


def _differ(a, b, rtol: float) -> bool:
    if isinstance(a, bool) or isinstance(b, bool) or not isinstance(a, (int, float)) or not isinstance(b, (int, float)):
        return a != b
    if math.isnan(a) or math.isnan(b):
        return not (math.isnan(a) and math.isnan(b))
    return abs(a - b) > rtol * max(abs(a), abs(b), 1e-300) and abs(a - b) > 1e-12


def compare(stored, fresh, rtol: float = 1e-9, where: str = "", found=None) -> list[str]:
    """Places where ``fresh`` differs from ``stored`` (at most 20 are listed)."""
    found = [] if found is None else found
    if len(found) >= 20:
        return found
    if isinstance(stored, dict) and isinstance(fresh, dict):
        for k in sorted(set(stored) | set(fresh)):
            if k not in stored or k not in fresh:
                found.append(f"{where}/{k}: only in {'fresh' if k in fresh else 'stored'}")
            else:
                compare(stored[k], fresh[k], rtol, f"{where}/{k}", found)
    elif isinstance(stored, list) and isinstance(fresh, list):
        if len(stored) != len(fresh):
            found.append(f"{where}: {len(stored)} stored items, {len(fresh)} fresh")
        for i, (a, b) in enumerate(zip(stored, fresh)):
            compare(a, b, rtol, f"{where}[{i}]", found)
    elif _differ(stored, fresh, rtol):
        found.append(f"{where}: stored {stored!r}, fresh {fresh!r}")
    return found


def load_stored() -> dict:
    with gzip.open(STORED, "rt", encoding="utf-8") as fh:
        return json.load(fh)


if __name__ == "__main__":
    snap = snapshot(sys.argv[1])
    STORED.parent.mkdir(exist_ok=True)
    with gzip.open(STORED, "wt", encoding="utf-8") as fh:
        json.dump(snap, fh, separators=(",", ":"))
    print(f"wrote {STORED} ({STORED.stat().st_size} bytes)")
