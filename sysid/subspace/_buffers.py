"""Handing the unused tail of a large buffer back to the operating system (``madvise(MADV_DONTNEED)``), so that a
Gram-sized buffer reused for a smaller computation (an SVD's workspace, the held-out Gram's rows) does not keep its
whole size resident: the peak memory of a fit at 3,450 Hankel rows stays under its 500 MB budget while the buffers
save their first-touch page faults. Linux only; elsewhere (or without libc) nothing is released.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import mmap
import sys

import numpy as np

__all__ = ["release_tail", "touched"]

_MADV_DONTNEED = 4  # Linux <sys/mman.h>


def _madvise():
    if not sys.platform.startswith("linux"):  # pragma: no cover - other systems
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        fn = libc.madvise
    except (OSError, AttributeError):  # pragma: no cover - no libc
        return None
    fn.argtypes, fn.restype = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int], ctypes.c_int
    return fn


_MADVISE = _madvise()


def release_tail(buffer: np.ndarray, used: int) -> int:
    """Release the whole pages of the flat float64 ``buffer`` beyond its first ``used`` items (their contents are
    then undefined: zero when read again, and resident again only once written). Returns the bytes released."""
    if _MADVISE is None or buffer.ndim != 1 or not buffer.flags.c_contiguous:
        return 0
    page = mmap.PAGESIZE
    start = buffer.ctypes.data + 8 * max(0, int(used))
    end = buffer.ctypes.data + buffer.nbytes
    lo, hi = -(-start // page) * page, end // page * page
    if hi - lo < page or _MADVISE(lo, hi - lo, _MADV_DONTNEED) != 0:
        return 0
    return hi - lo


def touched(size: int) -> np.ndarray:
    """A new flat float64 array of ``size`` items with every page written once (its values undefined): its page
    faults taken here, e.g. on an idle thread, instead of by the first computation that writes it."""
    buffer = np.empty(int(size))
    buffer[::max(1, mmap.PAGESIZE // 8)] = 0.0
    return buffer
