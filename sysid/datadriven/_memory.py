"""Memory of the Gram route: freed heap pages handed back, and large arrays touched before they are written.

A fresh array of tens of MB costs page faults at its first write (measured at past 100 / horizon 50, in a new
process: 0.09-0.17 s for 95 MB, against 0.01 s for a buffer already touched); where a core would otherwise wait,
touching it there takes them off the work that follows.
"""

from __future__ import annotations

import ctypes
import ctypes.util

import numpy as np

__all__: list = []


def release_freed_memory() -> None:
    """Hand freed heap pages back to the operating system (glibc ``malloc_trim``; nothing elsewhere).

    Arrays of 128 kB … 32 MB (the row blocks of a Gram, ``pN × n_b`` products) live on the heap once glibc has
    raised its mapping threshold, and the heap keeps their pages after they are freed: measured at past 100 /
    horizon 50, 50 MB of the least-squares fit's peak resident memory were such pages.
    """
    if _LIBC:
        _LIBC[0].malloc_trim(0)


def _load_libc() -> list:
    name = ctypes.util.find_library("c")
    try:
        libc = ctypes.CDLL(name) if name else None
        return [libc] if libc is not None and hasattr(libc, "malloc_trim") else []
    except OSError:
        return []


_LIBC = _load_libc()


def touched_empty(size: int) -> np.ndarray:
    """``np.empty(size)`` (float64) with one entry per 4 kB page written (zero): its pages made resident now, by one
    strided NumPy assignment (which releases the GIL), not by the first work that writes it."""
    out = np.empty(int(size))
    out[::512] = 0.0
    return out
