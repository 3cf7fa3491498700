"""The benchmark report's figures, drawn from a :class:`~stimsteer.control.evaluation.BenchResult`.

matplotlib's object API only: every figure is a :class:`matplotlib.figure.Figure` of its own, and its style (font
sizes, grid, spines) is passed to each axes and artist, so drawing a report never changes a user's pyplot state,
backend or ``rcParams``.
"""

from __future__ import annotations

import textwrap

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from ._forked import ForkedDrawing
from ._glyphs import GlyphSafeFigure
from ._in_view import trim_ticks

from ..evaluation import BenchResult, t_interval

__all__ = ["report_figures", "figure_makers", "drawing", "method_colours", "fig_predictions", "fig_accuracy",
           "fig_closed_loop", "fig_tradeoff", "fig_sweep", "fig_compute"]

_ROUTE_SHADES = {"indirect": ["#1d5f99", "#5b9bd5", "#0b3a63"], "direct": ["#c4561b", "#e8a33d", "#8a3510"]}
_RECORDED = "#222222"
_TARGET = "#7a7a7a"
_ALLOWED = "#dfeadb"
_DPI = 110
# font sizes (points) of tick labels and axis labels, titles, legends
_TEXT, _TITLE, _LEGEND = 9, 10, 8
_GRID = {"color": "#e4e4e4", "linewidth": 0.6}
# the widest average character of DejaVu Sans in the report's texts, in ems (to wrap titles to the figure's width)
_CHAR_EM = 0.56


# ------------------------------------------------------------------------------------------------ style
def _figure(nrows: int, ncols: int, figsize, **kwargs):
    """A new figure and its axes grid (always 2-D), each axes styled (light grid, no top and right spines).

    The figure is laid out by matplotlib's constrained layout when it is drawn (titles, legends beside the axes and
    labels all inside it), so it is drawn once when saved (:class:`GlyphSafeFigure`)."""
    fig = GlyphSafeFigure(figsize=figsize, dpi=_DPI, layout="constrained")
    axes = fig.subplots(nrows, ncols, squeeze=False, **kwargs)
    for ax in axes.flat:
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(True, **_GRID)
        ax.tick_params(labelsize=_TEXT)
    trim_ticks(fig)  # the view is read when the figure is drawn, after the data are in
    return fig, axes


def _fitted(fig, text: str, size: float, share: float = 1.0) -> str:
    """``text`` with each line wrapped to ``share`` of the figure's width (a title never runs off the figure: the
    figures are laid out inside their own size, not grown to their content when saved)."""
    chars = max(20, int(share * fig.get_figwidth() * 72.0 / (_CHAR_EM * size)))
    return "\n".join(textwrap.fill(line, chars, break_on_hyphens=False) or line for line in text.split("\n"))


def _labels(ax, xlabel=None, ylabel=None, title=None, title_size=_TITLE) -> None:
    if xlabel is not None:
        ax.set_xlabel(xlabel, fontsize=_TEXT)
    if ylabel is not None:
        ax.set_ylabel(ylabel, fontsize=_TEXT)
    if title is not None:  # centred over its axes: wrapped to their width (a title as wide as the figure ran off
        # its left edge where an outside legend narrows the axes: the 1 kHz benchmark's accuracy figure)
        ax.set_title(_fitted(ax.get_figure(), title, title_size, ax.get_position().width), fontsize=title_size)


def _legend_outside(ax, **kwargs) -> None:
    """The legend to the right of the axes, never over the data (the layout makes room for it in the figure)."""
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=_LEGEND, borderaxespad=0.0,
              **kwargs)


def _who(result: BenchResult) -> str:
    """The compared methods by route, for titles: "indirect (arx, subspace) vs direct (hankel, lsq)"."""
    parts = []
    for route in ("indirect", "direct"):
        methods = [m.method for m in result.settings.methods if m.route == route]
        if methods:
            parts.append(f"{route} ({', '.join(methods)})")
    return " vs ".join(parts)


def _line_style(route: str) -> str:
    """Direct-route curves dashed, indirect-route curves solid."""
    return "--" if route == "direct" else "-"


