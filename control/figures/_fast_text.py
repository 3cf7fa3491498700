"""Texts whose layout is computed once per process for what it depends on: the tick labels, axis labels and titles
of :class:`~._fast_ticks.FastAxes`.

Matplotlib lays a text out (``Text._get_layout``: its lines measured, stacked, aligned and rotated, relative to its
anchor) each time its extent is asked for or it is drawn: three to five times per tick label and save (the
constrained layout's measure, the axis label's placement beside its siblings' tick labels, the spines' extents, the
draw), about a seventh of the demo's figures' CPU. The layout depends only on the text's string and font, its line
spacing, alignments, rotation and rotation mode, how math and TeX are read, the figure's dpi and the renderer's
measurements. On :class:`~._fast_agg.FastRenderer`, whose measurements are themselves kept per string, font, dpi and
hinting, :class:`FastText` keeps its layout under exactly those keys (wrapped and TeX texts excepted: they are laid
out each time, as matplotlib does). The layout is relative to the anchor: where the text is (its position and
transform) is applied to it each time, as matplotlib does.

``_get_layout`` is matplotlib's private method (3.7 to 3.11 at least); where it is missing, texts stay matplotlib's.
"""

from __future__ import annotations

from matplotlib.backends.backend_agg import get_hinting_flag
from matplotlib.text import Text

from ._fast_agg import FastRenderer, _remember

__all__ = ["FastText", "adopt"]

_LAYOUT = callable(getattr(Text, "_get_layout", None)) and all(
    hasattr(Text, name) for name in ("get_rotation", "get_rotation_mode", "get_usetex", "get_parse_math"))


class FastText(Text):
    """:class:`matplotlib.text.Text` whose layout on a :class:`~._fast_agg.FastRenderer` is kept (module notes)."""

    def _get_layout(self, renderer):
        if not isinstance(renderer, FastRenderer) or self._wrap or self.get_usetex():
            return super()._get_layout(renderer)
        key = (self.get_text(), hash(self._fontproperties), self._linespacing, self._multialignment,
               self._horizontalalignment, self._verticalalignment, self.get_rotation(), self.get_rotation_mode(),
               self.get_parse_math(), self.get_figure(root=True).dpi, renderer.dpi, get_hinting_flag())
        found = FastRenderer._layouts.get(key)
        if found is None:
            found = _remember(FastRenderer._layouts, key, super()._get_layout(renderer))
        return found


def adopt(*texts) -> None:
    """Make each of ``texts`` that is a plain :class:`~matplotlib.text.Text` a :class:`FastText` (the same object:
    the class adds no state)."""
    if not _LAYOUT:
        return
    for text in texts:
        if type(text) is Text:
            text.__class__ = FastText
