"""The figure of a pattern prediction (``stimsteer predict``): inputs above, each predicted output with its band."""

from __future__ import annotations

from matplotlib.figure import Figure

from ._glyphs import GlyphSafeFigure
from ._in_view import trim_ticks

__all__ = ["prediction_figure", "MAX_PANELS"]

#: Outputs drawn at most (one panel each); all of them are in the CSV table.
MAX_PANELS = 8


def prediction_figure(pred, what: str = "") -> Figure:
    """The inputs and the predicted outputs of a :class:`~stimsteer.sysid.PatternPrediction`, with the band.

    Parameters
    ----------
    pred : PatternPrediction
        Times in seconds; each output panel shows the prediction ± its held-out RMSE in the output's unit.
    what : str, optional
        The model and route that predicted, for the title (e.g. ``"indirect route, subspace (SubspaceId)"``).

    Returns
    -------
    matplotlib.figure.Figure
        Not attached to pyplot; save it with ``fig.savefig(path)``.
    """
    shown = min(len(pred.output_names), MAX_PANELS)
    fig = GlyphSafeFigure(figsize=(8.0, 1.5 + 1.4 * (shown + 1)), layout="constrained")
    axes = fig.subplots(shown + 1, 1, sharex=True, gridspec_kw={"height_ratios": [0.8] + [1.0] * shown})
    t = pred.time_s
    ax = axes[0]
    for j, (n, unit) in enumerate(zip(pred.input_names, pred.input_units)):
        ax.step(t, pred.u[:, j], where="post", lw=1.0, label=f"{n} [{unit}]")
    in_units = sorted({str(u) for u in pred.input_units})
    ax.set_ylabel(f"stimulation\n[{in_units[0] if len(in_units) == 1 else 'each input unit'}]", fontsize=8)
    # beside the axes, not over the pattern
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7, frameon=False, borderaxespad=0.0)
    for j in range(shown):
        ax = axes[j + 1]
        y, b = pred.y[:, j], pred.band[:, j]
        ax.fill_between(t, y - b, y + b, color="#9ecae1", alpha=0.6, lw=0, label="± held-out RMSE")
        ax.plot(t, y, color="#08519c", lw=1.2, label="predicted")
        ax.set_ylabel(f"{pred.output_names[j]}\n[{pred.output_units[j]}]", fontsize=8)
        if j == 0:
            ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7, frameon=False, borderaxespad=0.0)
    for ax in axes:
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(axis="y", color="0.9", lw=0.6)
    axes[-1].set_xlabel("time [s]")
    note = f" (first {shown} of {len(pred.output_names)} outputs; all in the CSV)" if shown < len(pred.output_names) \
        else ""
    by = f" by {what}" if what else ""
    fig.suptitle(f"Predicted response{by} from {pred.start}{note}", fontsize=10)
    trim_ticks(fig)
    return fig
