"""The figure of one stimulation plan: what it does to every output, not only to the targeted ones.

Left, over the horizon: one strip per input with its allowed region shaded (the window each step obeys) and the
planned amplitude drawn inside it; below them the targeted outputs and the flagged untargeted ones, each labelled at
its end (no legend over the traces), with the targets as thin lines and the soft output bounds as shaded regions.
Right: a range chart of every output, one row each, the predicted range as a bar over the recorded range, the start
as a tick, the target as a diamond, flagged outputs in red (:mod:`stimsteer.control.mpc.output_ranges`). The caution
is drawn into the figure (it travels alone: slides, lab notes).

Object API only (``matplotlib.figure.Figure``): no pyplot state, no backend switch, no global ``rcParams``.
"""

from __future__ import annotations

import textwrap

import numpy as np
from matplotlib.figure import Figure

from ._glyphs import GlyphSafeFigure
from ._in_view import trim_ticks
from ._labels import label_gap, spread

__all__ = ["plan_figure", "MAX_INPUT_STRIPS", "MAX_RANGE_ROWS"]

#: Input strips drawn at most (all inputs are in the plan table).
MAX_INPUT_STRIPS = 6
#: Rows of the range chart at most (flagged and targeted outputs first; all are in plan.json).
MAX_RANGE_ROWS = 40
# at most this many output traces over time (targeted first, then flagged by how far they move)
_TRACES = 6
_INK, _ALLOWED, _RECORDED, _WARN, _TARGET = "#24434f", "#d9e6d3", "#e6e6e6", "#b2302b", "#6b6b6b"
_WARNS = ["#b2302b", "#d9642a", "#8c1c3a", "#e0902a", "#6e1f1f", "#c24d7a"]
_COLOURS = ["#1d5f99", "#3b7d3b", "#7a4fa3", "#2a8f8f", "#24434f", "#5b9bd5"]
# The input strips' titles have a fixed place (``y=1.0``): their axes (µA between the hard limits) carry no offset
# text and no tick labels on top, so matplotlib's search for a title place, which measures the axis' ticks again in
# each layout pass, finds nothing. The outputs' axes keep it: their values are the user's and may need an offset.


def plan_figure(plan, time_s, output_units, tracked, ranges=None, what: str = "") -> Figure:
    """Draw a :class:`~stimsteer.control.mpc.Plan` over the horizon, and every output's range beside it.

    Parameters
    ----------
    plan : Plan
    time_s : ndarray, shape (horizon_steps,)
        Time of each step from the plan's start, seconds.
    output_units : sequence of str
        One unit per output (axis labels).
    tracked : ndarray of bool, shape (n_outputs,)
        Outputs with a target.
    ranges : OutputRanges, optional
        Every output's predicted range and flag (:func:`stimsteer.control.mpc.output_ranges.output_ranges`);
        without it the range chart shows the predicted ranges alone.
    what : str, optional
        The model and route, for the title (e.g. ``"direct route, hankel (HankelPredictor)"``).

    Returns
    -------
    matplotlib.figure.Figure
    """
    m = min(len(plan.input_names), MAX_INPUT_STRIPS)
    fig = GlyphSafeFigure(figsize=(11.0, 2.6 + 0.75 * m + 2.4), layout="constrained")
    outer = fig.add_gridspec(1, 2, width_ratios=[2.1, 1.0])
    left = outer[0].subgridspec(m + 1, 1, height_ratios=[1.0] * m + [max(2.5, 0.6 * m + 1.0)])
    axes_in = [fig.add_subplot(left[i]) for i in range(m)]
    for ax in axes_in[1:]:
        ax.sharex(axes_in[0])
    ax_out = fig.add_subplot(left[m], sharex=axes_in[0])
    ax_rng = fig.add_subplot(outer[1])
    _input_strips(axes_in, plan, time_s)
    _outputs_over_time(ax_out, plan, time_s, output_units, tracked, ranges)
    _range_chart(ax_rng, plan, output_units, tracked, ranges)
    for a in [*axes_in, ax_out, ax_rng]:
        a.spines[["top", "right"]].set_visible(False)
        a.tick_params(labelsize=8)
    status = plan.status + (" (safe fallback)" if plan.fallback else "")
    head = f"Plan by {what}: {status}" if what else f"stimsteer plan: {status}"
    fig.suptitle(head, fontsize=11, x=0.01, ha="left")
    # the figure travels alone (slides, lab notes), so it carries the caution itself
    fig.supxlabel(textwrap.fill(plan.caution, 150), fontsize=7, color="#7a4a00", x=0.01, ha="left")
    trim_ticks(fig)
    return fig


