"""Channel names in any script, drawn without glyph warnings.

Recorded channels may carry names in scripts the default font (DejaVu Sans) does not cover, e.g. Chinese or Japanese
contact names. Matplotlib then draws empty boxes and prints one warning per missing glyph. A :class:`GlyphSafeFigure`
instead, when it is saved, looks for an installed font that has the missing characters and draws those texts with it
(matplotlib's font fallback list, per text, no global ``rcParams``); when no installed font has them, the glyph
warnings are silenced and a caption under the figure says which characters could not be drawn and how to get them.

A figure laid out by a layout engine (``layout="constrained"``) and saved as PNG without a tight bounding box is
drawn once (:meth:`GlyphSafeFigure.savefig`): the draw runs the layout and renders, and its pixels are written.
Matplotlib's ``savefig`` draws such a figure twice (a layout draw without output, then the draw it writes). Its
``layout="constrained"`` is laid out in one measuring pass instead of matplotlib's two (:mod:`._one_pass`). Every
PNG saved with no option but ``dpi`` and ``format`` is drawn on :class:`~._fast_agg.FastCanvas` (the text work kept
across saves, an opaque figure written as RGB: the same pixels). Fitting the fonts reads the tick labels as the
strings the axes' formatters write, so it makes no ticks (:meth:`GlyphSafeFigure._fit_fonts`). Its plain axes are
:class:`~._fast_ticks.FastAxes`: ticks copied from the first, text layouts kept (:mod:`._fast_text`).
"""

from __future__ import annotations

import functools
import os
import warnings

from matplotlib import font_manager
from matplotlib.axes import Axes
from matplotlib.axis import Axis
from matplotlib.figure import Figure
from matplotlib.text import Text

from ._fast_agg import FastCanvas
from ._fast_ticks import FastAxes, one_draw
from ._one_pass import constrained

__all__ = ["GlyphSafeFigure", "caption_note", "undrawable"]

_GLYPH_WARNING = r"Glyph \d+ .*missing from"


@functools.lru_cache(maxsize=None)
def _charmap(path: str) -> frozenset:
    from matplotlib.ft2font import FT2Font

    try:
        return frozenset(FT2Font(path).get_charmap())
    except (OSError, RuntimeError, ValueError):
        return frozenset()


def _skipped(ch: str) -> bool:
    return ch.isspace() or not ch.isprintable()


@functools.lru_cache(maxsize=None)
def _font_with(chars: frozenset) -> str | None:
    """The family name of an installed font that has every character of ``chars``; None if there is none."""
    codes = {ord(c) for c in chars}
    for entry in sorted(font_manager.fontManager.ttflist, key=lambda e: e.name):
        # "Last Resort" fonts map every character to a placeholder box: having the code is not having the glyph
        if not entry.name.startswith("Last Resort") and codes <= _charmap(entry.fname):
            return entry.name
    return None


@functools.lru_cache(maxsize=256)
def _chars_of(key) -> frozenset:
    """The characters of the font matplotlib finds for the font properties ``key`` (see :func:`_font_key`)."""
    family, style, variant, weight, stretch, file = key
    prop = font_manager.FontProperties(family=list(family), style=style, variant=variant, weight=weight,
                                       stretch=stretch, fname=file)
    try:
        path = font_manager.findfont(prop, fallback_to_default=True)
    except (ValueError, RuntimeError):
        return frozenset()
    return frozenset(map(chr, _charmap(path)))


def _font_key(prop) -> tuple:
    return (tuple(prop.get_family()), prop.get_style(), prop.get_variant(), prop.get_weight(), prop.get_stretch(),
            prop.get_file())


def _missing_in(string: str, prop) -> set:
    """The characters of ``string`` the font of ``prop`` lacks (a set test: no font lookup once the font is known)."""
    if not string:
        return set()
    have = _chars_of(_font_key(prop))
    if not have:  # no font file could be read: nothing to say about the characters
        return set()
    return {c for c in set(string).difference(have) if not _skipped(c)}


def _missing(text: Text) -> set:
    return _missing_in(text.get_text(), text.get_fontproperties())


def undrawable(names) -> list:
    """The characters of ``names`` that no installed font has (sorted); empty when every name can be drawn."""
    default = _charmap(font_manager.findfont(font_manager.FontProperties()))
    chars = {c for n in names for c in str(n) if not _skipped(c) and ord(c) not in default}
    return sorted(c for c in chars if _font_with(frozenset([c])) is None)


def caption_note(chars) -> str:
    """The sentence that says which characters could not be drawn (as code points: they cannot be drawn)."""
    shown = ", ".join(f"U+{ord(c):04X}" for c in list(chars)[:6]) + (", ..." if len(chars) > 6 else "")
    return (f"Some names use characters no installed font has ({shown}); they are drawn as boxes. The CSV and "
            "JSON files keep the names; install a font that has them (e.g. Noto Sans CJK) to see them here.")


