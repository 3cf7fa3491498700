"""Threads of the solver libraries in processes that fork.

Clarabel (from 0.10, with faer) factors large KKT systems on a rayon thread pool. A process forked after that pool
started (the bench's and the study's workers are forked) inherits the pool's state but not its threads, and its
first large solve waits for them forever (seen here: every child of a parent that had run one 400-variable solve).
Serial solves never touch the pool, so every Clarabel solve of stimsteer is serial; the processes already run
BLAS on one thread each.
"""

from __future__ import annotations

import functools

__all__: list = []


@functools.lru_cache(maxsize=1)
def _clarabel_has_max_threads() -> bool:
    try:
        import clarabel

        return hasattr(clarabel.DefaultSettings(), "max_threads")
    except Exception:  # not installed or another build: cvxpy reports the solver itself
        return False


def serial_clarabel(options: dict) -> dict:
    """``options`` of a cvxpy solve with Clarabel kept on one thread (where the installed Clarabel has the setting)."""
    out = dict(options)
    if str(out.get("solver", "CLARABEL")).upper() == "CLARABEL" and _clarabel_has_max_threads():
        out.setdefault("max_threads", 1)
    return out
