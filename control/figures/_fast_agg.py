"""The Agg canvas stimsteer saves its PNG figures with: matplotlib's own, with the text work of a save kept.

Matplotlib (3.11) shapes a text's glyphs anew each time it draws it (``FT2Font._layout``, about a tenth of a
millisecond per character), reads the font's height tables anew for each text it measures, and keeps the measured
sizes of texts per renderer, i.e. per saved figure. The demo's figures draw and measure the same strings again and
again (tick labels, units, the caution), so :class:`FastRenderer` keeps, for the whole process and keyed exactly
by what they depend on (string, font properties, dpi, hinting, font features and language):

- the shaped glyphs of each drawn text (the same list ``_layout`` returns: glyph, font, offset),
- the font's ascent, descent and line gap of each font properties (``Text._get_layout``'s own computation, through
  the hook matplotlib gives renderers for it),
- the width, height and descent of each measured string.

The pixels are those matplotlib draws (tests/control/test_figure_render.py compares them). Where matplotlib's private
steps used here are missing or different, the renderer is matplotlib's own.
"""

from __future__ import annotations

from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg, get_hinting_flag
from matplotlib.font_manager import fontManager, get_font
from matplotlib.ft2font import FT2Font

__all__ = ["FastCanvas", "FastRenderer", "forget"]

# matplotlib's private steps the shortcuts rely on (3.11); without them the renderer is matplotlib's own
_SHAPES = (all(hasattr(RendererAgg, n) for n in ("_prepare_font", "_draw_text_glyphs_and_boxes"))
           and hasattr(FT2Font, "_layout"))
_FIND = hasattr(fontManager, "_find_fonts_by_props")
_LIMIT = 20000  # entries per cache (a few MB at most); cleared whole when full


def _remember(cache: dict, key, value):
    if len(cache) >= _LIMIT:
        cache.clear()
    cache[key] = value
    return value


class FastRenderer(RendererAgg):
    """:class:`~matplotlib.backends.backend_agg.RendererAgg` that keeps the text work it can reuse (see the
    module notes)."""

    _shapes: dict = {}
    _heights: dict = {}
    _sizes: dict = {}

    def get_text_width_height_descent(self, s, prop, ismath):
        """The width, height and descent of ``s`` in pixels, measured once per process for plain text."""
        if ismath:
            return super().get_text_width_height_descent(s, prop, ismath)
        key = (s, hash(prop), self.dpi, get_hinting_flag())
        found = self._sizes.get(key)
        if found is None:
            found = _remember(self._sizes, key, super().get_text_width_height_descent(s, prop, ismath))
        return found

    if _FIND:
        def _get_font_height_metrics(self, prop):
            """Ascent, descent and line gap of the font of ``prop`` at this dpi, as ``Text._get_layout`` computes
            them from the font's OS/2 or hhea table (None, None, None when the font has neither)."""
            key = (hash(prop), self.dpi)
            found = self._heights.get(key)
            if found is None:
                found = _remember(self._heights, key, _height_metrics(prop, self.dpi))
            return found

    def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
        """Draw plain text from its shaped glyphs, shaped once per process (matplotlib's own ``draw_text``
        otherwise)."""
        if ismath or not _SHAPES:
            return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
        flags = get_hinting_flag()
        features = mtext.get_fontfeatures() if hasattr(mtext, "get_fontfeatures") else None
        language = mtext.get_language() if hasattr(mtext, "get_language") else None
        key = (s, hash(prop), self.dpi, flags, _hashable(features), _hashable(language))
        glyphs = self._shapes.get(key)
        if glyphs is None:
            items = self._prepare_font(prop)._layout(s, flags=flags, features=features, language=language)
            glyphs = _remember(self._shapes, key, tuple((i.ft_object, i.glyph_index, i.x, i.y) for i in items))
        size = prop.get_size_in_points()
        self._draw_text_glyphs_and_boxes(gc, x, y, angle,
                                         ((font, size, index, 0, 1, dx, dy) for font, index, dx, dy in glyphs), [])
        return None


def forget() -> None:
    """Empty the process-wide caches of :class:`FastRenderer` (benchmarks: a fresh process's first figures)."""
    for cache in (FastRenderer._shapes, FastRenderer._heights, FastRenderer._sizes):
        cache.clear()


def _hashable(value):
    return tuple(value) if isinstance(value, list) else value


def _height_metrics(prop, dpi):
    font = get_font(fontManager._find_fonts_by_props(prop))
    for table_name, gap, ascent, descent in (("OS/2", "sTypoLineGap", "sTypoAscender", "sTypoDescender"),
                                             ("hhea", "lineGap", "ascent", "descent")):
        table = font.get_sfnt_table(table_name)
        if table is None:
            continue
        scale = 1 / font.get_sfnt_table("head")["unitsPerEm"] * prop.get_size_in_points() * dpi / 72
        return table[ascent] * scale, -table[descent] * scale, table[gap] * scale
    return None, None, None


class FastCanvas(FigureCanvasAgg):
    """:class:`~matplotlib.backends.backend_agg.FigureCanvasAgg` drawing with a :class:`FastRenderer`."""

    _fast_key = None

    def get_renderer(self):
        """The renderer of the figure's current size and dpi (made anew when either changed)."""
        w, h = self.get_width_height(physical=True)
        key = (w, h, self.figure.dpi)
        if self._fast_key != key:
            self.renderer = FastRenderer(w, h, self.figure.dpi)
            self._fast_key = key
        return self.renderer
