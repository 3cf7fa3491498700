"""Ticks copied from an axis' first tick (control/figures/_fast_ticks.py), and texts whose layout is kept
(control/figures/_fast_text.py), draw the pixels matplotlib's own ticks and texts draw.

Outside check: matplotlib's own :class:`~matplotlib.axes.Axes` and :class:`~matplotlib.text.Text` (the reference
library's tick making: each tick built from the axis' settings, then given the first tick's properties; its text
layout, computed at each use) on the same figure, pixel for pixel and extent for extent.
"""

import io

import numpy as np
import pytest
from matplotlib.axes import Axes
from matplotlib.axis import Axis
from matplotlib.text import Text
from matplotlib.ticker import AutoMinorLocator
from PIL import Image

from stimsteer.control.figures import _fast_text, _fast_ticks
from stimsteer.control.figures._fast_text import FastText
from stimsteer.control.figures._fast_ticks import FastAxes, clone_tick
from stimsteer.control.figures._glyphs import GlyphSafeFigure


def _figure(axes_class=None):
    """Tick settings of every kind the figures use, and some they do not (direction, grid, minor ticks, log)."""
    kw = {} if axes_class is None else {"axes_class": axes_class}
    fig = GlyphSafeFigure(figsize=(5.0, 4.0), layout="constrained")
    a = fig.add_subplot(2, 2, 1, **kw)
    b = fig.add_subplot(2, 2, 2, sharex=a, **kw)
    c = fig.add_subplot(2, 2, 3, **kw)
    d = fig.add_subplot(2, 2, 4, **kw)
    t = np.linspace(0.0, 10.0, 50)
    for ax in (a, b):
        ax.plot(t, np.sin(t), marker="o", markersize=2)
        ax.tick_params(labelsize=7, direction="in", length=5, color="tab:red")
    a.grid(True, color="0.8", linestyle=":")
    b.tick_params(labelbottom=False, labelrotation=30)
    b.yaxis.set_minor_locator(AutoMinorLocator())
    c.semilogy(t + 1.0, np.exp(t / 3.0))
    c.set_yticks([1.0, 10.0, 100.0], ["one", "ten", "a hundred"], fontsize=6, color="tab:blue")
    for label in c.get_yticklabels():
        label.set_fontweight("bold")
    d.barh(range(4), [3.0, 1.0, 2.0, 4.0])
    d.set_yticks(range(4), ["α", "b", "c", "d"], fontsize=7)
    d.set_xlabel("load [a.u.]")
    return fig


def _pixels(fig):
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=80)
    return np.asarray(Image.open(buf).convert("RGB"))


def test_plain_axes_of_the_figures_copy_their_ticks():
    fig = _figure()
    assert all(isinstance(ax, FastAxes) for ax in fig.axes)
    assert not isinstance(_figure(Axes).axes[0], FastAxes)  # an explicit class is kept


@pytest.mark.parametrize("copied, kept", [(True, True), (False, True), (True, False)],
                         ids=["copied+kept", "matplotlib's-ticks", "matplotlib's-layout"])
def test_the_ticks_draw_matplotlibs_pixels(monkeypatch, copied, kept):
    if not copied:  # the fallbacks for a matplotlib whose private attributes differ
        monkeypatch.setattr(_fast_ticks, "can_clone", lambda tick: False)
    if not kept:
        monkeypatch.setattr(_fast_text, "_LAYOUT", False)
    ours, theirs = _pixels(_figure()), _pixels(_figure(Axes))
    assert ours.shape == theirs.shape and np.array_equal(ours, theirs)


