"""Ticks made by copying the axis' first tick: the axes every stimsteer figure adds (:class:`FastAxes`).

Matplotlib makes an axis' ticks one :class:`~matplotlib.axis.Tick` at a time, as many as its locator gives places
(ticks just outside the view included), each built from the axis' tick settings (two tick lines with their markers,
a grid line, two labels) and then given the first tick's properties (``Axis._copy_tick_props``: ``update_from`` of
each part, which deep-copies the markers). That was the largest single cost of drawing the demo's figures (about a
fifth of their CPU, ``benchmarks/bench_figures.py``).

:class:`FastAxes` is matplotlib's :class:`~matplotlib.axes.Axes` with axes whose ticks after the first are copies of
the first tick (:func:`clone_tick`: each part copied attribute by attribute, with its own callbacks, font properties
and data to be recomputed; the markers, transforms and clip paths are shared, as ``update_from`` shares them, and
are replaced, never changed in place, when a setting changes). A copy has every property of the first tick, where
matplotlib's new tick takes the properties ``update_from`` copies and the rest from the axis' tick settings; the two
agree unless a single tick was restyled by hand in a way ``update_from`` does not copy (the figures here set tick
labels through the axis). The first tick of each list is matplotlib's own, made when matplotlib makes it. The pixels
are matplotlib's (tests/control/test_fast_ticks.py).

Within one draw (:func:`one_draw`, which :class:`~._glyphs.GlyphSafeFigure` wraps its PNG draw in), an axis places
its ticks (locator, formatter, positions and labels) once for each view interval and axes box, where matplotlib
places them again at every use; outside a draw, as matplotlib does.

The copy reads matplotlib's private attributes (3.11): where they are not as expected (:func:`can_clone`), the tick
is made as matplotlib makes it.
"""

from __future__ import annotations

import contextlib
import contextvars

from matplotlib import cbook
from matplotlib.axes import Axes
from matplotlib.axis import XAxis, YAxis
from matplotlib.lines import Line2D
from matplotlib.text import Text

from ._fast_text import FastText, adopt

__all__ = ["FastAxes", "can_clone", "clone_tick", "one_draw"]

# the ticks each axis placed during the draw under way (one_draw), by what placing them depends on
_PLACED: contextvars.ContextVar = contextvars.ContextVar("stimsteer_placed_ticks", default=None)


@contextlib.contextmanager
def one_draw():
    """Within the block (one draw of a figure, nothing changed by hand meanwhile), an axis of :class:`FastAxes`
    places its ticks once for each view interval and axes box: matplotlib places them again for the axis' extent,
    each of its two spines' extents, its label beside each sibling's tick labels and its draw (4 to 8 times per
    axis and save), always with the same locator, formatter and settings, so with the same result."""
    token = _PLACED.set({})
    try:
        yield
    finally:
        _PLACED.reset(token)

_PARTS = ("tick1line", "tick2line", "gridline", "label1", "label2")


def can_clone(tick) -> bool:
    """Whether :func:`clone_tick` can copy ``tick``: matplotlib's own tick parts, with the private attributes the
    copy renews (a text with a box around it is made by matplotlib: its patch would have to be copied too)."""
    parts = [getattr(tick, name, None) for name in _PARTS]
    lines, labels = parts[:3], parts[3:]
    return (all(type(p) is Line2D and "_callbacks" in vars(p) and "_invalidx" in vars(p) for p in lines)
            and all(type(p) in (Text, FastText) and "_callbacks" in vars(p) and "_fontproperties" in vars(p)
                    and vars(p).get("_bbox_patch", 0) is None for p in labels)
            and "_callbacks" in vars(tick))


def _copy(artist):
    """``artist`` copied attribute by attribute, with its own callbacks and sticky edges, to be drawn anew."""
    new = object.__new__(type(artist))
    state = new.__dict__
    state.update(artist.__dict__)
    state["_callbacks"] = cbook.CallbackRegistry(signals=["pchanged"])
    state["_remove_method"] = None
    state["_stale"] = True
    edges = state.get("_sticky_edges")
    if edges is not None:
        state["_sticky_edges"] = type(edges)(list(edges.x), list(edges.y))
    return new


