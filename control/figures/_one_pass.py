"""Constrained layout in one pass: the layout engine of every figure stimsteer draws with ``layout="constrained"``.

Matplotlib's constrained layout measures every axes' decorations (tick labels, axis labels, titles, legends) and
moves the axes so that they fit, and does it twice: the second pass corrects for tick labels that changed when the
axes were resized (``matplotlib._constrained_layout.do_constrained_layout``). Measuring the decorations is the
costly part of saving a figure (a third to a half of each save of the report's figures, measured in
``benchmarks/README.md``). Our figures have fixed sizes and tick labels whose width barely changes with the axes'
size, so :class:`OnePassLayout` runs the same steps once: the axes land within a pixel or so of where two passes
put them (tests/control/test_figure_render.py compares the pictures with matplotlib's own layout). A figure with a
colour bar keeps the two passes: the bar's ticks and label are measured only in the second.

The steps are matplotlib's own (``matplotlib._constrained_layout``, a private module): where it is missing or has
changed, :func:`constrained` gives matplotlib's usual engine instead, so a figure is always laid out.
"""

from __future__ import annotations

from matplotlib.layout_engine import ConstrainedLayoutEngine

try:  # matplotlib's private steps of the layout (3.7 to 3.11 at least)
    from matplotlib import _constrained_layout as _steps

    _NEEDED = ("make_layoutgrids", "make_layout_margins", "make_margin_suptitles", "match_submerged_margins",
               "check_no_collapsed_axes", "reposition_axes", "reset_margins")
    _AVAILABLE = all(callable(getattr(_steps, name, None)) for name in _NEEDED)
except ImportError:  # pragma: no cover - a matplotlib without the module
    _steps, _AVAILABLE = None, False

__all__ = ["OnePassLayout", "constrained"]


class OnePassLayout(ConstrainedLayoutEngine):
    """:class:`matplotlib.layout_engine.ConstrainedLayoutEngine` with one measuring pass instead of two (see the
    module notes); the same settings (pads, spaces, rectangle), no ``compress``."""

    def execute(self, fig):
        """Lay out ``fig``: measure the decorations once, then place the axes and the suptitle (a figure with a
        colour bar gets matplotlib's two passes: the bar's ticks and label exist only after the first)."""
        if any(getattr(ax, "_colorbar", None) is not None for ax in fig.axes):
            return super().execute(fig)
        width, height = fig.get_size_inches()
        p = self._params
        h_pad, w_pad = p["h_pad"] / height, p["w_pad"] / width
        spaces = {"h_pad": h_pad, "w_pad": w_pad, "hspace": p["hspace"], "wspace": p["wspace"]}
        renderer = fig._get_renderer()
        grids = _steps.make_layoutgrids(fig, None, rect=p["rect"])
        if not grids["hasgrids"]:
            return None
        _steps.make_layout_margins(grids, fig, renderer, **spaces)
        _steps.make_margin_suptitles(grids, fig, renderer, h_pad=h_pad, w_pad=w_pad)
        _steps.match_submerged_margins(grids, fig)
        grids[fig].update_variables()
        if _steps.check_no_collapsed_axes(grids, fig):
            _steps.reposition_axes(grids, fig, renderer, **spaces)
            title = fig._suptitle
            if title is not None and title.get_in_layout() and title._autopos:
                title.set_position((title.get_position()[0], grids[fig].get_inner_bbox().y1 + h_pad))
                title.set_verticalalignment("bottom")
        _steps.reset_margins(grids, fig)
        return grids


def constrained():
    """The layout engine for ``Figure(layout=...)``: :class:`OnePassLayout`, or ``"constrained"`` (matplotlib's
    two passes) where matplotlib's steps are not there to call."""
    return OnePassLayout() if _AVAILABLE else "constrained"
