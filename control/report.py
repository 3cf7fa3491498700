"""The benchmark report: one self-contained HTML page with embedded figures, plus the tables as CSV and JSON.

:func:`write_report` writes, atomically (a reader never sees a half-written folder, a failure leaves nothing)::

    DIR/report.html          summary, caution, figures (base64 PNG inside the page), key table, provenance
    DIR/results.json         summary, caution, provenance, limits and every table (records)
    DIR/tables/<name>.csv    every table of :meth:`BenchResult.tables`
    DIR/figures/<name>.png   the figures of the page, as files

The summary at the top is generated from the result's numbers (:func:`summarize`): which route won where, with the
95 % intervals, and says "no clear winner" when the paired interval contains zero.
"""

from __future__ import annotations

import base64
import hashlib
import html
import io
import json
import math
from pathlib import Path

import numpy as np
import pandas as pd

from ..sysid._files import atomic_dir
from ..sysid.exceptions import StimsteerError
from .cli import CAUTION
from .evaluation import BenchResult, t_interval

__all__ = ["write_report", "summarize", "check_out_dir", "report_figures", "REPORT_FILE", "RESULTS_FILE"]

REPORT_FILE = "report.html"
RESULTS_FILE = "results.json"

_ROUTE_SHADES = {"indirect": ["#1d5f99", "#5b9bd5", "#0b3a63"], "direct": ["#c4561b", "#e8a33d", "#8a3510"]}
_RECORDED = "#222222"
_TARGET = "#7a7a7a"
_LIMIT = "#a0256e"
_INPUT_COLOURS = ["#3b7d3b", "#7a4fa3", "#b8860b", "#2a8f8f", "#8b3a3a", "#4f4f4f"]
#: metric -> (what it is, number format, unit; None = the steered output's unit)
_METRIC_TEXT = {
    "r2_last": ("R²", "{:.3f}", ""), "r2_freerun": ("R²", "{:.3f}", ""), "r2_mean": ("R²", "{:.3f}", ""),
    "tracking_rms": ("RMS tracking error", "{:.3g}", None), "energy_ua2": ("input energy", "{:.3g}", "µA²"),
    "fit_s": ("fit time", "{:.2g}", "s"), "solve_ms_median": ("solve time per step", "{:.2g}", "ms"),
}


# ------------------------------------------------------------------------------------------------ output folder
def check_out_dir(out_dir, *, force: bool = False) -> Path:
    """Refuse an output folder that exists and holds files (another run), unless ``force``.

    Raises
    ------
    StimsteerError
        The path is a file, or a non-empty folder without ``force`` (the message names the run found there).
    """
    path = Path(out_dir)
    if path.exists() and not path.is_dir():
        raise StimsteerError(f"output folder {path} exists and is a file; choose another --out.")
    if path.is_dir() and any(path.iterdir()) and not force:
        run = ""
        marker = path / RESULTS_FILE
        if marker.is_file():
            try:
                run = f" (benchmark run {json.loads(marker.read_text())['run_id']})"
            except (ValueError, KeyError, OSError):
                run = ""
        raise StimsteerError(f"output folder {path} already holds another run{run}; choose a new --out or pass "
                             "--force to replace it whole (runs are never mixed).")
    return path


# ------------------------------------------------------------------------------------------------ summary
def _labels(result: BenchResult, route: str) -> list:
    return [m.label for m in result.settings.methods if m.route == route]


def _base(result: BenchResult, metric: str, label: str):
    s = result.sweeps
    row = s[(s["sweep"] == "base") & (s["metric"] == metric) & (s["label"] == label)]
    return None if row.empty else row.iloc[0]


_NONNEGATIVE = ("tracking_rms", "energy_ua2", "fit_s", "predict_ms_per_window", "solve_ms_median")


def _spec(result: BenchResult, metric: str) -> tuple[str, str, str]:
    name, fmt, unit = _METRIC_TEXT.get(metric, (metric, "{:.4g}", ""))
    return name, fmt, _steered_unit(result) if unit is None else unit


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
    return "no clear winner" if better == "neither" else {"indirect": a, "direct": b}[better]


def _glance_line(result: BenchResult, a: str, b: str) -> str:
    """One line of winners, from the same paired comparisons as the detailed lines below it."""
    H = result.settings.horizon_steps
    items = [("r2_last", f"prediction {H} steps ahead"), ("r2_freerun", "free run")]
    if not result.control.empty:
        items += [("tracking_rms", "closed-loop tracking"), ("energy_ua2", "stimulation energy")]
    items.append(("fit_s", "fit time"))
    parts = [f"{what}: {w}" for metric, what in items if (w := _winner(result, metric, a, b))]
    return f"At a glance ({a} vs {b}; better = the paired 95 % interval excludes zero): " + "; ".join(parts) + "."


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


