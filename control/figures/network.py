"""Figures of the network-control analysis of a state-space model (``stimsteer network`` saves them).

The plain style below: no top/right frame, a light grid, small type. Every figure is a
:class:`matplotlib.figure.Figure` made with the object API; nothing here touches pyplot or the backend.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from ._glyphs import GlyphSafeFigure

__all__ = ["gramian_spectrum_figure", "impulse_response_figure", "ranking_figure", "MAX_GRID", "MAX_BARS"]

_INK, _ACCENT, _MUTED, _WARN = "#24434f", "#c7792f", "#8a9aa3", "#a23b3b"
#: Impulse-response grid: at most this many channels x sites are drawn (all are in the table).
MAX_GRID = 8
#: Ranking figure: the best this many sets.
MAX_BARS = 20


def _plain_axes(ax) -> None:
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(axis="y", color="0.92", lw=0.6)
    ax.tick_params(labelsize=7)


def _with_unit(name: str, unit: str | None) -> str:
    return name if not unit else f"{name} [{unit}]"


def gramian_spectrum_figure(eigenvalues, horizon_steps, condition_number: float, what: str) -> Figure:
    """Eigenvalues of a Gramian, largest first, on a log scale.

    Parameters
    ----------
    eigenvalues : ndarray, shape (k,)
        Descending.
    horizon_steps : int or None
        None for the infinite horizon.
    condition_number : float
    what : str
        Which Gramian (e.g. ``"output Gramian C W Cᵀ"``), for the title.
    """
    fig = GlyphSafeFigure(figsize=(6.0, 3.4))
    ax = fig.add_subplot()
    eig = np.asarray(eigenvalues)
    k = np.arange(1, eig.size + 1)
    positive = eig > 0
    ax.semilogy(k[positive], eig[positive], "o-", color=_INK, ms=3.5, lw=1.0)
    if (~positive).any():
        ax.text(0.98, 0.95, f"{int((~positive).sum())} zero eigenvalue(s)", transform=ax.transAxes, ha="right",
                va="top", fontsize=7, color=_WARN)
    horizon = "infinite horizon" if horizon_steps is None else f"horizon {horizon_steps} steps"
    ax.set_xlabel("eigenvalue index", fontsize=8)
    ax.set_ylabel("eigenvalue (output units² per input unit² per sample)", fontsize=8)
    ax.set_title(f"Spectrum of the {what} ({horizon}; condition {condition_number:.3g})", fontsize=9)
    _plain_axes(ax)
    fig.tight_layout()
    return fig


def impulse_response_figure(h, model, units=None) -> Figure:
    """A grid of impulse responses: site (columns) to recorded channel (rows), at most :data:`MAX_GRID` each way.

    Parameters
    ----------
    h : ndarray, shape (n_steps, n_outputs, n_inputs)
        From :func:`stimsteer.sysid.network.impulse_responses`.
    model : StateSpaceModel
        For the channel names and the sample rate.
    units : (input_units, output_units), optional
        Tuples of unit strings; with them the axes name the units.
    """
    p, m = h.shape[1], h.shape[2]
    in_units, out_units = units if units is not None else ((None,) * m, (None,) * p)
    rp, rm = min(p, MAX_GRID), min(m, MAX_GRID)
    fig = GlyphSafeFigure(figsize=(1.6 * rm + 1.2, 1.1 * rp + 1.0))
    t = np.arange(h.shape[0]) / model.sample_rate_hz
    axes = fig.subplots(rp, rm, sharex=True, squeeze=False)
    for i in range(rp):
        for j in range(rm):
            ax = axes[i, j]
            ax.axhline(0.0, color=_MUTED, lw=0.5)
            ax.plot(t, h[:, i, j], color=_INK, lw=0.9)
            _plain_axes(ax)
            if i == 0:
                ax.set_title(_with_unit(model.input_names[j], in_units[j]), fontsize=7)
            if j == 0:
                ax.set_ylabel(_with_unit(model.output_names[i], out_units[i]), fontsize=7)
            if i == rp - 1:
                ax.set_xlabel("time [s]", fontsize=7)
    notes = ["response in channel unit per site unit"] if units is not None else []
    if (rp, rm) != (p, m):
        notes.append(f"first {rp} of {p} channels, {rm} of {m} sites; all in the CSV")
    second = "\n" + "; ".join(notes) if notes else ""
    fig.suptitle(f"Impulse responses: site (columns) to recorded channel (rows){second}", fontsize=9)
    fig.tight_layout()
    return fig


def ranking_figure(labels, values, title: str, xlabel: str, log: bool = True) -> Figure:
    """Horizontal bars of the first :data:`MAX_BARS` entries, best at the top (log scale when all are positive)."""
    n = min(len(labels), MAX_BARS)
    fig = GlyphSafeFigure(figsize=(6.0, 0.28 * n + 1.3))
    ax = fig.add_subplot()
    ypos = np.arange(n)[::-1]
    ax.barh(ypos, values[:n], color=_ACCENT, height=0.65)
    ax.set_yticks(ypos, labels[:n], fontsize=7)
    if log and np.all(np.asarray(values[:n]) > 0):
        ax.set_xscale("log")
    ax.set_xlabel(xlabel, fontsize=8)
    ax.set_title(title, fontsize=9)
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(axis="x", color="0.92", lw=0.6)
    ax.tick_params(labelsize=7)
    fig.tight_layout()
    return fig
