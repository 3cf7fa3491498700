"""A laid-out figure is drawn once when saved as PNG (control/figures/_glyphs.py), and looks as matplotlib's own
two-draw save does.

Outside check: matplotlib's own ``Figure.savefig`` (the reference library's two-draw path) on the same figure. A PNG
is ``figsize × dpi`` pixels (5 × 3 in at 90 dpi: 450 × 270; matplotlib's documented size rule, common practice, no
source). The 0.5 mean grey-level tolerance is chosen here: a layout that moved one axis by a pixel stays under it,
a lost or misplaced element does not.
"""

import io

import numpy as np
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