def test_a_copied_tick_has_its_own_parts():
    fig = _figure()
    first = fig.axes[0].xaxis.get_major_ticks()[0]
    assert _fast_ticks.can_clone(first)
    tick = clone_tick(first)
    for name in ("tick1line", "tick2line", "gridline", "label1", "label2"):
        part, src = getattr(tick, name), getattr(first, name)
        assert part is not src and type(part) is type(src)
        assert part._callbacks is not src._callbacks
    assert tick.label1.get_fontproperties() is not first.label1.get_fontproperties()
    tick.label1.set_fontsize(20)
    assert first.label1.get_fontsize() == 7  # restyling the copy leaves the first tick alone
    assert tick.label1.get_text() == "" and tick.gridline.get_visible() == first.gridline.get_visible()


def test_only_the_first_tick_of_each_list_is_built(monkeypatch):
    built = []
    original = Axis._get_tick
    monkeypatch.setattr(Axis, "_get_tick", lambda axis, major: built.append(major) or original(axis, major))
    fig = GlyphSafeFigure(figsize=(3.0, 2.0))
    ax = fig.add_subplot()
    ax.plot([0.0, 1.0], [0.0, 1.0])
    _pixels(fig)
    assert sorted(built) == [False, False, True, True]  # matplotlib's first major and minor tick of each axis
    assert len(ax.xaxis.majorTicks) > 2 and len(ax.yaxis.majorTicks) > 2  # the others: copies


def test_a_kept_layout_follows_every_change_of_the_text():
    from stimsteer.control.figures._fast_agg import FastCanvas, FastRenderer, forget

    forget()
    figs = [GlyphSafeFigure(figsize=(3.0, 2.0)) for _ in range(2)]
    axes = [figs[0].add_subplot(), figs[1].add_subplot(axes_class=Axes)]
    assert type(axes[0].title) is FastText and type(axes[1].title) is Text
    assert type(axes[0].xaxis.get_major_ticks()[0].label1) is FastText
    renderers = [FastCanvas(fig).get_renderer() for fig in figs]
    changes = ({}, {"text": "a title"}, {"fontsize": 15}, {"rotation": 30}, {"ha": "left"}, {"va": "top"},
               {"text": "two\nlines"}, {"linespacing": 2.0}, {"multialignment": "right"}, {"rotation_mode": "anchor"},
               {"fontweight": "bold"}, {"text": r"$x^2$ [µV]"}, {"rotation": 0})
    for change in changes:
        boxes = []
        for ax, renderer in zip(axes, renderers):
            ax.title.set(**change)
            boxes.append(ax.title.get_window_extent(renderer).bounds)
        assert boxes[0] == boxes[1], change
    assert FastRenderer._layouts  # (the layouts were kept)


def test_ticks_are_placed_once_per_axes_box_within_a_draw(monkeypatch):
    import contextlib

    from stimsteer.control.figures import _glyphs

    placed = []
    original = Axis._update_ticks
    monkeypatch.setattr(Axis, "_update_ticks", lambda axis: placed.append(axis) or original(axis))
    once = _pixels(_figure())
    n_once = len(placed)
    placed.clear()
    monkeypatch.setattr(_glyphs, "one_draw", contextlib.nullcontext)  # matplotlib's: placed at every use
    every = _pixels(_figure())
    assert np.array_equal(once, every)
    assert n_once < len(placed) / 2
    assert _fast_ticks._PLACED.get() is None  # only within a draw


def test_axes_sharing_a_formatter_place_their_own_ticks():
    def shared(axes_class=None):
        kw = {} if axes_class is None else {"axes_class": axes_class}
        fig = GlyphSafeFigure(figsize=(6.0, 3.0), layout="constrained")
        grid = fig.add_gridspec(2, 2, width_ratios=[3.0, 1.0])
        wide = fig.add_subplot(grid[0, :], **kw)
        narrow = fig.add_subplot(grid[1, 1], sharex=wide, **kw)  # another width: other ticks, one formatter
        for ax in (wide, narrow):
            ax.plot(1e5 + np.linspace(0.0, 10.0, 20), np.arange(20.0))  # an offset ("+1e5") on the axis
        return fig

    assert np.array_equal(_pixels(shared()), _pixels(shared(Axes)))