def method_colours(result: BenchResult) -> dict:
    """Colour of each compared method, by label: blues for the indirect route, oranges for the direct one."""
    out, used = {}, {"indirect": 0, "direct": 0}
    for m in result.settings.methods:
        shades = _ROUTE_SHADES[m.route]
        out[m.label] = shades[used[m.route] % len(shades)]
        used[m.route] += 1
    return out


# ------------------------------------------------------------------------------------------------ predictions
def _busiest_window(part: pd.DataFrame, seconds: float) -> tuple[float, float]:
    """The ``seconds``-long stretch of a trace with the largest recorded variance (the most informative part)."""
    t, y = part["time_s"].to_numpy(), part["recorded"].to_numpy()
    if t[-1] - t[0] <= seconds:
        return float(t[0]), float(t[-1])
    n = max(2, int(np.searchsorted(t, t[0] + seconds)))
    energy = np.convolve((y - y.mean()) ** 2, np.ones(n), mode="valid")
    i = int(np.argmax(energy))
    return float(t[i]), float(t[min(i + n - 1, t.size - 1)])


def fig_predictions(result: BenchResult, colours: dict):
    """Recorded outputs of a held-out trial and every method's H-step predictions (None without a trace)."""
    tr = result.traces.get("prediction", pd.DataFrame())
    if tr.empty:
        return None
    channels = list(dict.fromkeys(tr["channel"]))
    fig, axes = _figure(len(channels), 1, (9.2, 2.4 * len(channels)))
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
            ax.plot(g["time_s"], g["predicted"], color=colours[label], lw=1.1, alpha=0.95,
                    ls=_line_style(g["route"].iloc[0]), label=label)
        _labels(ax, "time in the held-out trial [s]", f"{ch} [{result.output_unit(ch)}]")
    _legend_outside(axes[0, 0])
    trial = int(tr["trial"].iloc[0]) if "trial" in tr else -1
    _labels(axes[0, 0], title=f"Held-out trial {trial} (its most active second): recorded vs {H}-step predictions of "
                              f"{_who(result)}\neach block of {H} samples predicted from the measured samples just "
                              "before it")
    return fig


def _by_split_step(result):
    p = result.prediction
    st = result.settings
    base = p[(p["n_train_trials"] == p.groupby("split")["n_train_trials"].transform("max")) &
             (p["noise_scale"] == 1.0) & (p["horizon_steps"] == st.horizon_steps)]
    return base.groupby(["label", "mode", "split", "step"], as_index=False)["r2"].mean()


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


def _paired_bands(axd, g, result, colours, H) -> None:
    """Paired differences in R² (direct − indirect) per step ahead, and of the free run, on ``axd``."""
    # one table of every label (g has one row per label, mode, split and step: each cell is that row's value)
    table = g.pivot_table(index="split", columns=["label", "mode", "step"], values="r2")
    wide = {label: table[label] if label in table.columns.get_level_values(0) else pd.DataFrame()
            for label in (*result.labels("indirect"), *result.labels("direct"))}
    for a in result.labels("indirect"):
        for b in result.labels("direct"):
            d = (wide[b] - wide[a]).dropna()
            if d.empty or "kstep" not in d.columns.get_level_values(0):
                continue
            _band(axd, d["kstep"], colours[b], f"{b} − {a}")
            if "freerun" in d.columns.get_level_values(0):
                _point(axd, H + 2.5, d["freerun"].iloc[:, 0], colours[b])


