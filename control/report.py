"""The benchmark report's content: the plain-language summary, the HTML page and the results JSON of a
:class:`~stimsteer.control.evaluation.BenchResult`.

Nothing here touches the file system: the ``stimsteer bench`` command
(:func:`stimsteer.control.commands.bench.write_bench`) writes, atomically::

    DIR/report.html          summary, caution, figures (base64 PNG inside the page), key table, provenance
    DIR/results.json         summary, caution, provenance, limits and every table (records)
    DIR/tables/<name>.csv    every table of :meth:`BenchResult.tables`
    DIR/figures/<name>.png   the figures of the page (:mod:`stimsteer.control.figures.bench`), as files

The summary at the top is generated from the result's numbers (:func:`summarize`): which route won where, with the
95 % intervals, and says "no clear winner" when the paired interval contains zero.
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
from .evaluation import BenchResult, t_interval
from .evaluation.tables import best_label
from .figures._glyphs import caption_note, undrawable

__all__ = ["summarize", "report_html", "results_json", "bench_run_id", "REPORT_FILE", "RESULTS_FILE"]

REPORT_FILE = "report.html"
RESULTS_FILE = "results.json"
#: metric -> (what it is, number format, unit; None = the steered output's unit)
_METRIC_TEXT = {
    "r2_last": ("R²", "{:.3f}", ""), "r2_freerun": ("R²", "{:.3f}", ""), "r2_mean": ("R²", "{:.3f}", ""),
    "tracking_rms": ("RMS tracking error", "{:.3g}", None), "energy_ua2": ("input energy", "{:.3g}", "µA²"),
    "fit_s": ("fit time", "{:.2g}", "s"), "solve_ms_median": ("solve time per step", "{:.2g}", "ms"),
}




# ------------------------------------------------------------------------------------------------ summary
def _base(result: BenchResult, metric: str, label: str):
    s = result.sweeps
    row = s[(s["sweep"] == "base") & (s["metric"] == metric) & (s["label"] == label)]
    return None if row.empty else row.iloc[0]


_NONNEGATIVE = ("tracking_rms", "energy_ua2", "fit_s", "predict_ms_per_window", "solve_ms_median")


def _spec(result: BenchResult, metric: str) -> tuple[str, str, str]:
    name, fmt, unit = _METRIC_TEXT.get(metric, (metric, "{:.4g}", ""))
    return name, fmt, result.steered_unit if unit is None else unit


def _fmt_interval(row, fmt: str, unit: str = "") -> str:
    """``mean [low, high] unit``; the low end of a quantity that cannot be negative is shown clipped at 0."""
    if row is None or not np.isfinite(row["mean"]):
        return "n/a"
    text = fmt.format(row["mean"])
    if np.isfinite(row["ci_low"]):
        low = max(row["ci_low"], 0.0) if row.get("metric") in _NONNEGATIVE else row["ci_low"]
        text += f" [{fmt.format(low)}, {fmt.format(row['ci_high'])}]"
    return f"{text} {unit}" if unit else text


def _verdict(result: BenchResult, metric: str, a: str, b: str, sweep="base", value=None) -> str:
    c = result.comparison
    sel = (c["sweep"] == sweep) & (c["metric"] == metric) & (c["indirect"] == a) & (c["direct"] == b)
    if value is not None:
        sel &= np.isclose(c["value"], value)
    rows = c[sel]
    if rows.empty:
        return ""
    r = rows.iloc[0]
    _name, fmt, unit = _spec(result, metric)
    diff = f"{fmt.format(r['mean_difference'])} [{fmt.format(r['ci_low'])}, {fmt.format(r['ci_high'])}]"
    diff += f" {unit}" if unit else ""
    if r["better"] == "equivalent":
        return (f"equivalent (direct − indirect = {diff}; below the practical margin: |ΔR²| 1e-3, "
                "0.1 VAF point, or 1 % of the value)")
    if r["better"] == "neither":
        why = "too few splits for an interval" if not np.isfinite(r["ci_low"]) else "the interval contains zero"
        return f"no clear winner (direct − indirect = {diff}; {why})"
    return f"the {r['better']} route is better (direct − indirect = {diff})"


def _winner(result: BenchResult, metric: str, a: str, b: str) -> str:
    c = result.comparison
    rows = c[(c["sweep"] == "base") & (c["metric"] == metric) & (c["indirect"] == a) & (c["direct"] == b)]
    if rows.empty:
        return ""
    better = rows.iloc[0]["better"]
    return {"neither": "no clear winner", "equivalent": "equivalent", "indirect": a, "direct": b}[better]


def _glance_line(result: BenchResult, a: str, b: str) -> str:
    """One line of winners, from the same paired comparisons as the detailed lines below it."""
    H = result.settings.horizon_steps
    items = [("r2_last", f"prediction {H} steps ahead"), ("r2_freerun", "free run")]
    if not result.control.empty:
        items += [("tracking_rms", "closed-loop tracking"), ("energy_ua2", "stimulation energy")]
    items.append(("fit_s", "fit time"))
    parts = [f"{what}: {w}" for metric, what in items if (w := _winner(result, metric, a, b))]
    return (f"At a glance ({a} vs {b}; better = the paired 95 % interval excludes zero and the difference exceeds "
            "the practical margin, |ΔR²| 1e-3 or else 1 % of the value): " + "; ".join(parts) + ".")


def _pair_line(result, metric, a, b, what) -> str:
    name, fmt, unit = _spec(result, metric)
    ra, rb = _base(result, metric, a), _base(result, metric, b)
    return (f"{what}: {name} {a} {_fmt_interval(ra, fmt, unit)}, {b} {_fmt_interval(rb, fmt, unit)}; "
            f"{_verdict(result, metric, a, b)}.")


def _data_line(result: BenchResult) -> str:
    p = result.provenance["session"]
    st = result.settings
    n_test = len(result.splits[0].test)
    return (f"Data: {p['n_trials']} trials at {p['sample_rate_hz']:g} Hz, {len(p['input_names'])} input(s), "
            f"{len(p['output_names'])} output(s). {st.n_splits} seeded split(s) of whole trials, each holding out "
            f"{n_test} trial(s) that no route saw while fitting or choosing its settings.")


def _sweep_line(result, a, b, sweep, metric, what) -> str:
    s = result.sweeps
    part = s[(s["sweep"] == sweep) & (s["metric"] == metric)]
    values = sorted(part["value"].unique())
    if len(values) < 2:
        return ""
    lo, hi = values[0], values[-1]
    label, fmt, unit = _spec(result, metric)
    name = {"train_trials": "training trials", "noise_scale": "× the plant's noise",
            "horizon_steps": "steps of horizon"}[sweep]
    parts = []
    for v in (lo, hi):
        ra = part[(part["label"] == a) & np.isclose(part["value"], v)]
        rb = part[(part["label"] == b) & np.isclose(part["value"], v)]
        if ra.empty or rb.empty:
            continue
        parts.append(f"with {v:g} {name}: {a} {_fmt_interval(ra.iloc[0], fmt, unit)} vs {b} "
                     f"{_fmt_interval(rb.iloc[0], fmt, unit)} — {_verdict(result, metric, a, b, sweep, v)}")
    return f"{what} ({label}): " + "; ".join(parts) + "." if parts else ""


def _safety_line(result: BenchResult) -> str:
    c = result.control
    if c.empty:
        return ""
    hard = [k for k in c.columns if k.startswith("violations_") and k != "violations_output_bounds"]
    n_bad = int(c[hard].to_numpy().sum()) if hard else 0
    use = [k for k in c.columns if k.startswith("use_")]
    busiest = max(use, key=lambda k: float(c[k].mean())) if use else None
    text = (f"Limits ({result.limits.get('source', '')}): {n_bad} hard-limit violation(s) over {len(c)} closed "
            f"loops of {result.settings.control.n_steps} steps")
    if busiest is not None and float(c[busiest].mean()) > 0:
        text += f"; the most used limit was {busiest[4:].replace('_', ' ')} (binding on " \
                f"{100 * float(c[busiest].mean()):.1f} % of steps on average)"
    return text + f"; {int(c['n_fallback'].sum())} plan(s) fell back to the safe input."


def _plant_line(result: BenchResult) -> str:
    if result.plant == "ground truth":
        return "Closed loops ran on the session's ground-truth plant (a simulated session)."
    q = result.surrogate
    what = str(result.provenance["plant"]).split(": ", 1)[-1]
    text = (f"Closed loops ran on a surrogate plant: {what}, a richer model class than "
            "either route's, driven with its own innovation noise.")
    if not q.empty:
        m, lo, hi = t_interval(q["r2_freerun"])
        text += f" Its own free-run R² on the trials it never saw: {m:.3f}" + \
            (f" [{lo:.3f}, {hi:.3f}]." if np.isfinite(lo) else ".")
    return text


def summarize(result: BenchResult) -> list[str]:
    """Plain-language findings, each computed from the result's tables (no typed-in figures).

    Returns
    -------
    list of str
        One sentence (or short paragraph) per finding: data, prediction, free run, control, limits, sweeps,
        compute time, failures, and how the intervals are defined.
    """
    st = result.settings
    H = st.horizon_steps
    ms = 1e3 * H / result.provenance["session"]["sample_rate_hz"]
    pairs = [(a, b) for a in result.labels("indirect") for b in result.labels("direct")]
    best = (best_label("indirect"), best_label("direct"))
    if not result.comparison.empty and best[0] in set(result.comparison["indirect"]):
        pairs = [best] + pairs  # each route by its best method on the training trials, first
    lines = [_glance_line(result, a, b) for a, b in pairs] + [_data_line(result)]
    for a, b in pairs:
        lines.append(_pair_line(result, "r2_last", a, b, f"Prediction {H} steps ({ms:.0f} ms) ahead"))
        lines.append(_pair_line(result, "r2_freerun", a, b, "Free-run prediction of whole held-out trials"))
        if not result.control.empty:
            lines.append(_pair_line(result, "tracking_rms", a, b, "Closed-loop control"))
            lines.append(_pair_line(result, "energy_ua2", a, b, "Stimulation energy"))
        for sweep, metric, what in (("train_trials", "r2_last", "Amount of training data"),
                                    ("train_trials", "tracking_rms", "Control vs training data"),
                                    ("noise_scale", "r2_last", "Noise"),
                                    ("horizon_steps", "tracking_rms", "Horizon")):
            lines.append(_sweep_line(result, a, b, sweep, metric, what))
        lines.append(_pair_line(result, "fit_s", a, b, "Compute"))
        if not result.control.empty:
            lines.append(_pair_line(result, "solve_ms_median", a, b, "Compute per control step"))
    if not result.control.empty:
        lines += [_plant_line(result), _safety_line(result)]
    if not result.failures.empty:
        lines.append(f"{len(result.failures)} task(s) failed and are left out of the figures (see tables/tasks.csv); "
                     f"first: {result.failures['error'].iloc[0]}")
    lines.append(f"Intervals: 95 % Student-t intervals over the {st.n_splits} split(s), "
                 "mean ± t(0.975, n−1)·s/√n; route differences are paired by split.")
    return [ln for ln in lines if ln]



# ------------------------------------------------------------------------------------------------ HTML
_CAPTIONS = {
    "predictions": "Recorded outputs of a held-out trial and each route's predictions. Every block of N samples is "
                   "predicted from the measured samples just before it, as a controller would use it.",
    "accuracy_vs_steps": "R² (1 − SSE/SST per channel, then averaged over channels) of predictions 1 … N steps "
                         "ahead on the held-out trials; diamonds: free run over whole trials.",
    "closed_loop": "Receding-horizon control of the first split: the steered output with its target, and the "
                   "stimulation each route applied, with the hard amplitude limits.",
    "tracking_vs_energy": "Each closed loop's RMS tracking error of the steered channel against the stimulation "
                          "energy it used.",
    "training_data": "Both routes refitted on nested subsets of each split's training trials (the data-length "
                     "question of direct vs indirect control), scored on the same held-out trials.",
    "noise": "The simulated session re-recorded from its plant with process noise, measurement noise and drift "
             "scaled; closed loops on the equally noisy plant.",
    "horizon": "Prediction accuracy at the horizon and closed-loop tracking for several horizons N.",
    "compute_time": "Wall time of fitting, of one held-out prediction window and of one control solve.",
}

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:980px;margin:2em auto;padding:0 1em;
color:#1d1d1d;line-height:1.45}
h1{font-size:1.5em;margin-bottom:.2em} h2{font-size:1.15em;margin-top:2em;border-bottom:1px solid #ddd}
.caution{background:#fff4e5;border-left:4px solid #c4561b;padding:.6em 1em;margin:1em 0}
ul.summary li{margin:.3em 0} figure{margin:1.2em 0} figure img{max-width:100%}
figcaption{font-size:.9em;color:#555} table{border-collapse:collapse;font-size:.85em}
td,th{border:1px solid #ddd;padding:3px 7px;text-align:right} th{background:#f4f4f4}
pre{background:#f7f7f7;padding:.8em;overflow-x:auto;font-size:.8em}
"""


