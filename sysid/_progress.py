"""One progress bar for every step that can take more than a few seconds.

Every long step (fits, schedules, the benchmark, a study) reports through :func:`progress`, so the look and the rule
"quiet when not on a terminal" are decided in one place. The bar writes to standard error, never to standard
output, so scripts that read a command's output see nothing of it.
"""
from __future__ import annotations

import os
import sys
from contextlib import contextmanager

__all__ = ["progress", "progress_wanted"]


def progress_wanted(enabled: bool | None = None) -> bool:
    """Whether a bar should be drawn.

    ``None`` means "decide from the terminal": shown when standard error is a terminal, hidden otherwise (pipes,
    files, CI logs). ``STIMSTEER_PROGRESS=0`` hides it and ``=1`` forces it whatever the terminal.
    """
    forced = os.environ.get("STIMSTEER_PROGRESS")
    if forced in ("0", "1"):
        return forced == "1"
    if enabled is not None:
        return bool(enabled)
    try:
        return sys.stderr.isatty()
    except (AttributeError, ValueError):  # closed or replaced stream
        return False


@contextmanager
def progress(total: int | None, what: str, *, unit: str = "step", enabled: bool | None = None):
    """A progress bar over ``total`` units of work named ``what``; yields an object with ``update(n=1)``.

    Parameters
    ----------
    total : int or None
        Number of units the step will do (``None`` when not known in advance).
    what : str
        Short description shown in front of the bar, e.g. ``"fit ridge ARX"``.
    unit : str
        Name of one unit of work (``"chunk"``, ``"fold"``, ``"task"``).
    enabled : bool or None
        ``None`` decides from the terminal (see :func:`progress_wanted`).
    """
    from tqdm.auto import tqdm

    bar = tqdm(total=total, desc=f"stimsteer {what}", unit=unit, disable=not progress_wanted(enabled),
               file=sys.stderr, dynamic_ncols=True, leave=False)
    try:
        yield bar
    finally:
        bar.close()