def fig_accuracy(result: BenchResult, colours: dict):
    """R² against steps ahead with intervals, and the paired differences between the routes."""
    g = _by_split_step(result)
    if g.empty:
        return None
    rate = result.provenance["session"]["sample_rate_hz"]
    H = result.settings.horizon_steps
    fig, axes = _figure(2, 1, (7.4, 5.4), sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    ax, axd = axes[0, 0], axes[1, 0]
    for label in colours:
        ks = g[(g["label"] == label) & (g["mode"] == "kstep")]
        if ks.empty:
            continue
        _band(ax, ks.pivot(index="split", columns="step", values="r2"), colours[label], label)
        _point(ax, H + 2.5, g[(g["label"] == label) & (g["mode"] == "freerun")]["r2"], colours[label])
    _paired_bands(axd, g, result, colours, H)
    axd.axhline(0.0, color="#555555", lw=0.8)
    ticks = [t for t in range(1, H + 1) if t in (1, H) or t % max(1, H // 5) == 0]
    axd.set_xticks(ticks + [H + 2.5])
    axd.set_xticklabels([str(t) for t in ticks] + ["free\nrun"])
    axd.set_xlim(0.5, H + 4)
    _labels(axd, f"steps ahead [steps of {1e3 / rate:.3g} ms]", "paired difference in R²\n(direct − indirect; no unit)")
    _ceiling_marks(ax, result, H)
    _labels(ax, ylabel="R² on held-out trials\n(mean over channels; no unit)",
            title=f"Prediction accuracy vs steps ahead: {_who(result)}\n(mean and 95 % interval over splits)")
    _legend_outside(ax)
    if axd.get_legend_handles_labels()[0]:
        _legend_outside(axd)
    return fig


def _ceiling_marks(ax, result: BenchResult, H: int) -> None:
    """The true model's R² at the horizon and in free run (simulated sessions with their plant), as grey bars."""
    refs = getattr(result, "references", None)
    if refs is None or refs.empty:
        return
    ceiling = refs[refs["reference"] == "ceiling: true model"]
    for x, metric in ((H, "r2_last"), (H + 2.5, "r2_freerun")):
        m = float(ceiling[metric].mean()) if not ceiling.empty else float("nan")
        if np.isfinite(m):
            ax.plot([x - 0.6, x + 0.6], [m, m], color=_TARGET, lw=2.4, solid_capstyle="butt",
                    label="ceiling: true model" if metric == "r2_last" else None)


# ------------------------------------------------------------------------------------------------ closed loop
def _allowed_band(ax, lim: dict, name: str, t) -> None:
    """The hard amplitude window of one input, shaded over the loop's time."""
    names = list(lim.get("input_names") or [])
    if name not in names:
        return
    i = names.index(name)
    lo, hi = (lim.get(k) or [None] * len(names) for k in ("effective_min_ua", "effective_max_ua"))
    if lo[i] is not None and hi[i] is not None:
        ax.fill_between([t[0], t[-1]], [lo[i]] * 2, [hi[i]] * 2, color=_ALLOWED, lw=0, zorder=0)


def fig_closed_loop(result: BenchResult, colours: dict):
    """The steered output with its target, and one strip per input with both routes' stimulation inside the
    allowed region (shaded)."""
    tr = result.traces.get("closed_loop", pd.DataFrame())
    if tr.empty:
        return None
    labels = list(dict.fromkeys(tr["label"]))
    inputs = list(dict.fromkeys(tr.loc[tr["signal"] == "input", "channel"]))
    fig, grid = _figure(1 + len(inputs), 1, (8.6, 2.4 + 1.5 * len(inputs)), sharex=True,
                        gridspec_kw={"height_ratios": [1.7] + [1.0] * len(inputs)})
    axes = grid[:, 0]
    out = tr[tr["signal"] == "output"]
    ch = out["channel"].iloc[0]
    tgt = tr[(tr["signal"] == "target") & (tr["label"] == labels[0])]
    axes[0].plot(tgt["time_s"], tgt["value"], color=_TARGET, lw=2.2, alpha=0.6, label="target")
    for label in labels:
        o = out[out["label"] == label]
        axes[0].plot(o["time_s"], o["value"], color=colours[label], lw=1.1, label=label,
                     ls=_line_style(o["route"].iloc[0]))
    _legend_outside(axes[0])
    _labels(axes[0], ylabel=f"{ch} [{result.output_unit(ch)}]",
            title=f"Closed loop on the {result.plant} plant: {ch} steered by {' and '.join(labels)} (first split)")
    lim = result.limits or {}
    for ax, name in zip(axes[1:], inputs):
        part = tr[(tr["signal"] == "input") & (tr["channel"] == name)]
        _allowed_band(ax, lim, name, part["time_s"].to_numpy())
        for label in labels:
            g = part[part["label"] == label]
            ax.step(g["time_s"], g["value"], where="post", lw=1.0, color=colours[label], label=label,
                    ls=_line_style(g["route"].iloc[0]))
        _labels(ax, ylabel=f"{name} [µA]")
    axes[1].set_title("stimulation of each input inside its allowed region (shaded: the hard amplitude limits)",
                      fontsize=9)
    _labels(axes[-1], xlabel="time in the closed loop [s]")
    return fig


def fig_tradeoff(result: BenchResult, colours: dict):
    """Each closed loop's tracking error against its stimulation energy, with the means and intervals."""
    c = result.control
    if c.empty:
        return None
    st = result.settings
    base = c[(c["n_train_trials"] == c.groupby("split")["n_train_trials"].transform("max"))
             & (c["noise_scale"] == 1.0) & (c["horizon_steps"] == st.horizon_steps)]
    fig, axes = _figure(1, 1, (7.0, 4.2))
    ax = axes[0, 0]
    for label, g in base.groupby("label"):
        ax.scatter(g["energy_ua2"], g["tracking_rms"], color=colours[label], alpha=0.45, s=22, lw=0)
        mx, xlo, xhi = t_interval(g["energy_ua2"])
        my, ylo, yhi = t_interval(g["tracking_rms"])
        xerr = None if not np.isfinite(xlo) else [[mx - xlo], [xhi - mx]]
        yerr = None if not np.isfinite(ylo) else [[my - ylo], [yhi - my]]
        ax.errorbar([mx], [my], xerr=xerr, yerr=yerr, fmt="o", color=colours[label], ms=7, capsize=3, label=label)
    _reference_points(ax, result)
    _labels(ax, "stimulation energy Σu² over the run [µA²]", f"RMS tracking error [{result.steered_unit}]",
            f"Tracking error vs energy: {_who(result)}\n(dots: splits; marker: mean, 95 % interval)")
    _legend_outside(ax)
    return fig


def _reference_points(ax, result: BenchResult) -> None:
    """The floor (no stimulation) and the ceiling (the true model's controller), grey, labelled beside them."""
    refs = getattr(result, "references", None)
    if refs is None or refs.empty:
        return
    for name, marker in (("floor: no stimulation", "v"), ("ceiling: true model", "^")):
        g = refs[(refs["reference"] == name) & refs["tracking_rms"].notna()]
        if g.empty:
            continue
        x, y = float(g["energy_ua2"].mean()), float(g["tracking_rms"].mean())
        ax.plot([x], [y], marker, color=_TARGET, ms=8, label=name)
        ax.annotate(name, (x, y), xytext=(6, 0), textcoords="offset points", va="center", fontsize=7,
                    color=_TARGET)


# ------------------------------------------------------------------------------------------------ sweeps and compute
def fig_sweep(result: BenchResult, colours: dict, sweep: str, xlabel: str, title: str):
    """Accuracy at the horizon and tracking error against the values of one sweep (None without that sweep)."""
    s = result.sweeps
    part = s[s["sweep"] == sweep]
    if part.empty:
        return None
    ahead = result.settings.horizon_steps if sweep != "horizon_steps" else "N"
    metrics = [("r2_last", f"R² {ahead} steps ahead (held-out; no unit)"),
               ("tracking_rms", f"RMS tracking error [{result.steered_unit}]")]
    metrics = [(m, t) for m, t in metrics if (part["metric"] == m).any()
               and not (m == "tracking_rms" and result.control_withheld)]
    fig, axes = _figure(1, len(metrics), (4.2 * len(metrics), 3.3))
    values = sorted(part["value"].unique())
    for ax, (metric, ylabel) in zip(axes[0], metrics):
        for label in colours:
            g = part[(part["metric"] == metric) & (part["label"] == label)].sort_values("value")
            if g.empty:
                continue
            ax.plot(g["value"], g["mean"], "-o", color=colours[label], ms=4, lw=1.5, label=label)
            ax.fill_between(g["value"], g["ci_low"], g["ci_high"], color=colours[label], alpha=0.18, lw=0)
        _labels(ax, xlabel, ylabel)
        ax.set_xticks(values)
        ax.set_xticklabels([f"{v:g}" for v in values])
        ax.minorticks_off()
    _legend_outside(axes[0, -1])
    fig.suptitle(_fitted(fig, f"{title}: {_who(result)}", _TITLE), fontsize=_TITLE)
    return fig


def _compute_bars(ax, rows: pd.DataFrame, labels: list, colours: dict) -> None:
    """One bar per label at height ``i`` (its first row's mean), with its interval where it is finite: one ``barh``
    for the bars with an interval and one for those without (the bars do not overlap: the same picture as a bar
    each)."""
    first = rows.drop_duplicates("label").set_index("label")
    shown = [(i, first.loc[label]) for i, label in enumerate(labels) if label in first.index]
    for finite in (True, False):
        part = [(i, r) for i, r in shown if bool(np.isfinite(r["ci_low"])) == finite]
        if not part:
            continue
        at = [i for i, _ in part]
        mean = np.array([r["mean"] for _, r in part], dtype=float)
        err = np.array([[r["mean"] - r["ci_low"] for _, r in part], [r["ci_high"] - r["mean"] for _, r in part]],
                       dtype=float) if finite else None
        ax.barh(at, mean, xerr=err, color=[colours[labels[i]] for i in at], height=0.6, capsize=3)


def fig_compute(result: BenchResult, colours: dict):
    """Wall time of fitting, of one prediction window and of one control solve, per method."""
    s = result.sweeps
    base = s[s["sweep"] == "base"]
    panels = [("fit_s", "fit [s]"), ("predict_ms_per_window", "prediction [ms per window]"),
              ("solve_ms_median", "control solve [ms per step]")]
    panels = [p for p in panels if (base["metric"] == p[0]).any()]
    fig, axes = _figure(1, len(panels), (3.0 * len(panels), 2.6))
    labels = list(colours)[::-1]
    for ax, (metric, xlabel) in zip(axes[0], panels):
        _compute_bars(ax, base[base["metric"] == metric], labels, colours)
        ax.set_yticks(range(len(labels)))
        ax.set_yticklabels(labels if ax is axes[0, 0] else [""] * len(labels))
        _labels(ax, xlabel)
        ax.set_axisbelow(True)
        ax.grid(axis="y", visible=False)
    fig.suptitle(_fitted(fig, f"Compute time of {_who(result)}\n(mean and 95 % interval over splits, as computed; "
                         "single-threaded tasks)", _TITLE), fontsize=_TITLE)
    return fig


def figure_makers(result: BenchResult) -> dict:
    """``name -> make()`` of each figure of the report (``make`` returns the figure, or None without its data)."""
    colours = method_colours(result)
    makers = {
        "predictions": lambda: fig_predictions(result, colours),
        "accuracy_vs_steps": lambda: fig_accuracy(result, colours),
        "closed_loop": lambda: fig_closed_loop(result, colours),
        "tracking_vs_energy": lambda: fig_tradeoff(result, colours),
        "training_data": lambda: fig_sweep(result, colours, "train_trials", "training trials [count]",
                                           "Accuracy and control vs amount of training data"),
        "noise": lambda: fig_sweep(result, colours, "noise_scale", "noise level [× the plant's]",
                                   "Accuracy and control vs noise (re-recorded from the plant)"),
        "horizon": lambda: fig_sweep(result, colours, "horizon_steps", "horizon N [steps]",
                                     "Accuracy at the horizon and control vs horizon"),
        "compute_time": lambda: fig_compute(result, colours),
    }
    if result.control_withheld:  # a stand-in too poor to compare controllers on: no closed-loop figure either
        makers.pop("closed_loop")
        makers.pop("tracking_vs_energy")
    return makers


# the figures the longest to draw first (the demo's, measured), so that processes drawing side by side end together
_DRAW_ORDER = ("closed_loop", "accuracy_vs_steps", "compute_time", "predictions")


def drawing(result: BenchResult, processes: int = 1) -> ForkedDrawing:
    """The report's figures drawn on ``processes`` processes (this one and forked helpers): enter it to start them,
    do other work, then :meth:`~._forked.ForkedDrawing.collect` returns what :func:`report_figures` returns."""
    return ForkedDrawing(figure_makers(result), processes, order=_DRAW_ORDER)


def report_figures(result: BenchResult, processes: int = 1) -> dict:
    """The report's figures as PNG bytes, by file stem (only those the result has data for).

    Parameters
    ----------
    result : BenchResult
    processes : int, default 1
        Processes that draw them side by side (this one and forked helpers); the PNGs are the same.

    Returns
    -------
    dict of str to bytes
        ``predictions``, ``accuracy_vs_steps``, ``closed_loop``, ``tracking_vs_energy``, ``training_data``,
        ``noise``, ``horizon``, ``compute_time``, each present when the result holds its data.
    """
    with drawing(result, processes) as draw:
        return draw.collect()