def _key_table(result: BenchResult) -> pd.DataFrame:
    """The base-setting figures of every method, one row per metric with a readable name and unit."""
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
    base["value"] = [_fmt_interval(row, "{:.4g}") for _, row in base.iterrows()]
    table = base.pivot(index="metric", columns="label", values="value")
    table = table.reindex(index=[m for m in names if m in table.index],
                          columns=[m.label for m in result.settings.methods if m.label in table.columns])
    table.index = [names[m] for m in table.index]
    table.index.name, table.columns.name = None, None
    return table


def report_html(result: BenchResult, figures: dict, lines: list, run_id: str) -> str:
    """The self-contained report page: caution, summary, key table, embedded figures, provenance.

    Parameters
    ----------
    result : BenchResult
    figures : dict of str to bytes
        PNG images by name (:func:`stimsteer.control.figures.bench.report_figures`), embedded as base64.
    lines : list of str
        The summary (:func:`summarize`).
    run_id : str
        The run's identifier (:func:`bench_run_id`).
    """
    esc = html.escape
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>stimsteer bench {run_id}</title>"
             f"<style>{_CSS}</style></head><body>",
             "<h1>Indirect vs direct: both routes on the same held-out trials</h1>",
             f"<p>stimsteer bench, run {esc(run_id)}, {esc(str(result.provenance.get('started_utc', '')))}</p>",
             f"<div class='caution'>{esc(CAUTION)}</div>", "<h2>Summary</h2><ul class='summary'>"]
    parts += [f"<li>{esc(line)}</li>" for line in lines]
    parts.append("</ul><h2>Key figures (base setting; mean [95 % interval] over splits)</h2>")
    parts.append(_key_table(result).to_html(escape=True, border=0))
    parts.append("<h2>Figures</h2>")
    session = result.provenance.get("session", {}) if isinstance(result.provenance, dict) else {}
    lost = undrawable([*session.get("input_names", ()), *session.get("output_names", ())])
    note = f" {caption_note(lost)}" if lost else ""  # names no installed font can draw: said, not warned
    for name, png in figures.items():
        data = base64.b64encode(png).decode("ascii")
        parts.append(f"<figure><img alt='{esc(name)}' src='data:image/png;base64,{data}'>"
                     f"<figcaption>{esc(_CAPTIONS.get(name, '') + note)}</figcaption></figure>")
    if not result.surrogate.empty:
        parts.append("<h2>Surrogate plant</h2>" + result.surrogate.to_html(index=False, border=0, escape=True))
    if not result.failures.empty:
        parts.append("<h2>Failed tasks</h2>" + result.failures.to_html(index=False, border=0, escape=True))
    parts.append("<h2>Provenance</h2><pre>" + esc(json.dumps(result.provenance, indent=2, ensure_ascii=False))
                 + "</pre>")
    parts.append("<p>Tables: <code>tables/*.csv</code> and <code>results.json</code> beside this page.</p>"
                 f"<div class='caution'>{esc(CAUTION)}</div></body></html>")
    return "\n".join(parts)


def _records(df: pd.DataFrame) -> list:
    return json.loads(df.to_json(orient="records", double_precision=15)) if not df.empty else []


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

    Standard JSON (no NaN or infinity: they become ``null``).
    """
    payload = {"run_id": run_id, "caution": CAUTION, "summary": lines, "provenance": result.provenance,
               "limits": dict(result.limits), "plant": result.plant,
               "tables": {k: _records(v) for k, v in result.tables().items()}}
    return json.dumps(payload, indent=1, ensure_ascii=False, allow_nan=False, default=_json_default)