def _input_strips(axes, plan, t):
    """One strip per input: the allowed window of each step shaded, the planned amplitude drawn inside it."""
    lb, ub = plan.step_bounds
    edges = np.append(t, t[-1] + (t[1] - t[0] if t.size > 1 else 1.0))
    for i, ax in enumerate(axes):
        ax.stairs(ub[:, i], edges, baseline=lb[:, i], fill=True, color=_ALLOWED, lw=0)
        ax.stairs(plan.inputs[:, i], edges, color=_INK, lw=1.6)
        ax.axhline(0.0, color="0.6", lw=0.5)
        ax.set_ylabel(f"{plan.input_names[i]}\n[µA]", fontsize=8, rotation=0, ha="right", va="center")
        ax.tick_params(labelbottom=False)
    axes[0].set_title("planned stimulation inside its allowed region (shaded: the hard limits of each step)",
                      loc="left", fontsize=9, y=1.0)
    if len(plan.input_names) > len(axes):
        axes[-1].set_title(f"first {len(axes)} of {len(plan.input_names)} inputs; all in plan.csv", loc="right",
                           fontsize=7, y=1.0)


def _shown_outputs(plan, tracked, ranges) -> list:
    """Targeted outputs first, then the flagged ones by how far they move, at most :data:`_TRACES`."""
    p = len(plan.output_names)
    order = [j for j in range(p) if tracked[j]]
    if ranges is not None:
        flagged = [j for j in np.argsort(-ranges.largest_move) if ranges.flagged[j]]
        order += [int(j) for j in flagged if j not in order]
    return order[:_TRACES] or [int(np.argmax(np.ptp(plan.predicted_outputs, axis=0)))]


def _outputs_over_time(ax, plan, t, units, tracked, ranges):
    shown = _shown_outputs(plan, tracked, ranges)
    n_warn, labels = 0, []
    for k, j in enumerate(shown):
        flagged = ranges is not None and ranges.flagged[j]
        colour = _WARNS[n_warn % len(_WARNS)] if flagged else _COLOURS[k % len(_COLOURS)]
        n_warn += int(flagged)
        y = plan.predicted_outputs[:, j]
        ax.plot(t, y, color=colour, lw=1.7, ls="--" if flagged else "-")
        if plan.target_kind == "output" and tracked[j]:
            ax.plot(t, plan.target[:, j], color=colour, lw=0.8, alpha=0.8)
        tag = "untargeted, flagged" if flagged else "targeted" if tracked[j] else "untargeted"
        labels.append((f"{plan.output_names[j]} ({tag})", y[-1], colour))
    ax.set_xlim(t[0], t[-1] + 0.28 * (t[-1] - t[0] + 1e-12))  # room for the end labels, none over the traces
    _end_labels(ax, t[-1], labels)
    _soft_bounds(ax, plan, shown)
    unit = units[shown[0]] if len({units[j] for j in shown}) == 1 else "each output's unit"
    ax.set_ylabel(f"predicted output [{unit}]", fontsize=8)
    ax.set_xlabel("time from plan start [s]", fontsize=8)
    ax.grid(alpha=0.25, lw=0.5)
    ax.set_title("targeted and flagged outputs (thin: target; dashed red: untargeted, moving beyond the flag; "
                 "shaded: soft bound)", loc="left", fontsize=8)


def _end_labels(ax, x_end, labels) -> None:
    """Each trace's label at its end, moved apart from the others just enough to be read (10 points, a 7-point
    line with its spacing), inside the axes' y range."""
    bottom, top = sorted(ax.get_ylim())
    ends = np.array([end for _text, end, _colour in labels])
    at = spread(ends, label_gap(ax, 10.0), bottom, top)
    for (text, _end, colour), y in zip(labels, at):
        ax.annotate(text, xy=(x_end, y), xytext=(4, 0), textcoords="offset points", va="center", fontsize=7,
                    color=colour, annotation_clip=False)


