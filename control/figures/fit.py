"""The figure of an order choice (``stimsteer fit --order-figure``): held-out error against order, beside the
singular values, instead of a table of singular values to read by eye.

Left: the held-out error of every candidate order (the quantity the choice minimises), stable orders filled and
unstable ones hollow, the chosen order marked by a band. Right: the singular values against the same orders, on a
plain axis, with the largest gap marked. Reading both panels together shows whether the gap and the error agree.

Object API only (``matplotlib.figure.Figure``): no pyplot state, no backend switch, no global ``rcParams``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from ...sysid import InvalidParameterError
from ._glyphs import GlyphSafeFigure

__all__ = ["order_choice_figure", "ORDER_COLUMNS"]

#: The columns an order-selection table needs (``SubspaceId.order_table_``).
ORDER_COLUMNS = ("order", "singular_value", "heldout_error")
_INK, _WARN, _CHOSEN = "#24434f", "#b2302b", "#dfeadb"


def order_choice_figure(table: pd.DataFrame, what: str = "") -> Figure:
    """Held-out error against order, beside the singular values.

    Parameters
    ----------
    table : pandas.DataFrame
        One row per candidate order with :data:`ORDER_COLUMNS` and, when present, ``stable`` and ``selected``
        (e.g. ``SubspaceId.order_table_``).
    what : str, optional
        The model and route, for the title.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InvalidParameterError
        When the table lacks the columns of an order choice (the method chose no order).
    """
    missing = [c for c in ORDER_COLUMNS if c not in getattr(table, "columns", ())]
    if missing:
        raise InvalidParameterError(f"the fit chose no model order (its selection table has no {', '.join(missing)} "
                                    "column); --order-figure is for methods that choose an order, e.g. --method "
                                    "subspace.")
    t = table.sort_values("order")
    order = t["order"].to_numpy()
    stable = t["stable"].to_numpy(bool) if "stable" in t else np.ones(len(t), bool)
    chosen = order[t["selected"].to_numpy(bool)] if "selected" in t else np.array([])
    fig = GlyphSafeFigure(figsize=(9.0, 3.6), layout="constrained")
    ax_err, ax_sv = fig.subplots(1, 2, sharex=True)
    err = t["heldout_error"].to_numpy(float)
    ax_err.plot(order, err, color=_INK, lw=1.2)
    ax_err.plot(order[stable], err[stable], "o", color=_INK, ms=4.5)
    ax_err.plot(order[~stable], err[~stable], "o", mfc="white", mec=_WARN, ms=5.5)
    sv = t["singular_value"].to_numpy(float)
    ax_sv.plot(order, sv, "o-", color=_INK, ms=4, lw=1.2)
    ratio = sv[:-1] / np.where(sv[1:] > 0, sv[1:], np.nan)
    if ratio.size and np.isfinite(ratio).any():
        k = int(np.nanargmax(ratio))
        # the text in the panel's upper middle (singular values fall with the order, so it stays clear of them),
        # a line to the point: placed beside the point it ran into the panel title when the gap follows order 1
        ax_sv.annotate(f"largest gap after order {order[k]:g}\n(ratio {ratio[k]:.2g})", (order[k], sv[k]),
                       xytext=(0.35, 0.8), textcoords="axes fraction", fontsize=7, color=_INK, va="top",
                       arrowprops={"arrowstyle": "-", "color": "0.5", "lw": 0.6})
    for ax in (ax_err, ax_sv):
        for c in chosen:
            ax.axvspan(c - 0.45, c + 0.45, color=_CHOSEN, lw=0, zorder=0)
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(alpha=0.3, lw=0.5)
        ax.tick_params(labelsize=8)
        ax.set_xlabel("model order [states]", fontsize=8)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax_err.set_ylabel("held-out error\n[mean squared error ÷ mean square output]", fontsize=8)
    ax_sv.set_ylabel("singular value [no unit]", fontsize=8)
    ax_err.set_title("held-out error (hollow red: unstable model)", fontsize=9, loc="left")
    ax_sv.set_title("singular values of the weighted data matrix", fontsize=9, loc="left")
    picked = f"order {', '.join(f'{c:g}' for c in chosen)} chosen (shaded)" if chosen.size else "no order chosen"
    fig.suptitle(f"Order choice of {what or 'the fitted model'}: {picked}", fontsize=10, x=0.01, ha="left")
    return fig
