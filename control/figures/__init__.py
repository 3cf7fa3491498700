"""Figures of stimsteer's results, drawn with matplotlib's object API only (no pyplot state, no backend switch, no
global ``rcParams``), so importing or using stimsteer never changes a user's plotting set-up.

* :mod:`.bench` — the figures of the benchmark report.
"""

from .bench import report_figures

__all__ = ["report_figures"]