def clone_tick(src):
    """A new tick with every property of ``src`` (its parts copied; see the module notes), at ``src``'s place
    with empty labels: the axis places it and writes its labels before it is drawn."""
    tick = _copy(src)
    for name in _PARTS:
        part = _copy(getattr(src, name))
        state = part.__dict__
        if isinstance(part, Text):
            state["_fontproperties"] = part._fontproperties.copy()  # changed in place by set_fontsize & co
            state["_text"] = ""
            state["_renderer"] = None
        else:  # its path and transformed path are remade from the data at the next draw
            state["_invalidx"] = state["_invalidy"] = True
            state["_transformed_path"] = None
        setattr(tick, name, part)
    return tick


class _TickCopies:
    """The tick lists of :class:`FastAxes`' axes (mixed into :class:`~matplotlib.axis.XAxis` and ``YAxis``)."""

    def _ticks(self, major: bool, numticks):
        name = "majorTicks" if major else "minorTicks"
        if numticks is None:
            numticks = len(self.get_majorticklocs() if major else self.get_minorticklocs())
        ticks = getattr(self, name)
        while len(ticks) < numticks:
            first = ticks[0]
            if can_clone(first):
                ticks.append(clone_tick(first))
            else:  # matplotlib's way
                tick = self._get_tick(major=major)
                ticks.append(tick)
                self._copy_tick_props(first, tick)
        return ticks[:numticks]

    def get_major_ticks(self, numticks=None):
        """:meth:`matplotlib.axis.Axis.get_major_ticks`, new ticks copied from the first."""
        return self._ticks(True, numticks)

    def get_minor_ticks(self, numticks=None):
        """:meth:`matplotlib.axis.Axis.get_minor_ticks`, new ticks copied from the first."""
        return self._ticks(False, numticks)

    def _update_ticks(self):
        placed = _PLACED.get()
        if placed is None:
            return super()._update_ticks()
        axes = self.axes
        key = (id(self), tuple(self.get_view_interval()), axes.bbox.bounds, axes.get_figure(root=True).dpi,
               id(self.major.locator), id(self.major.formatter), id(self.minor.locator), id(self.minor.formatter))
        found = placed.get(key)
        # shared axes share their formatters: another axis' placing since ours changed their state (offset, locs)
        if found is None or found[1] is not _locs(self.major) or found[2] is not _locs(self.minor):
            ticks = super()._update_ticks()
            found = placed[key] = (ticks, _locs(self.major), _locs(self.minor))
        return list(found[0])

    def _get_tick(self, major):
        tick = super()._get_tick(major)
        adopt(tick.label1, tick.label2)  # their layouts kept (._fast_text); the copies keep the class
        return tick


def _locs(ticker):
    state = vars(ticker.formatter)  # the places it was last given (set_locs: a new array each time); "locs" < 3.11
    return state.get("_locs", state.get("locs"))


class _FastXAxis(_TickCopies, XAxis):
    pass


class _FastYAxis(_TickCopies, YAxis):
    pass


_SWAP = {XAxis: _FastXAxis, YAxis: _FastYAxis}


class FastAxes(Axes):
    """:class:`matplotlib.axes.Axes` whose x and y axes copy their first tick (see the module notes)."""

    def _init_axis(self):
        super()._init_axis()
        for axis in (self.xaxis, self.yaxis):
            swap = _SWAP.get(type(axis))
            if swap is not None:  # nothing of its own to add: the same object, with the methods above
                axis.__class__ = swap
                adopt(axis.label, axis.offsetText)

    def clear(self):
        """:meth:`matplotlib.axes.Axes.clear`; the new titles' layouts are kept (:mod:`._fast_text`)."""
        super().clear()
        adopt(*(getattr(self, name, None) for name in ("title", "_left_title", "_right_title")))
