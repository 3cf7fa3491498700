"""stimsteer.control.figures: figures drawn with matplotlib's object API only.

Each function returns a :class:`matplotlib.figure.Figure` built with ``Figure()`` (no pyplot state, no backend
switch, no global ``rcParams``), so importing stimsteer never changes a user's plotting state; a command module
saves it (``fig.savefig``).
"""

from .network import gramian_spectrum_figure, impulse_response_figure, ranking_figure

__all__ = ["gramian_spectrum_figure", "impulse_response_figure", "ranking_figure"]
