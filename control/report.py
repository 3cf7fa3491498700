"""The benchmark report's content: the recommendation, the tables, the HTML page and the results JSON of a
:class:`~stimsteer.control.evaluation.BenchResult`.

Nothing here touches the file system: the ``stimsteer bench`` command
(:func:`stimsteer.control.commands.bench.write_bench`) writes, atomically::

    DIR/report.html          the page (figures as base64 PNG inside it, the raw provenance JSON behind a link)
    DIR/results.json         summary, caution, provenance, limits and every table (records)
    DIR/tables/<name>.csv    every table of :meth:`BenchResult.tables`
    DIR/figures/<name>.png   the figures of the page (:mod:`stimsteer.control.figures.bench`), as files

The page reads top down (issue 18): one recommendation sentence with its deciding figures; the stand-in plant's own
quality when the closed loops ran on one (and the control comparison withheld below
:data:`~stimsteer.control.evaluation.result.STANDIN_MIN_R2`); a short table of the differences that matter (paired,
with a practical margin, "too few splits to tell" below
:data:`~stimsteer.control.evaluation.stats.MIN_SPLITS_TO_TELL` splits, intervals as computed); for a simulated
session, the floor and the ceiling beside both routes; the figures; every method's figures; the provenance as a
table. The words are computed in :mod:`stimsteer.control._report_text`.
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
import math

import numpy as np
import pandas as pd

from ..sysid.caution import CAUTION
from ._report_text import (achievable_table, difference_table, fmt_interval, recommendation, route_name,
                           representatives, summarize)
from .evaluation import BenchResult
from .evaluation.result import STANDIN_MIN_R2
from .evaluation.stats import MIN_SPLITS_TO_TELL
from .figures._glyphs import caption_note, undrawable

__all__ = ["summarize", "recommendation", "report_html", "results_json", "bench_run_id", "REPORT_FILE",
           "RESULTS_FILE"]

REPORT_FILE = "report.html"
RESULTS_FILE = "results.json"


# ------------------------------------------------------------------------------------------------ HTML
_CAPTIONS = {
    "predictions": "Recorded outputs of a held-out trial and each method's predictions. Every block of N samples is "
                   "predicted from the measured samples just before it, as a controller would use it.",
    "accuracy_vs_steps": "R² (1 − SSE/SST per channel, then averaged over channels) of predictions 1 … N steps "
                         "ahead on the held-out trials, with the ceiling of the true model where there is one; "
                         "right of the axis: free run over whole trials. Below: the paired difference of the routes.",
    "closed_loop": "Receding-horizon control of the first split: the steered output with its target, and the "
                   "stimulation each route applied inside its allowed region (shaded: the hard amplitude limits).",
    "tracking_vs_energy": "Each closed loop's RMS tracking error of the steered channel against the stimulation "
                          "energy it used; grey: the floor (no stimulation) and the ceiling (the true model's "
                          "controller) where there are.",
    "training_data": "Both routes refitted on nested subsets of each split's training trials (the data-length "
                     "question of direct vs indirect control), scored on the same held-out trials.",
    "noise": "The simulated session re-recorded from its plant with process noise, measurement noise and drift "
             "scaled; closed loops on the equally noisy plant.",
    "horizon": "Prediction accuracy at the horizon and closed-loop tracking for several horizons N.",
    "compute_time": "Wall time of fitting, of one held-out prediction window and of one control solve.",
}

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1020px;margin:2em auto;padding:0 1em;
color:#1d1d1d;line-height:1.45}
h1{font-size:1.45em;margin-bottom:.2em} h2{font-size:1.12em;margin-top:1.8em;border-bottom:1px solid #ddd}
.meta{color:#555;font-size:.9em}
.caution{background:#fff4e5;border-left:4px solid #c4561b;padding:.6em 1em;margin:1em 0}
.recommendation{background:#eef4ea;border-left:4px solid #3b7d3b;padding:.7em 1em;margin:1em 0;font-size:1.05em}
.standin{background:#f4eef8;border-left:4px solid #7a4fa3;padding:.6em 1em;margin:1em 0}
.withheld{color:#7a4fa3}
figure{margin:1.4em 0} figure img{max-width:100%} figcaption{font-size:.9em;color:#555}
table{border-collapse:collapse;font-size:.86em;margin:.5em 0} td,th{border:1px solid #ddd;padding:3px 7px}
td{text-align:right} td:first-child,th{text-align:left} th{background:#f4f4f4}
table.prov td{text-align:left;vertical-align:top} table.prov td:first-child{white-space:nowrap;color:#444}
ul.summary li{margin:.25em 0} .note{font-size:.88em;color:#555}
"""


