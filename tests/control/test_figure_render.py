"""A laid-out figure is drawn once when saved as PNG (control/figures/_glyphs.py), and looks as matplotlib's own
two-draw save does.

Outside check: matplotlib's own ``Figure.savefig`` (the reference library's two-draw path) on the same figure. A PNG
is ``figsize × dpi`` pixels (5 × 3 in at 90 dpi: 450 × 270; matplotlib's documented size rule, common practice, no
source). The 0.5 mean grey-level tolerance is chosen here: a layout that moved one axis by a pixel stays under it,
a lost or misplaced element does not.
"""

import io
import warnings

import numpy as np
import pytest
from matplotlib.figure import Figure
from PIL import Image

from stimsteer.control.figures._glyphs import GlyphSafeFigure


def _figure():
    fig = GlyphSafeFigure(figsize=(5.0, 3.0), layout="constrained")
    axes = fig.subplots(2, 1, sharex=True)
    t = np.linspace(0.0, 1.0, 200)
    for k, ax in enumerate(axes):
        ax.plot(t, np.sin(2 * np.pi * (k + 1) * t), label=f"channel {k}")
        ax.set_ylabel(f"y{k} [µV]")
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    axes[-1].set_xlabel("time [s]")
    fig.suptitle("two channels")
    return fig


def _counted(monkeypatch):
    draws = []
    original = Figure.draw

    def draw(fig, renderer):
        draws.append(fig)
        return original(fig, renderer)

    monkeypatch.setattr(Figure, "draw", draw)
    return draws


def test_a_laid_out_png_is_drawn_once_and_matches_the_two_draw_save(monkeypatch):
    draws = _counted(monkeypatch)
    once, twice = io.BytesIO(), io.BytesIO()
    _figure().savefig(once, format="png", dpi=90)
    assert len(draws) == 1
    Figure.savefig(_figure(), twice, format="png", dpi=90)  # matplotlib's path: a layout draw, then the real one
    assert len(draws) == 3
    a, b = (np.asarray(Image.open(buf).convert("RGB"), dtype=float) for buf in (once, twice))
    assert a.shape == b.shape == (270, 450, 3)
    assert np.mean(np.abs(a - b)) < 0.5  # the same picture (layouts agree to a pixel or so)


def test_the_figure_keeps_its_dpi_and_other_saves_take_the_usual_path(monkeypatch):
    fig = _figure()
    fig.savefig(io.BytesIO(), format="png", dpi=50)
    assert fig.dpi == 100.0
    draws = _counted(monkeypatch)
    fig.savefig(io.BytesIO(), format="png", bbox_inches="tight")  # a tight box needs matplotlib's own two draws
    assert len(draws) == 2
    fig.savefig(io.BytesIO(), format="svg")
    assert len(draws) == 4


def test_the_layout_measures_the_decorations_once_per_save(monkeypatch):
    from matplotlib import _constrained_layout

    passes = []
    original = _constrained_layout.make_layout_margins

    def counted(*args, **kwargs):
        passes.append(1)
        return original(*args, **kwargs)

    monkeypatch.setattr(_constrained_layout, "make_layout_margins", counted)
    _figure().savefig(io.BytesIO(), format="png", dpi=90)
    assert len(passes) == 1  # matplotlib's own constrained layout measures twice per draw


# ------------------------------------------------------------------------------ the text work kept across saves
def _texts_figure():
    fig = GlyphSafeFigure(figsize=(4.0, 3.0), layout="constrained")
    ax = fig.add_subplot()
    ax.plot([0.0, 1.0, 2.0], [1.0, -2.0, 0.5])
    ax.set_ylabel("amplitude [µA]\nsecond line")
    ax.set_title("repeated 0 0 0")
    ax.text(0.5, 0.5, "rotated 12 µC", rotation=30.0, transform=ax.transAxes)
    ax.text(0.1, 0.2, r"$\sqrt{x^2}$ math", transform=ax.transAxes)
    fig.suptitle("a title (0)")
    return fig


def test_the_kept_text_work_draws_the_pixels_matplotlib_draws():
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from stimsteer.control.figures._fast_agg import FastCanvas, forget

    forget()
    for dpi in (80.0, 100.0, 80.0):  # the third save draws from what the first kept; the second must not use it
        plain, kept = io.BytesIO(), io.BytesIO()
        for canvas, buf in ((FigureCanvasAgg, plain), (FastCanvas, kept)):
            fig = _texts_figure()
            fig.set_dpi(dpi)
            canvas(fig).print_png(buf)
        a, b = (np.asarray(Image.open(buf).convert("RGB")) for buf in (plain, kept))
        assert a.shape == b.shape and np.array_equal(a, b)


def test_fonts_are_fitted_without_making_every_tick():
    fig = _figure()

    def made():  # the ticks the axes hold (each axis makes its first tick of each list when the axes is made)
        return sum(len(vars(axis).get(name, ())) for ax in fig.axes for axis in (ax.xaxis, ax.yaxis)
                   for name in ("majorTicks", "minorTicks"))

    before = made()
    assert fig._fit_fonts() == []
    assert made() == before <= 4 * len(fig.axes)  # no tick made (matplotlib's findobj makes them all)
    fig.findobj()
    assert made() > before  # (the check above means something)


def test_tick_labels_a_font_lacks_get_one_that_has_them():
    from matplotlib import font_manager

    from stimsteer.control.figures._glyphs import _charmap, _font_with

    default = _charmap(font_manager.findfont(font_manager.FontProperties()))
    candidates = [chr(c) for c in range(0x2100, 0x2BFF) if c not in default and _font_with(frozenset([chr(c)]))]
    if not candidates:
        pytest.skip("no installed font has a character the default font lacks")
    fig = _figure()
    ax = fig.axes[0]
    ax.set_yticks([-1.0, 0.0, 1.0], ["low", f"mid {candidates[0]}", "high"])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a glyph warning fails the test
        fig.savefig(io.BytesIO(), format="png")
    family = _font_with(frozenset([candidates[0]]))
    needing = [t for t in ax.yaxis.get_major_ticks() if candidates[0] in t.label1.get_text()]
    assert len(needing) == 1 and family in needing[0].label1.get_fontfamily()
    assert not any("no installed font" in t.get_text() for t in fig.texts)  # nothing lost: no caption


def test_an_opaque_figure_is_written_as_rgb_with_the_same_pixels_and_a_transparent_one_keeps_its_alpha():
    for transparent in (False, True):
        fig = _texts_figure()
        if transparent:
            fig.patch.set_alpha(0.0)
        ours, theirs = io.BytesIO(), io.BytesIO()
        fig.savefig(ours, format="png", dpi=70)
        Figure.savefig(_texts_figure() if not transparent else fig, theirs, format="png", dpi=70)
        a, b = Image.open(ours), Image.open(theirs)
        assert a.mode == ("RGBA" if transparent else "RGB") and b.mode == "RGBA"
        assert round(a.info["dpi"][0]) == 70 and "Matplotlib" in a.info["Software"]
        assert np.array_equal(np.asarray(a.convert("RGBA")), np.asarray(b))
