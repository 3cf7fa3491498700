"""Ticks made only where they are drawn: the figure builders' automatic tick locators, kept to the view.

Matplotlib's automatic locator (``AutoLocator``, a ``MaxNLocator``) returns tick locations beyond both ends of the
axis (the next round value past each limit), and the axis makes a tick for every location it is given: two lines
with markers, a grid line and two texts each, updated in every layout pass and draw, then left out of the picture
because they lie outside the axes. In the demo's figures that is a quarter of the major ticks made. :func:`trim_ticks`
wraps each such locator of a figure in :class:`InView`, which returns the same locations inside the view only: the
ticks drawn are the same, with the same labels (the tick labels' format and offset are taken from the locations in
view; the PNGs are compared pixel for pixel in tests/control/test_figure_ticks.py), and no tick is made to be thrown
away.

Object API only: the locators are set on the figure's own axes, nothing global changes.
"""

from __future__ import annotations

import numpy as np
from matplotlib import ticker

__all__ = ["InView", "trim_ticks"]

# a tick at most this fraction of the view's width beyond an end is kept: matplotlib draws ticks up to 1e-10 beyond
_SLACK = 1e-9


class InView(ticker.Locator):
    """The locations of ``base`` (an automatic locator) that lie in the axis' view interval.

    Parameters
    ----------
    base : matplotlib.ticker.Locator
        The locator whose locations are kept; it keeps the axis it was given (shared axes size their ticks by it).
    """

    def __init__(self, base):
        self.base = base

    def set_axis(self, axis):
        """Attach to ``axis`` (and the base locator too, when it has no axis yet)."""
        self.axis = axis
        if self.base.axis is None:
            self.base.set_axis(axis)

    def __call__(self):
        locs = np.asarray(self.base())
        low, high = sorted(self.axis.get_view_interval())
        slack = _SLACK * (high - low)
        return locs[(locs >= low - slack) & (locs <= high + slack)]

    def tick_values(self, vmin, vmax):
        return self.base.tick_values(vmin, vmax)

    def view_limits(self, vmin, vmax):
        return self.base.view_limits(vmin, vmax)


def trim_ticks(fig) -> None:
    """Wrap the automatic major locator of every linear axis of ``fig``'s axes in :class:`InView` (shared axes share
    one locator: it is wrapped once). Colour bars keep theirs; a locator set by hand (fixed ticks) is left alone.

    Call it when the figure's axes and scales are made; the view may still change (the locator reads it when the
    figure is drawn)."""
    for ax in fig.axes:
        if getattr(ax, "_colorbar", None) is not None:
            continue
        for axis in (ax.xaxis, ax.yaxis):
            locator = axis.get_major_locator()
            if type(locator) in (ticker.AutoLocator, ticker.MaxNLocator) and axis.get_scale() == "linear":
                axis.set_major_locator(InView(locator))
