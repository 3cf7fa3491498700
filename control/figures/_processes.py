"""Figures drawn as PNG bytes, several at a time in forked processes.

A report's figures are independent of each other and each is one process's work for a fraction of a second to a
second (matplotlib draws in Python, on one core). Where processes can be forked they are drawn by a small pool
whose workers inherit the figure makers (the result they read is not copied or pickled): the figures come back as
PNG bytes, exactly the bytes one process would have written. Where processes cannot be forked, or the caller is a
daemonic process (which may not start children), or one process is asked for, they are drawn here in turn.
"""

from __future__ import annotations

import io
import multiprocessing
import os

__all__ = ["render_pngs", "local_cores"]

# the makers of the rendering under way, read by the forked workers (set only for the lifetime of one pool)
_MAKERS: dict | None = None


def local_cores() -> int:
    """The cores this process may run on (its CPU affinity where the system has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def _png(make):
    fig = make()
    if fig is None:  # the result holds no data for this figure
        return None
    buf = io.BytesIO()
    fig.savefig(buf, format="png")  # one draw: the layout engine runs in it
    return buf.getvalue()


def _render_named(name: str):
    return name, _png(_MAKERS[name])


def render_pngs(makers: dict, processes: int = 1) -> dict:
    """PNG bytes of each figure maker that draws one, in the makers' order.

    Parameters
    ----------
    makers : dict of str to callable
        ``name -> make()``, each returning a :class:`matplotlib.figure.Figure`, or None when there is nothing to
        draw (the name is then left out).
    processes : int, default 1
        Forked processes to draw in (at most one per figure); 1 draws in this process.

    Returns
    -------
    dict of str to bytes
    """
    global _MAKERS
    names = list(makers)
    forked = ("fork" in multiprocessing.get_all_start_methods() and not multiprocessing.current_process().daemon
              and _MAKERS is None)
    if processes <= 1 or len(names) < 2 or not forked:
        pairs = [(name, _png(makers[name])) for name in names]
    else:
        _MAKERS = makers
        try:
            with multiprocessing.get_context("fork").Pool(min(int(processes), len(names))) as pool:
                pairs = pool.map(_render_named, names, chunksize=1)
        finally:
            _MAKERS = None
    return {name: png for name, png in pairs if png is not None}