def _soft_bounds(ax, plan, shown) -> None:
    """The allowed region of each shown output with a soft bound, shaded (an open side runs to the axes' edge)."""
    if plan.output_bounds is None:
        return
    bottom, top = ax.get_ylim()
    for j in shown:
        lo, hi = plan.output_bounds[0][j], plan.output_bounds[1][j]
        if np.isfinite(lo) or np.isfinite(hi):
            ax.axhspan(lo if np.isfinite(lo) else bottom, hi if np.isfinite(hi) else top, color="#7fa86a",
                       alpha=0.12, lw=0)
            ax.annotate(f"{plan.output_names[j]} allowed", xy=(0.01, hi if np.isfinite(hi) else lo),
                        xycoords=("axes fraction", "data"), va="bottom" if np.isfinite(hi) else "top", fontsize=6,
                        color="#4e7040")
    ax.set_ylim(bottom, top)


def _range_rows(p, tracked, ranges) -> list:
    """Rows of the range chart: flagged, then targeted, then the rest, at most :data:`MAX_RANGE_ROWS`."""
    flagged = ranges.flagged if ranges is not None else np.zeros(p, bool)
    order = [j for j in range(p) if flagged[j]] + [j for j in range(p) if tracked[j] and not flagged[j]]
    order += [j for j in range(p) if j not in order]
    return order[:MAX_RANGE_ROWS]


def _range_marks(ax, plan, rows, tracked, ranges) -> None:
    """The marks of the range chart, one artist per kind for all rows (row ``r`` at height ``len(rows) - 1 - r``):
    the rows do not overlap, so each row's grey bar, bar and tick stack as they would drawn row by row."""
    rows = np.asarray(rows, dtype=int)
    pos = np.arange(rows.size)[::-1].astype(float)
    y = plan.predicted_outputs[:, rows]
    lo, hi = y.min(axis=0), y.max(axis=0)
    if ranges is not None:
        rec_lo, rec_hi = ranges.recorded_low[rows], ranges.recorded_high[rows]
        seen = np.isfinite(rec_lo)
        if seen.any():
            ax.barh(pos[seen], (rec_hi - rec_lo)[seen], left=rec_lo[seen], height=0.8, color=_RECORDED, lw=0)
    flagged = ranges.flagged[rows] if ranges is not None else np.zeros(rows.size, bool)
    ax.barh(pos, np.maximum(hi - lo, 1e-12), left=lo, height=0.42, color=[_WARN if f else _INK for f in flagged],
            lw=0)
    start = ranges.start[rows] if ranges is not None else y[0]
    # the start ticks as one line broken by NaNs (a vertical stroke per row)
    gaps = np.full(rows.size, np.nan)
    ax.plot(np.column_stack([start, start, gaps]).ravel(),
            np.column_stack([pos - 0.32, pos + 0.32, gaps]).ravel(), color="black", lw=1.0)
    if plan.target_kind == "output":
        aimed = np.asarray(tracked, bool)[rows]
        if aimed.any():
            ax.plot(plan.target[:, rows[aimed]].mean(axis=0), pos[aimed], "D", color="white", mec=_INK, ms=5)


def _range_chart(ax, plan, units, tracked, ranges):
    """Every output: recorded range (grey), predicted range (bar), start (tick), target (diamond)."""
    p = len(plan.output_names)
    rows = _range_rows(p, tracked, ranges)
    _range_marks(ax, plan, rows, tracked, ranges)
    flags = ranges.flagged if ranges is not None else np.zeros(p, bool)
    labels = [f"{plan.output_names[j]}{' ◆' if tracked[j] else ''}{' !' if flags[j] else ''}" for j in rows]
    ax.set_yticks(range(len(rows))[::-1], labels, fontsize=7)
    for tick, j in zip(ax.get_yticklabels(), rows):
        if flags[j]:
            tick.set_color(_WARN)
    same = len({units[j] for j in rows}) == 1
    ax.set_xlabel(f"output [{units[rows[0]]}]" if same else "output, in each channel's unit", fontsize=8)
    ax.grid(axis="x", alpha=0.25, lw=0.5)
    ax.set_ylim(-0.7, len(rows) - 0.3)
    rule = ("grey: recorded range; bar: predicted\nover the plan; tick: start; ◆ target;\nred !: untargeted, "
            f"moves > {100 * ranges.flag_fraction:g} % of\nits recorded range") if ranges is not None \
        else "bar: predicted over the plan;\ntick: start; ◆ target"
    more = f"\nfirst {len(rows)} of {p} outputs; all in plan.json" if len(rows) < p else ""
    ax.set_title(f"every output: predicted range\n{rule}{more}", loc="left", fontsize=8)
