"""The figure of ``stimsteer inspect --artifact-figure``: output power locked to stimulation onsets, per channel."""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

__all__ = ["artifact_figure"]


def artifact_figure(report) -> Figure:
    """Onset-locked power of each output channel, relative to its pre-onset level.

    Parameters
    ----------
    report : stimsteer.sysid.artifacts.ArtifactReport

    Returns
    -------
    matplotlib.figure.Figure
        Left: the mean square of the sample-to-sample change at each lag from the onset, divided by the channel's
        pre-onset level (1 = no change), one line per channel, flagged channels drawn thick. Right: the
        post/pre ratio per channel with the flagging threshold. Not attached to pyplot.
    """
    fig = Figure(figsize=(10.0, 4.0), layout="constrained")
    ax, bx = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1.6, 1.0]})
    lags_ms = 1e3 * np.arange(-report.pre_samples, report.window_samples) / report.sample_rate_hz
    rel = report.locked_power / np.maximum(report.pre_power, np.finfo(float).tiny)[None, :]
    for j, name in enumerate(report.channels):
        flagged = name in report.flagged
        ax.plot(lags_ms, rel[:, j], marker="o", ms=3, lw=2.0 if flagged else 0.8, label=name)
    ax.axvline(0.0, color="0.3", lw=0.8, ls=":")
    ax.axhline(1.0, color="0.5", lw=0.8)
    ax.set_xlabel("time from stimulation onset [ms]")
    ax.set_ylabel("power of the sample-to-sample change\n[relative to the pre-onset level]")
    ax.set_title(f"Output power locked to {report.n_onsets} stimulation onsets")
    ax.legend(fontsize=7, frameon=False, loc="upper left", ncol=2)
    x = np.arange(len(report.channels))
    colours = ["#cb181d" if n in report.flagged else "#6baed6" for n in report.channels]
    bx.bar(x, report.ratio, color=colours)
    bx.axhline(report.ratio_threshold, color="#cb181d", lw=1.0, ls="--",
               label=f"flagged above {report.ratio_threshold:g}x")
    bx.set_xticks(x, report.channels, rotation=60, fontsize=7)
    bx.set_ylabel("post-onset / pre-onset power [ratio]")
    bx.set_title(f"First {1e3 * report.window_samples / report.sample_rate_hz:.1f} ms after onsets")
    bx.legend(fontsize=7, frameon=False)
    return fig
