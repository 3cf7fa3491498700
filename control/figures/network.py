"""Figures of the network-control analysis of a state-space model (``stimsteer network`` saves them).

The plain style below: no top/right frame, a light grid, small type. Every figure is a
:class:`matplotlib.figure.Figure` made with the object API; nothing here touches pyplot or the backend.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from ._glyphs import GlyphSafeFigure
from ._in_view import trim_ticks

__all__ = ["gramian_spectrum_figure", "impulse_response_figure", "ranking_figure", "MAX_GRID", "MAX_BARS",
           "MAX_MAP_CHANNELS", "MAX_MAP_SITES"]

_INK, _ACCENT, _MUTED, _WARN = "#24434f", "#c7792f", "#8a9aa3", "#a23b3b"
#: Impulse-response grid (older figures): at most this many channels x sites (kept for callers of the constant).
MAX_GRID = 8
#: Response maps: at most this many channels (rows of each image) and sites (images) are drawn (all are in the CSV).
MAX_MAP_CHANNELS = 64
MAX_MAP_SITES = 12
#: Ranking figure: the best this many sets.
MAX_BARS = 20
#: Ranking figure: a log axis only when the shown values span more than this ratio.
LOG_SPAN = 100.0


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
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # indices: no tick at 2.5
    ax.set_ylabel("eigenvalue (output units² per input unit² per sample)", fontsize=8)
    ax.set_title(f"Spectrum of the {what} ({horizon}; condition {condition_number:.3g})", fontsize=9)
    _plain_axes(ax)
    trim_ticks(fig)
    fig.tight_layout()
    return fig


def impulse_response_figure(h, model, units=None) -> Figure:
    """Response maps: for each stimulation site, the response of every recorded channel over time as one image.

    Instead of a grid of one small panel per (site, channel) pair, which grows with the product of the two and
    gives every panel its own scale, each site gets one channel × time image on a shared, symmetric colour scale
    with one colour bar in the response's unit (channel unit per site unit, e.g. µV per µA), so sites and channels
    are compared at a glance, and many channels stay readable.

    Parameters
    ----------
    h : ndarray, shape (n_steps, n_outputs, n_inputs)
        From :func:`stimsteer.sysid.network.impulse_responses`: the response to a unit impulse on each site.
    model : StateSpaceModel
        For the channel names, the sample rate, the number of states.
    units : (input_units, output_units), optional
        Tuples of unit strings; with them the colour bar names the response's unit.

    Returns
    -------
    matplotlib.figure.Figure
    """
    h = np.asarray(h, dtype=np.float64)
    p, m = h.shape[1], h.shape[2]
    shown_p, shown_m = min(p, MAX_MAP_CHANNELS), min(m, MAX_MAP_SITES)
    cols = min(shown_m, 3)
    rows = -(-shown_m // cols)
    fig = GlyphSafeFigure(figsize=(3.3 * cols + 1.4, (0.22 * shown_p + 1.2) * rows + 1.0), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, cols, sharex=True, sharey=True, squeeze=False)).ravel()
    t = np.arange(h.shape[0] + 1) / model.sample_rate_hz  # cell edges: sample k covers [k, k+1) / rate
    early = _early_span(h[:, :shown_p, :shown_m], model.sample_rate_hz)
    # the colour scale from where the response is (a long quiet tail would set it near zero and saturate the rest)
    held = h[:max(int(round(early * model.sample_rate_hz)), 1) if early is not None else h.shape[0], :shown_p, :shown_m]
    scale = float(np.percentile(np.abs(held), 99.5)) or 1.0
    image = None
    for j, ax in enumerate(axes):
        if j >= shown_m:
            ax.set_visible(False)
            continue
        image = ax.pcolormesh(t, np.arange(shown_p + 1), h[:, :shown_p, j].T, cmap="RdBu_r", vmin=-scale, vmax=scale,
                              shading="flat", rasterized=True)
        ax.set_title(f"stimulating {_with_unit(model.input_names[j], units[0][j] if units else None)}", fontsize=8)
        ax.set_yticks(np.arange(shown_p) + 0.5, [model.output_names[i] for i in range(shown_p)], fontsize=6)
        ax.set_ylim(shown_p, 0)  # first channel on top (the axes share y: inverting each toggled it per site)
        ax.tick_params(labelsize=7)
        if j % cols == 0:
            ax.set_ylabel("recorded channel", fontsize=8)
        if j >= shown_m - cols:
            ax.set_xlabel("time after the impulse [s]", fontsize=8)
    bar = fig.colorbar(image, ax=axes[:shown_m].tolist(), shrink=0.9, extend="both")
    bar.set_label(f"response [{_response_unit(units)}]", fontsize=8)
    bar.ax.tick_params(labelsize=7)
    notes = [f"first {shown_p} of {p} channels, {shown_m} of {m} sites; all in the CSV"] if (shown_p, shown_m) != (p, m) \
        else []
    notes.append(f"colour clipped at ±{scale:.3g} (99.5th percentile of |response|"
                 + (f" in the first {early:.3g} s)" if early is not None else ")"))
    if early is not None:  # a quick response and a long slow tail: the quick part linear, the tail compressed
        for ax in axes[:shown_m]:
            ax.set_xscale("symlog", linthresh=early, linscale=2.0)
            ax.set_xlim(0.0, t[-1])
        notes.append(f"time linear to {early:.3g} s, where {100 * EARLY_ENERGY:g}% of the response energy has "
                     "arrived, logarithmic after")
    fig.suptitle(f"Response maps of the fitted {model.n_states}-state model: each site's unit impulse, every "
                 f"channel over time\n{'; '.join(notes)}", fontsize=9)
    trim_ticks(fig)
    return fig


#: Share of the responses' energy (sum of squares) that :func:`impulse_response_figure` finds arrived early.
EARLY_ENERGY = 0.99
#: Fraction of the shown window before which that share must arrive for the time axis to turn logarithmic after it.
EARLY_FRACTION = 0.1


def _early_span(h: np.ndarray, rate: float) -> float | None:
    """The time by which :data:`EARLY_ENERGY` of the responses' energy has arrived, where that is within the first
    :data:`EARLY_FRACTION` of the window (a ridge ARX at 1 kHz: 99% by 25 ms of the 4 s window that its slowest mode,
    of a tiny amplitude, asks for), else None (the linear axis shows the responses)."""
    energy = np.cumsum(np.sum(h * h, axis=(1, 2)))
    if h.shape[0] < 20 or not energy[-1] > 0:
        return None
    k = int(np.searchsorted(energy, EARLY_ENERGY * energy[-1])) + 1  # samples [0, k) hold that share
    return k / float(rate) if k <= EARLY_FRACTION * h.shape[0] else None


def _response_unit(units) -> str:
    """``µV per µA`` when every channel shares one unit and every site another, else the generic wording."""
    if units is None:
        return "channel unit per site unit"
    ins, outs = {str(u) for u in units[0]}, {str(u) for u in units[1]}
    if len(ins) == 1 and len(outs) == 1:
        return f"{_pretty(next(iter(outs)))} per {_pretty(next(iter(ins)))}"
    return "channel unit per site unit"


def squared_response_unit(units) -> str:
    """``µV² per µA² per sample`` (a squared H2 norm's unit) when every channel shares one unit and every site
    another, else the generic wording."""
    if units is not None and len({str(u) for u in units[0]}) == 1 and len({str(u) for u in units[1]}) == 1:
        return f"{_pretty(str(units[1][0]))}² per {_pretty(str(units[0][0]))}² per sample"
    return "output units² per input unit² per sample"


def _pretty(unit: str) -> str:
    return {"uV": "µV", "uA": "µA", "mV": "mV"}.get(unit, unit)


def ranking_figure(labels, values, title: str, xlabel: str, log: bool | None = None) -> Figure:
    """Horizontal bars of the first :data:`MAX_BARS` entries, best at the top.

    The axis is plain (linear) while the shown values are comparable; a log axis only when ``log`` is True, or by
    default when they span more than :data:`LOG_SPAN` (bars of comparable values on a log axis mislead the eye).
    """
    shown = np.asarray(values[:min(len(labels), MAX_BARS)], dtype=float)
    if log is None:
        log = bool(shown.size and np.all(shown > 0) and shown.max() / shown.min() > LOG_SPAN)
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
    trim_ticks(fig)
    fig.tight_layout()
    return fig
