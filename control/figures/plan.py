"""The figure of one stimulation plan: planned inputs with their hard limits, predicted outputs with target and
soft bounds, and the caution drawn into it (the figure travels alone: slides, lab notes).

Object API only (``matplotlib.figure.Figure``): no pyplot state, no backend switch, no global ``rcParams``.
"""

from __future__ import annotations

import textwrap

import numpy as np
from matplotlib.figure import Figure

from ._glyphs import GlyphSafeFigure

__all__ = ["plan_figure"]

# at most this many output lines in the lower panel (tracked outputs first, then bounded ones)
_PLAN_LINES = 6


def plan_figure(plan, time_s, output_units, tracked) -> Figure:
    """Draw a :class:`~stimsteer.control.mpc.Plan` over the horizon.

    Parameters
    ----------
    plan : Plan
    time_s : ndarray, shape (horizon_steps,)
        Time of each step from the plan's start, seconds.
    output_units : sequence of str
        One unit per output (axis labels).
    tracked : ndarray of bool, shape (n_outputs,)
        Outputs with a target; they are drawn first, with their target dashed.

    Returns
    -------
    matplotlib.figure.Figure
        Two panels (inputs in µA, predicted outputs), title with the plan's status, caution at the bottom.
    """
    fig = GlyphSafeFigure(figsize=(8.0, 6.0), layout="constrained")
    axes = fig.subplots(2, 1, sharex=True)
    _inputs_panel(axes[0], plan, time_s)
    _outputs_panel(axes[1], plan, time_s, output_units, tracked)
    for a in axes:
        a.spines[["top", "right"]].set_visible(False)
        a.grid(alpha=0.25, lw=0.5)
    fig.suptitle(f"stimsteer plan: {plan.status}" + (" (safe fallback)" if plan.fallback else ""), fontsize=11,
                 x=0.01, ha="left")
    # the figure travels alone (slides, lab notes), so it carries the caution itself
    fig.supxlabel(textwrap.fill(plan.caution, 120), fontsize=7, color="#7a4a00", x=0.01, ha="left")
    return fig


def _inputs_panel(ax, plan, t):
    lb, ub = plan.step_bounds
    for i, name in enumerate(plan.input_names):
        line, = ax.step(t, plan.inputs[:, i], where="post", lw=1.8, label=name)
        for bound in (lb[:, i], ub[:, i]):
            ax.step(t, bound, where="post", lw=0.9, ls=":", color=line.get_color())
    ax.set_ylabel("stimulation [µA]")
    ax.set_title("planned inputs (dotted: hard limits per step)", loc="left", fontsize=10)
    ax.legend(loc="upper right", fontsize=8, frameon=False, ncol=min(4, len(plan.input_names)))


def _outputs_panel(ax, plan, t, units, tracked):
    p = len(plan.output_names)
    bounded = plan.active_limits["output_bounds"]
    order = [j for j in range(p) if tracked[j]] + [j for j in range(p) if not tracked[j] and bounded[:, j].any()]
    for j in order[:_PLAN_LINES] or [0]:
        line, = ax.plot(t, plan.predicted_outputs[:, j], lw=1.6, label=f"{plan.output_names[j]} [{units[j]}]")
        if plan.target_kind == "output" and tracked[j]:
            ax.plot(t, plan.target[:, j], ls="--", lw=1.0, color=line.get_color())
        if plan.output_bounds is not None:
            for bound in (plan.output_bounds[0][j], plan.output_bounds[1][j]):
                if np.isfinite(bound):
                    ax.axhline(bound, ls=":", lw=0.9, color=line.get_color())
    ax.set_xlabel("time from plan start [s]")
    ax.set_ylabel("predicted output")
    ax.set_title("predicted outputs (dashed: target; dotted: soft bound)", loc="left", fontsize=10)
    ax.legend(loc="upper right", fontsize=8, frameon=False, ncol=2)
