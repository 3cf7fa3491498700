"""The Agg canvas stimsteer saves its PNG figures with: matplotlib's own, with the text work of a save kept.

Matplotlib (3.11) shapes a text's glyphs anew each time it draws it (``FT2Font._layout``, about a tenth of a
millisecond per character), reads the font's height tables anew for each text it measures, and keeps the measured
sizes of texts per renderer, i.e. per saved figure. The demo's figures draw and measure the same strings again and
again (tick labels, units, the caution), so :class:`FastRenderer` keeps, for the whole process and keyed exactly
by what they depend on (string, font properties, dpi, hinting, font features and language):

- the shaped glyphs of each drawn text (the same list ``_layout`` returns: glyph, font, offset),
- the font's ascent, descent and line gap of each font properties (``Text._get_layout``'s own computation, through
  the hook matplotlib gives renderers for it),
- the width, height and descent of each measured string,
- the bitmap of each glyph at each sub-pixel offset (a text moved by whole pixels draws the same bitmaps there).

The pixels are those matplotlib draws (tests/control/test_figure_render.py compares them). Where matplotlib's private
steps used here are missing or different, the renderer is matplotlib's own.
"""

from __future__ import annotations

import math
import os

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg, get_hinting_flag
from matplotlib.font_manager import fontManager, get_font
from matplotlib.ft2font import FT2Font

try:  # matplotlib 3.11's glyph-by-glyph rendering
    from matplotlib.ft2font import RenderMode
except ImportError:  # pragma: no cover - an older matplotlib: its own draw_text is used
    RenderMode = None

__all__ = ["FastCanvas", "FastRenderer", "forget"]

# matplotlib's private steps the shortcuts rely on (3.11); without them the renderer is matplotlib's own
_SHAPES = (all(hasattr(RendererAgg, n) for n in ("_prepare_font", "_draw_text_glyphs_and_boxes"))
           and all(hasattr(FT2Font, n) for n in ("_layout", "_set_transform", "_render_glyph"))
           and RenderMode is not None)
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
    _bitmaps: dict = {}
    _heights: dict = {}
    _sizes: dict = {}
    _layouts: dict = {}  # the layouts of :class:`._fast_text.FastText`

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
        self._draw_glyphs(gc, x, y, angle, prop.get_size_in_points(), glyphs, flags)
        return None

    def _draw_glyphs(self, gc, x, y, angle, size, glyphs, flags) -> None:
        """``_draw_text_glyphs_and_boxes`` of plain text (no slant, no stretch, no boxes), each glyph's bitmap
        rendered once per process for each sub-pixel offset (a whole-pixel shift moves the same bitmap)."""
        cos, sin = math.cos(math.radians(angle)), math.sin(math.radians(angle))
        matrix = (0x10000 * np.array([[cos, -sin], [sin, cos]]) @ [[1, 0], [0, 1]]).round().astype(int)
        mode = RenderMode.NORMAL if gc.get_antialiased() else RenderMode.MONO
        height = self.height
        for font, index, dx, dy in glyphs:  # dy is upwards; FreeType's y is upwards
            at_x, at_y = round(0x40 * (x + dx * cos - dy * sin)), round(0x40 * (height - y + dx * sin + dy * cos))
            key = (font.fname, size, self.dpi, index, angle, flags, mode, at_x & 63, at_y & 63)
            found = self._bitmaps.get(key)
            if found is None:
                font.set_size(size, self.dpi)
                font._set_transform(matrix, [at_x, at_y])
                bitmap = font._render_glyph(index, flags, mode)
                buffer = bitmap.buffer if mode == RenderMode.NORMAL else bitmap.buffer * 0xff
                found = _remember(self._bitmaps, key, (buffer, bitmap.left - (at_x >> 6), bitmap.top - (at_y >> 6)))
            buffer, left, top = found
            # draw_text_image's y is downwards & the bitmap bottom side
            self._renderer.draw_text_image(buffer, left + (at_x >> 6), int(height) - (top + (at_y >> 6)) +
                                           buffer.shape[0], 0, gc)


def forget() -> None:
    """Empty the process-wide caches of :class:`FastRenderer` (benchmarks: a fresh process's first figures)."""
    for cache in (FastRenderer._shapes, FastRenderer._bitmaps, FastRenderer._heights, FastRenderer._sizes,
                  FastRenderer._layouts):
        cache.clear()


# The shaped glyphs keep matplotlib's font objects, which read their font file through a Python file object (seek,
# then read): a forked process shares that file's offset with its parent, and two processes drawing at once read
# glyphs from the wrong place (FreeType's "too many hints"). Matplotlib empties its own font cache in a forked child
# for this reason; so do we: a child opens its fonts anew.
if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=forget)


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


#: zlib level of the PNGs (1 of 9): an opaque figure's pixels as RGB at level 1 take about 0.4x the time of
#: matplotlib's RGBA at Pillow's default level 6, in files of about the same size (benchmarks/README.md)
PNG_LEVEL = 1


class FastCanvas(FigureCanvasAgg):
    """:class:`~matplotlib.backends.backend_agg.FigureCanvasAgg` drawing with a :class:`FastRenderer`; its
    :meth:`print_png_fast` writes an opaque figure as an RGB PNG (the same pixels)."""

    def print_png_fast(self, fname) -> None:
        """Draw and write a PNG as matplotlib's ``print_png`` does (its metadata, the dpi), but without the alpha
        channel when every pixel is opaque (the usual figure: a white background) and at :data:`PNG_LEVEL`."""
        from PIL import Image, PngImagePlugin
        import matplotlib

        FigureCanvasAgg.draw(self)
        rgba = np.asarray(self.buffer_rgba())
        opaque = bool((rgba[..., 3] == 255).all())
        image = Image.fromarray(np.ascontiguousarray(rgba[..., :3]) if opaque else rgba)
        info = PngImagePlugin.PngInfo()
        info.add_text("Software", f"Matplotlib version{matplotlib.__version__}, https://matplotlib.org/")
        dpi = self.figure.dpi
        image.save(fname, format="png", pnginfo=info, dpi=(dpi, dpi), compress_level=PNG_LEVEL)

    _fast_key = None

    def get_renderer(self):
        """The renderer of the figure's current size and dpi (made anew when either changed)."""
        w, h = self.get_width_height(physical=True)
        key = (w, h, self.figure.dpi)
        if self._fast_key != key:
            self.renderer = FastRenderer(w, h, self.figure.dpi)
            self._fast_key = key
        return self.renderer