def _table_html(frame: pd.DataFrame, index: bool = False, cls: str = "") -> str:
    return frame.to_html(index=index, border=0, escape=True, classes=cls or None, na_rep="")


def _key_table(result: BenchResult) -> pd.DataFrame:
    """The base-setting figures of every method, one row per metric with a readable name and unit, intervals as
    computed."""
    H, unit = result.settings.horizon_steps, result.steered_unit
    names = {"r2_step1": "R², 1 step ahead", "r2_last": f"R², {H} steps ahead",
             "r2_mean": f"R², mean of steps 1–{H}", "vaf_mean": f"VAF [%], mean of steps 1–{H}",
             "r2_freerun": "R², free run over whole trials",
             "tracking_rms": f"closed loop: RMS tracking error [{unit}]",
             "energy_ua2": "closed loop: stimulation energy Σu² [µA²]", "fit_s": "fit time [s]",
             "predict_ms_per_window": "prediction time [ms per window]",
             "solve_ms_median": "control solve time [ms per step, median]"}
    s = result.sweeps
    base = s[(s["sweep"] == "base") & s["metric"].isin(list(names))].copy()
    base["value"] = [fmt_interval(r["mean"], r["ci_low"], r["ci_high"]) for _, r in base.iterrows()]
    table = base.pivot(index="metric", columns="label", values="value")
    table = table.reindex(index=[m for m in names if m in table.index],
                          columns=[c for c in list(dict.fromkeys(base["label"])) if c in table.columns])
    table.index = [names[m] for m in table.index]
    table.index.name, table.columns.name = None, None
    return table


def _provenance_rows(result: BenchResult) -> list:
    """The provenance as (what, value) pairs a reader can scan."""
    p = dict(result.provenance)
    s = p.get("session", {})
    rows = [("tool, started, wall time", f"{p.get('tool', '')}, {p.get('started_utc', '')}, "
                                         f"{float(p.get('wall_time_s', 0.0)):.1f} s")]
    rows += [(f"source: {k}", str(v)) for k, v in (p.get("source") or {}).items()]
    rows += [("session content hash", str(s.get("content_hash", ""))),
             ("session", f"{s.get('n_samples')} samples, {s.get('n_trials')} trials at {s.get('sample_rate_hz'):g} Hz"
                         f"{', simulated' if s.get('simulated_flag') else ''}"),
             ("inputs", ", ".join(f"{n} [{u}]" for n, u in zip(s.get("input_names", []), s.get("input_units", [])))),
             ("outputs", ", ".join(f"{n} [{u}]" for n, u in zip(s.get("output_names", []),
                                                                s.get("output_units", [])))),
             ("plant of the closed loops", str(p.get("plant", ""))), ("limits", str(p.get("limits_source", ""))),
             ("seed", str(p.get("seed", "")))]
    rows += [(f"split {i}", f"training trials {sp.get('train')}; held out {sp.get('test')}")
             for i, sp in enumerate(p.get("splits", []))]
    rows += [(f"setting: {k}", _compact(v)) for k, v in (p.get("settings") or {}).items()]
    rows += [("execution", _compact(p.get("execution", {}))),
             ("versions", ", ".join(f"{k} {v}" for k, v in (p.get("versions") or {}).items())),
             ("failed tasks", str(p.get("n_failed_tasks", 0))), ("intervals", str(p.get("interval", "")))]
    return rows


