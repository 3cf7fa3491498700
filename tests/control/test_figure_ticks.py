"""The figure builders make ticks only where they are drawn (control/figures/_in_view.py), and draw the same PNG.

Outside check: matplotlib's own automatic locators on the same figure (the reference library), pixel for pixel. The
data are made up here so that round tick values fall outside the view at both ends.
"""

import io

import numpy as np
from matplotlib import ticker
from PIL import Image

from stimsteer.control.figures._glyphs import GlyphSafeFigure
from stimsteer.control.figures._in_view import InView, trim_ticks
from stimsteer.control.figures.network import ranking_figure


def _figure(trim: bool):
    """Two shared-x panels, a third with fixed ticks, data whose round numbers fall outside the view."""
    fig = GlyphSafeFigure(figsize=(5.0, 4.0), layout="constrained")
    axes = fig.subplots(3, 1, sharex=True)
    t = np.linspace(0.13, 7.91, 200)
    axes[0].plot(t, 0.37 + 2.9 * np.sin(t), lw=1.0)
    axes[1].plot(t, -1e4 + 3.3 * np.cos(t), lw=1.0)  # an axis with an offset text
    axes[1].invert_yaxis()
    axes[2].plot(t, t ** 2, lw=1.0)
    axes[2].set_yticks([1.0, 20.0, 40.0], ["one", "twenty", "forty"])
    axes[2].set_xlabel("time [s]")
    if trim:
        trim_ticks(fig)
    return fig


def _png(fig) -> np.ndarray:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return np.asarray(Image.open(io.BytesIO(buf.getvalue())).convert("RGB"))


def _made_and_drawn(fig):
    """(major ticks made, major ticks drawn) over every axis of ``fig`` (after a draw)."""
    made = drawn = 0
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            ticks = axis._update_ticks()
            made += len(axis.majorTicks)
            drawn += len([t for t in ticks if t in axis.majorTicks])
    return made, drawn


def test_trimmed_locators_draw_the_same_picture_with_no_tick_beyond_the_view():
    plain, trimmed = _figure(False), _figure(True)
    before, after = _png(plain), _png(trimmed)
    np.testing.assert_array_equal(after, before)  # the same ticks, labels, offset text and layout
    made_before, drawn_before = _made_and_drawn(plain)
    made_after, drawn_after = _made_and_drawn(trimmed)
    assert drawn_after == drawn_before
    assert made_before > drawn_before  # matplotlib's own locator makes ticks past both ends of the view
    assert made_after == drawn_after  # trimmed: every tick made is drawn


def test_trim_wraps_automatic_linear_locators_once_and_leaves_fixed_and_log_ones():
    fig = _figure(True)
    ax0, ax1, ax2 = fig.axes
    assert isinstance(ax0.xaxis.get_major_locator(), InView)  # shared x: one locator for the three panels
    assert ax0.xaxis.get_major_locator() is ax2.xaxis.get_major_locator()
    assert not isinstance(ax0.xaxis.get_major_locator().base, InView)
    assert isinstance(ax2.yaxis.get_major_locator(), ticker.FixedLocator)
    trim_ticks(fig)  # a second call changes nothing
    assert not isinstance(ax0.yaxis.get_major_locator().base, InView)
    log = ranking_figure(["a", "b"], np.array([1e4, 1.0]), "t", "x").axes[0]
    assert isinstance(log.xaxis.get_major_locator(), ticker.LogLocator)


def test_the_gramian_spectrum_ticks_whole_eigenvalue_indices():
    # found by looking at `stimsteer network` of a 20-channel model: ticks at 2.5, 7.5, ... for an index (an index
    # is ticked at whole numbers: common practice, no source); made-up spectrum of 20 values
    from stimsteer.control.figures.network import gramian_spectrum_figure

    fig = gramian_spectrum_figure(np.logspace(1, -2, 20), None, 4.7e3, "output Gramian C W Cᵀ")
    fig.canvas.draw()
    ticks = [t for t in fig.axes[0].get_xticks() if 1 <= t <= 20]
    assert len(ticks) >= 3 and all(float(t).is_integer() for t in ticks)