class GlyphSafeFigure(Figure):
    """A :class:`matplotlib.figure.Figure` whose texts use an installed font that has their characters, if any;
    otherwise it says so in a caption under the figure instead of printing glyph warnings (see the module notes).
    ``layout="constrained"`` is laid out in one pass (:class:`~._one_pass.OnePassLayout`)."""

    def __init__(self, *args, layout=None, **kwargs):
        super().__init__(*args, layout=constrained() if layout == "constrained" else layout, **kwargs)

    def add_subplot(self, *args, **kwargs):
        """:meth:`matplotlib.figure.Figure.add_subplot` (and so ``subplots``); plain axes are
        :class:`~._fast_ticks.FastAxes` (their ticks copied from the first: the same pixels, made faster)."""
        if not {"projection", "polar", "axes_class"} & kwargs.keys() and not (args and isinstance(args[0], Axes)):
            kwargs["axes_class"] = FastAxes
        return super().add_subplot(*args, **kwargs)

    def _fit_fonts(self) -> list:
        """Give each text with missing characters a fallback font; the characters no font has.

        Tick labels are checked as the strings the axis' formatters will write, without making the ticks (an axis
        makes its ticks when asked for its children: about a millisecond each); a tick label that needs another
        font gets it through the axis' tick parameters, so the ticks made later have it too."""
        lost: set = set()
        for artist, string, prop in _texts_of(self):
            missing = _missing_in(string, prop)
            if not missing:
                continue
            family = _font_with(frozenset(missing))
            if family is None:
                lost |= missing
            elif isinstance(artist, Text):
                artist.set_fontfamily([*artist.get_fontfamily(), family])
            else:  # (axis, which): the tick labels of an axis
                axis, which = artist
                ticks = axis.majorTicks if which == "major" else axis.minorTicks
                current = ticks[0].label1.get_fontfamily() if ticks else prop.get_family()
                if family not in current:
                    axis.set_tick_params(which=which, labelfontfamily=[*current, family])
        return sorted(lost)

    def savefig(self, fname, *args, **kwargs):
        """:meth:`matplotlib.figure.Figure.savefig`, with the fonts fitted to the names first (see the class)."""
        lost = self._fit_fonts()
        if lost and getattr(self, "_stimsteer_note", None) is None:
            self._stimsteer_note = self.text(0.01, 0.0, caption_note(lost), fontsize=7, color="#555555",
                                             ha="left", va="top", wrap=True)
        if lost:
            kwargs.setdefault("bbox_inches", "tight")  # the caption sits under the figure: grow to hold it
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=_GLYPH_WARNING, category=UserWarning)
            if _one_draw(self, fname, args, kwargs):
                return self._print_png_once(fname, kwargs.get("dpi"))
            return super().savefig(fname, *args, **kwargs)

    def _print_png_once(self, fname, dpi=None) -> None:
        """Draw once (layout, then render) at ``dpi`` and write the PNG; the figure keeps its canvas and dpi."""
        canvas, own_dpi = self.canvas, self.dpi
        try:
            if dpi is not None and dpi != "figure":
                self.set_dpi(dpi)
            with one_draw():  # ticks placed once per axes box (._fast_ticks.one_draw)
                FastCanvas(self).print_png_fast(fname)
        finally:
            self.set_canvas(canvas)
            self.set_dpi(own_dpi)


def _texts_of(fig):
    """``(artist, string, font properties)`` of every text of ``fig``: each :class:`~matplotlib.text.Text` (titles,
    labels, legends, annotations...), and each axis' tick labels as ``((axis, "major" or "minor"), label, ...)``
    from its locator and formatter (the axis' children would be its ticks, made on the spot)."""
    stack = [fig]
    while stack:
        artist = stack.pop()
        if isinstance(artist, Axis):
            stack += [artist.label, artist.offsetText]
            yield from _tick_labels(artist)
            continue
        if isinstance(artist, Text):
            yield artist, artist.get_text(), artist.get_fontproperties()
        stack += artist.get_children()


def _tick_labels(axis):
    prop = None
    for which, ticker in (("major", axis.major), ("minor", axis.minor)):
        locs = axis.get_majorticklocs() if which == "major" else axis.get_minorticklocs()
        if len(locs) == 0:
            continue
        labels = "".join(ticker.formatter.format_ticks(locs))
        if labels:
            if prop is None:  # the tick labels' font: the first tick's (every new tick copies it)
                prop = axis.majorTicks[0].label1.get_fontproperties()
            yield (axis, which), labels, prop


def _one_draw(fig, fname, args, kwargs) -> bool:
    """True when :meth:`GlyphSafeFigure.savefig` may draw once with its own canvas: a PNG saved with no option but
    ``dpi`` and ``format`` (a tight bounding box, a transparent background... take the usual path)."""
    if args or set(kwargs) - {"dpi", "format"}:
        return False
    fmt = kwargs.get("format")
    if fmt is None:
        fmt = str(fname).rpartition(".")[2] if isinstance(fname, (str, os.PathLike)) else None
    return str(fmt).lower() == "png"