def _compact(v) -> str:
    if isinstance(v, dict):
        return "; ".join(f"{k}: {_compact(x)}" for k, x in v.items())
    if isinstance(v, (list, tuple)):
        return ", ".join(_compact(x) for x in v) if v else "none"
    return str(v)


def _provenance_html(result: BenchResult) -> str:
    esc = html.escape
    raw = json.dumps(result.provenance, indent=2, ensure_ascii=False, default=str)
    link = base64.b64encode(raw.encode("utf-8")).decode("ascii")
    rows = "".join(f"<tr><td>{esc(a)}</td><td>{esc(b)}</td></tr>" for a, b in _provenance_rows(result))
    return ("<h2 id='provenance'>Provenance</h2><table class='prov'>" + rows + "</table>"
            f"<p class='note'>The raw record: <a download='provenance.json' "
            f"href='data:application/json;base64,{link}'>provenance.json</a> (also under <code>provenance</code> in "
            "<code>results.json</code> beside this page).</p>")


def _top_html(result: BenchResult, run_id: str) -> list:
    esc = html.escape
    s = result.provenance.get("session", {})
    a, b = representatives(result)
    source = (result.provenance.get("source") or {}).get("session")
    where = f" of {esc(str(source).rsplit('/', 1)[-1])}" if source else ""
    parts = [f"<h1>Which route{where}: {esc(route_name(result, a))} vs {esc(route_name(result, b))} on the same "
             "held-out trials</h1>",
             f"<p class='meta'>stimsteer bench, run {esc(run_id)}, {esc(str(result.provenance.get('started_utc', '')))}"
             f"; {s.get('n_trials')} trials at {s.get('sample_rate_hz', 0):g} Hz; {result.settings.n_splits} "
             "split(s); <a href='#provenance'>provenance</a></p>",
             f"<div class='caution'>{esc(CAUTION)}</div>"]
    if result.plant == "surrogate" and not result.control.empty:
        r2 = result.standin_r2()
        verdict = f"<br><b>The control comparison is withheld</b>: {esc(result.control_withheld)}." \
            if result.control_withheld else ""
        parts.append(f"<div class='standin'><b>Stand-in plant.</b> The closed loops ran on a model fitted to the "
                     f"held-out trials of the recording (no ground-truth plant was given); its own free-run R² on the "
                     f"trials it never saw is <b>{r2:.2f}</b> (the control comparison needs at least "
                     f"{STANDIN_MIN_R2:g}).{verdict}</div>")
    parts.append(f"<div class='recommendation'><b>Recommendation.</b> {esc(recommendation(result))}</div>")
    return parts


def _tables_html(result: BenchResult) -> list:
    diff = difference_table(result)
    parts = ["<h2>The differences that matter</h2>",
             f"<p class='note'>Each route by {'its best method on the training trials' if 'best' in representatives(result)[0] else 'its method'}"
             f"; mean [95 % interval] over splits, as computed (not clipped); differences paired by split. "
             f"'Too few splits to tell' below {MIN_SPLITS_TO_TELL} splits; 'equivalent' when the mean difference is "
             "below the practical margin.</p>",
             _table_html(diff.rename(columns={"indirect": route_name(result, representatives(result)[0]),
                                              "direct": route_name(result, representatives(result)[1])}))]
    ach = achievable_table(result)
    if not ach.empty:
        parts += ["<h2>How much of what is achievable each route gets</h2>",
                  "<p class='note'>A simulated session with its ground-truth plant: the floor (a mean predictor; the "
                  "plant left without stimulation) and the ceiling (the true model's Kalman predictor and its "
                  "controller, under the same limits, target and noise) beside both routes, mean [95 % interval] over "
                  "splits. The true model knows neither the plant's drift nor its artifacts, so a route can come out "
                  "above it.</p>", _table_html(ach)]
    return parts