def _steered_unit(result: BenchResult) -> str:
    loop = result.traces.get("closed_loop", pd.DataFrame())
    return _unit(result, loop["channel"].iloc[0]) if not loop.empty else "a.u."


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
    pairs = [(a, b) for a in _labels(result, "indirect") for b in _labels(result, "direct")]
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


# ------------------------------------------------------------------------------------------------ figures
def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 9, "axes.titlesize": 10, "axes.labelsize": 9, "legend.fontsize": 8,
                         "axes.spines.top": False, "axes.spines.right": False, "axes.grid": True,
                         "grid.color": "#e4e4e4", "grid.linewidth": 0.6, "figure.dpi": 110,
                         "savefig.bbox": "tight"})
    return plt


def _colours(result: BenchResult) -> dict:
    out, used = {}, {"indirect": 0, "direct": 0}
    for m in result.settings.methods:
        shades = _ROUTE_SHADES[m.route]
        out[m.label] = shades[used[m.route] % len(shades)]
        used[m.route] += 1
    return out


def _unit(result: BenchResult, channel: str) -> str:
    s = result.provenance["session"]
    return dict(zip(s["output_names"], s["output_units"])).get(channel, "a.u.")


def _busiest_window(part: pd.DataFrame, seconds: float) -> tuple[float, float]:
    """The ``seconds``-long stretch of a trace with the largest recorded variance (the most informative part)."""
    t, y = part["time_s"].to_numpy(), part["recorded"].to_numpy()
    if t[-1] - t[0] <= seconds:
        return float(t[0]), float(t[-1])
    n = max(2, int(np.searchsorted(t, t[0] + seconds)))
    energy = np.convolve((y - y.mean()) ** 2, np.ones(n), mode="valid")
    i = int(np.argmax(energy))
    return float(t[i]), float(t[min(i + n - 1, t.size - 1)])


def _fig_predictions(result, plt, colours):
    tr = result.traces.get("prediction", pd.DataFrame())
    if tr.empty:
        return None
    channels = list(dict.fromkeys(tr["channel"]))
    fig, axes = plt.subplots(len(channels), 1, figsize=(8.0, 2.4 * len(channels)), squeeze=False)
    H = result.settings.horizon_steps
    for ax, ch in zip(axes[:, 0], channels):
        part = tr[tr["channel"] == ch]
        first = part[part["label"] == part["label"].iloc[0]]
        t0, t1 = _busiest_window(first, 1.0)
        keep = lambda g: g[(g["time_s"] >= t0) & (g["time_s"] <= t1)]  # noqa: E731
        rec = keep(first)
        ax.plot(rec["time_s"], rec["recorded"], color=_RECORDED, lw=1.3, label="recorded")
        for label, g in part.groupby("label", sort=False):
            g = keep(g)
            route = "direct" if label.startswith("direct") else "indirect"
            ax.plot(g["time_s"], g["predicted"], color=colours[label], lw=1.1, alpha=0.95,
                    ls="--" if route == "direct" else "-", label=label)
        ax.set_ylabel(f"{ch} [{_unit(result, ch)}]")
        ax.set_xlabel("time in the held-out trial [s]")
    axes[0, 0].legend(loc="upper right", ncol=3, frameon=False)
    trial = int(tr["trial"].iloc[0]) if "trial" in tr else -1
    axes[0, 0].set_title(f"Held-out trial {trial} (its most active second): recorded vs {H}-step predictions\n"
                         f"each block of {H} samples predicted from the measured samples just before it")
    fig.tight_layout()
    return fig


def _by_split_step(result):
    p = result.prediction
    st = result.settings
    base = p[(p["n_train_trials"] == p.groupby("split")["n_train_trials"].transform("max")) &
             (p["noise_scale"] == 1.0) & (p["horizon_steps"] == st.horizon_steps)]
    return base.groupby(["label", "mode", "split", "step"], as_index=False)["r2"].mean()