def report_html(result: BenchResult, figures: dict, lines: list, run_id: str) -> str:
    """The self-contained report page: recommendation, differences, floor and ceiling, figures, provenance.

    Parameters
    ----------
    result : BenchResult
    figures : dict of str to bytes
        PNG images by name (:func:`stimsteer.control.figures.bench.report_figures`), embedded as base64.
    lines : list of str
        The summary (:func:`summarize`), listed under the figures.
    run_id : str
        The run's identifier (:func:`bench_run_id`).
    """
    esc = html.escape
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>stimsteer bench {run_id}</title>"
             f"<style>{_CSS}</style></head><body>", *_top_html(result, run_id), *_tables_html(result),
             "<h2>Figures</h2>"]
    session = result.provenance.get("session", {}) if isinstance(result.provenance, dict) else {}
    lost = undrawable([*session.get("input_names", ()), *session.get("output_names", ())])
    note = f" {caption_note(lost)}" if lost else ""  # names no installed font can draw: said, not warned
    if result.control_withheld:
        parts.append(f"<p class='withheld'>Closed-loop figures withheld: {esc(result.control_withheld)}.</p>")
    for name, png in figures.items():
        data = base64.b64encode(png).decode("ascii")
        parts.append(f"<figure id='fig-{esc(name)}'><img alt='{esc(name)}' src='data:image/png;base64,{data}'>"
                     f"<figcaption>{esc(_CAPTIONS.get(name, '') + note)}</figcaption></figure>")
    parts.append("<h2>Every method at the base setting</h2>" + _table_html(_key_table(result), index=True))
    parts.append("<h2>Summary in words</h2><ul class='summary'>" + "".join(f"<li>{esc(ln)}</li>" for ln in lines)
                 + "</ul>")
    if not result.surrogate.empty:
        parts.append("<h2>Stand-in plant, per split</h2>" + _table_html(result.surrogate))
    if not result.failures.empty:
        parts.append("<h2>Failed tasks</h2>" + _table_html(result.failures))
    parts.append(_provenance_html(result))
    parts.append("<p class='note'>Tables: <code>tables/*.csv</code> and <code>results.json</code> beside this page."
                 f"</p><div class='caution'>{esc(CAUTION)}</div></body></html>")
    return "\n".join(parts)


def _records_text(df: pd.DataFrame) -> str:
    """A table's records as a JSON array, one record per line (pandas' own encoder, 15 significant digits, NaN and
    infinities as ``null``): what ``json.loads(df.to_json(orient="records", double_precision=15))`` reads."""
    if df.empty:
        return "[]"
    rows = df.to_json(orient="records", lines=True, double_precision=15, force_ascii=False).rstrip("\n")
    return "[\n  " + rows.replace("\n", ",\n  ") + "\n ]"


def bench_run_id(result: BenchResult) -> str:
    """A short identifier of a run: a hash of its provenance (session, settings, time, versions)."""
    return hashlib.sha256(json.dumps(result.provenance, sort_keys=True, default=str).encode()).hexdigest()[:12]


def _json_default(v):
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return str(v)


def results_json(result: BenchResult, lines: list, run_id: str) -> str:
    """``results.json``: run id, caution, summary, provenance, limits, plant and every table (records), as text.

    Standard JSON (no NaN or infinity: they become ``null``), indented, with each table's records one per line.
    """
    payload = {"run_id": run_id, "caution": CAUTION, "summary": lines, "provenance": result.provenance,
               "limits": dict(result.limits), "plant": result.plant, "tables": {}}
    head = json.dumps(payload, indent=1, ensure_ascii=False, allow_nan=False, default=_json_default)
    # the tables (about 4 MB in the demo) one record per line from pandas' encoder, not through json's indenting
    # encoder (pure Python): the same values, read back by ``json.loads``
    tables = ",\n".join(f" {json.dumps(name, ensure_ascii=False)}: {_records_text(frame)}"
                         for name, frame in result.tables().items())
    return head[:-len('"tables": {}\n}')] + '"tables": {\n' + tables + "\n }\n}"