def _fig_accuracy(result, plt, colours):
    g = _by_split_step(result)
    if g.empty:
        return None
    rate = result.provenance["session"]["sample_rate_hz"]
    H = result.settings.horizon_steps
    fig, (ax, axd) = plt.subplots(2, 1, figsize=(7.0, 5.4), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    for label in colours:
        ks = g[(g["label"] == label) & (g["mode"] == "kstep")]
        if ks.empty:
            continue
        _band(ax, ks.pivot(index="split", columns="step", values="r2"), colours[label], label)
        _point(ax, H + 2.5, g[(g["label"] == label) & (g["mode"] == "freerun")]["r2"], colours[label])
    for a in _labels(result, "indirect"):
        for b in _labels(result, "direct"):
            wa = g[(g["label"] == a)].pivot_table(index="split", columns=["mode", "step"], values="r2")
            wb = g[(g["label"] == b)].pivot_table(index="split", columns=["mode", "step"], values="r2")
            d = (wb - wa).dropna()
            if d.empty or "kstep" not in d.columns.get_level_values(0):
                continue
            _band(axd, d["kstep"], colours[b], f"{b} − {a}")
            if "freerun" in d.columns.get_level_values(0):
                _point(axd, H + 2.5, d["freerun"].iloc[:, 0], colours[b])
    axd.axhline(0.0, color="#555555", lw=0.8)
    ticks = [t for t in range(1, H + 1) if t in (1, H) or t % max(1, H // 5) == 0]
    axd.set_xticks(ticks + [H + 2.5])
    axd.set_xticklabels([str(t) for t in ticks] + ["free\nrun"])
    axd.set_xlim(0.5, H + 4)
    axd.set_xlabel(f"steps ahead (1 step = {1e3 / rate:.3g} ms)")
    ax.set_ylabel("R² on held-out trials\n(mean over channels)")
    axd.set_ylabel("paired difference\nin R² (direct − indirect)")
    ax.set_title("Prediction accuracy vs steps ahead (mean and 95 % interval over splits)")
    ax.legend(frameon=False, loc="lower left")
    axd.legend(frameon=False, loc="lower left")
    fig.tight_layout()
    return fig


def _band(ax, wide: pd.DataFrame, colour, label):
    """Mean over the rows (splits) of each column with its t-interval as a shaded band."""
    steps = list(wide.columns)
    ci = np.array([t_interval(wide[s]) for s in steps])
    ax.plot(steps, ci[:, 0], color=colour, lw=1.6, label=label)
    if np.all(np.isfinite(ci[:, 1])):
        ax.fill_between(steps, ci[:, 1], ci[:, 2], color=colour, alpha=0.18, lw=0)


def _point(ax, x, values, colour):
    m, lo, hi = t_interval(values)
    if np.isfinite(m):
        err = None if not np.isfinite(lo) else [[m - lo], [hi - m]]
        ax.errorbar([x], [m], yerr=err, fmt="D", color=colour, ms=5, capsize=3)


def _fig_closed_loop(result, plt, colours):
    tr = result.traces.get("closed_loop", pd.DataFrame())
    if tr.empty:
        return None
    labels = list(dict.fromkeys(tr["label"]))
    fig, axes = plt.subplots(1 + len(labels), 1, figsize=(8.0, 2.2 * (1 + len(labels))), sharex=True)
    out = tr[tr["signal"] == "output"]
    ch = out["channel"].iloc[0]
    tgt = tr[(tr["signal"] == "target") & (tr["label"] == labels[0])]
    axes[0].plot(tgt["time_s"], tgt["value"], color=_TARGET, lw=1.4, ls="--", label="target")
    for label in labels:
        o = out[out["label"] == label]
        axes[0].plot(o["time_s"], o["value"], color=colours[label], lw=1.0, label=label,
                     ls="--" if label.startswith("direct") else "-")
    axes[0].set_ylabel(f"{ch} [{_unit(result, ch)}]")
    axes[0].legend(frameon=False, ncol=3, loc="upper right")
    axes[0].set_title(f"Closed loop on the {result.plant.replace(' ', '-')} plant: steered output (first split)")
    lim = result.limits or {}
    for ax, label in zip(axes[1:], labels):
        inp = tr[(tr["signal"] == "input") & (tr["label"] == label)]
        for i, (name, g) in enumerate(inp.groupby("channel", sort=False)):
            ax.plot(g["time_s"], g["value"], lw=0.9, label=name, color=_INPUT_COLOURS[i % len(_INPUT_COLOURS)])
        _limit_lines(ax, lim)
        ax.set_ylabel("input [µA]")
        ax.set_title(f"{label}: stimulation (dotted: hard amplitude limits of the inputs)", fontsize=9)
        ax.legend(frameon=False, ncol=6, loc="upper right")
    axes[-1].set_xlabel("time in the closed loop [s]")
    return fig


def _limit_lines(ax, lim: dict) -> None:
    """Dotted lines at the hard amplitude limits, each labelled with the inputs it bounds."""
    names = list(lim.get("input_names") or [])
    at = {}
    for key in ("effective_min_ua", "effective_max_ua"):
        for name, v in zip(names, lim.get(key) or []):
            if v is not None:
                at.setdefault(float(v), []).append(name)
    for v, who in sorted(at.items()):
        ax.axhline(v, color=_LIMIT, ls=":", lw=1.2)
        ax.annotate(", ".join(who), xy=(1.0, v), xycoords=("axes fraction", "data"), xytext=(3, 0),
                    textcoords="offset points", va="center", ha="left", fontsize=7, color=_LIMIT)


def _fig_tradeoff(result, plt, colours):
    c = result.control
    if c.empty:
        return None
    st = result.settings
    base = c[(c["n_train_trials"] == c.groupby("split")["n_train_trials"].transform("max"))
             & (c["noise_scale"] == 1.0) & (c["horizon_steps"] == st.horizon_steps)]
    fig, ax = plt.subplots(figsize=(5.8, 4.0))
    for label, g in base.groupby("label"):
        ax.scatter(g["energy_ua2"], g["tracking_rms"], color=colours[label], alpha=0.45, s=22, lw=0)
        mx, xlo, xhi = t_interval(g["energy_ua2"])
        my, ylo, yhi = t_interval(g["tracking_rms"])
        xerr = None if not np.isfinite(xlo) else [[mx - xlo], [xhi - mx]]
        yerr = None if not np.isfinite(ylo) else [[my - ylo], [yhi - my]]
        ax.errorbar([mx], [my], xerr=xerr, yerr=yerr, fmt="o", color=colours[label], ms=7, capsize=3, label=label)
    unit = _steered_unit(result)
    ax.set_xlabel("stimulation energy Σu² over the run [µA²]")
    ax.set_ylabel(f"RMS tracking error [{unit}]")
    ax.set_title("Tracking error vs energy (dots: splits; marker: mean, 95 % interval)")
    ax.legend(frameon=False)
    return fig


def _sweep_panels(result, plt, colours, sweep, xlabel, title, logx=False):
    s = result.sweeps
    part = s[s["sweep"] == sweep]
    if part.empty:
        return None
    unit = _steered_unit(result)
    ahead = result.settings.horizon_steps if sweep != "horizon_steps" else "N"
    metrics = [("r2_last", f"R² {ahead} steps ahead (held-out)"), ("tracking_rms", f"RMS tracking error [{unit}]")]
    metrics = [(m, t) for m, t in metrics if (part["metric"] == m).any()]
    fig, axes = plt.subplots(1, len(metrics), figsize=(4.2 * len(metrics), 3.3), squeeze=False)
    for ax, (metric, ylabel) in zip(axes[0], metrics):
        for label in colours:
            g = part[(part["metric"] == metric) & (part["label"] == label)].sort_values("value")
            if g.empty:
                continue
            ax.plot(g["value"], g["mean"], "-o", color=colours[label], ms=4, lw=1.5, label=label)
            ax.fill_between(g["value"], g["ci_low"], g["ci_high"], color=colours[label], alpha=0.18, lw=0)
        ax.set_xlabel(xlabel)
        ax.set_ylabel(ylabel)
        values = sorted(part["value"].unique())
        if logx and min(values) > 0:
            ax.set_xscale("log", base=2)
        ax.set_xticks(values)
        ax.set_xticklabels([f"{v:g}" for v in values])
        ax.minorticks_off()
    axes[0, 0].legend(frameon=False)
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return fig


def _fig_compute(result, plt, colours):
    s = result.sweeps
    base = s[s["sweep"] == "base"]
    panels = [("fit_s", "fit [s]"), ("predict_ms_per_window", "prediction [ms per window]"),
              ("solve_ms_median", "control solve [ms per step]")]
    panels = [p for p in panels if (base["metric"] == p[0]).any()]
    fig, axes = plt.subplots(1, len(panels), figsize=(3.0 * len(panels), 2.6), squeeze=False)
    labels = list(colours)[::-1]
    for ax, (metric, xlabel) in zip(axes[0], panels):
        for i, label in enumerate(labels):
            g = base[(base["metric"] == metric) & (base["label"] == label)]
            if g.empty:
                continue
            r = g.iloc[0]
            err = None if not np.isfinite(r["ci_low"]) else [[r["mean"] - max(r["ci_low"], 0)],
                                                              [r["ci_high"] - r["mean"]]]
            ax.barh([i], [r["mean"]], xerr=err, color=colours[label], height=0.6, capsize=3)
        ax.set_yticks(range(len(labels)))
        ax.set_yticklabels(labels if ax is axes[0, 0] else [""] * len(labels))
        ax.set_xlabel(xlabel)
        ax.set_axisbelow(True)
        ax.grid(axis="y", visible=False)
    fig.suptitle("Compute time (mean and 95 % interval over splits; single-threaded tasks)", fontsize=10)
    fig.tight_layout()
    return fig


def report_figures(result: BenchResult) -> dict:
    """The report's figures as PNG bytes, by file stem (only those the result has data for)."""
    plt = _pyplot()
    colours = _colours(result)
    makers = {
        "predictions": lambda: _fig_predictions(result, plt, colours),
        "accuracy_vs_steps": lambda: _fig_accuracy(result, plt, colours),
        "closed_loop": lambda: _fig_closed_loop(result, plt, colours),
        "tracking_vs_energy": lambda: _fig_tradeoff(result, plt, colours),
        "training_data": lambda: _sweep_panels(result, plt, colours, "train_trials", "training trials",
                                               "Accuracy and control vs amount of training data"),
        "noise": lambda: _sweep_panels(result, plt, colours, "noise_scale", "noise level (× the plant's)",
                                       "Accuracy and control vs noise (re-recorded from the plant)", logx=True),
        "horizon": lambda: _sweep_panels(result, plt, colours, "horizon_steps", "horizon N [steps]",
                                         "Accuracy at the horizon and control vs horizon"),
        "compute_time": lambda: _fig_compute(result, plt, colours),
    }
    out = {}
    for name, make in makers.items():
        fig = make()
        if fig is None:
            continue
        buf = io.BytesIO()
        fig.savefig(buf, format="png")
        plt.close(fig)
        out[name] = buf.getvalue()
    return out


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
    H, unit = result.settings.horizon_steps, _steered_unit(result)
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


def _html(result: BenchResult, figures: dict, lines: list, run_id: str) -> str:
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
    for name, png in figures.items():
        data = base64.b64encode(png).decode("ascii")
        parts.append(f"<figure><img alt='{esc(name)}' src='data:image/png;base64,{data}'>"
                     f"<figcaption>{esc(_CAPTIONS.get(name, ''))}</figcaption></figure>")
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


def _run_id(result: BenchResult) -> str:
    return hashlib.sha256(json.dumps(result.provenance, sort_keys=True, default=str).encode()).hexdigest()[:12]


def write_report(result: BenchResult, out_dir, *, force: bool = False) -> dict:
    """Write the report folder atomically: HTML page, results JSON, CSV tables, PNG figures.

    Parameters
    ----------
    result : BenchResult
    out_dir : str or Path
        Must be new or empty, unless ``force`` (then it is replaced whole: runs are never mixed).
    force : bool, default False

    Returns
    -------
    dict of str to Path
        ``report``, ``results``, and one entry per table (``table:<name>``) and figure (``figure:<name>``).

    Raises
    ------
    StimsteerError
        ``out_dir`` is a file, or holds another run and ``force`` is False.
    """
    if not isinstance(result, BenchResult):
        raise StimsteerError(f"write_report needs a BenchResult from run_bench; got {type(result).__name__}.")
    final = check_out_dir(out_dir, force=force)
    lines = summarize(result)
    figures = report_figures(result)
    run_id = _run_id(result)
    files = {}
    with atomic_dir(final, force=force) as tmp:
        (tmp / "tables").mkdir()
        (tmp / "figures").mkdir()
        for name, table in result.tables().items():
            table.to_csv(tmp / "tables" / f"{name}.csv", index=False)
            files[f"table:{name}"] = final / "tables" / f"{name}.csv"
        for name, png in figures.items():
            (tmp / "figures" / f"{name}.png").write_bytes(png)
            files[f"figure:{name}"] = final / "figures" / f"{name}.png"
        payload = {"run_id": run_id, "caution": CAUTION, "summary": lines, "provenance": result.provenance,
                   "limits": dict(result.limits), "plant": result.plant,
                   "tables": {k: _records(v) for k, v in result.tables().items()}}
        (tmp / RESULTS_FILE).write_text(json.dumps(payload, indent=1, ensure_ascii=False, allow_nan=False,
                                                   default=_json_default), encoding="utf-8")
        (tmp / REPORT_FILE).write_text(_html(result, figures, lines, run_id), encoding="utf-8")
    files["report"], files["results"] = final / REPORT_FILE, final / RESULTS_FILE
    return files


def _json_default(v):
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return str(v)
