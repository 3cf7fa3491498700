"""Pages of large arrays: made resident before the work that writes them, handed back when a buffer's tail or the
heap's freed blocks are no longer needed. One libc for both (Linux; elsewhere, or without libc, nothing is handed
back and arrays are touched by NumPy alone).

- A fresh array of tens of MB costs page faults at its first write (measured at past 100 / horizon 50, in a new
  process: 0.09–0.17 s for 95 MB, against 0.01 s for a buffer already touched); where a core would otherwise wait,
  :func:`touched` takes them off the work that follows.
- :func:`release_tail` (``madvise(MADV_DONTNEED)``): a Gram-sized buffer reused for a smaller computation (an SVD's
  workspace, the held-out Gram's rows) does not keep its whole size resident, so a subspace fit at 3,450 Hankel rows
  stays under its 500 MB budget while its buffers save their first-touch page faults.
- :func:`release_freed_memory` (glibc ``malloc_trim``): arrays of 128 kB … 32 MB (a Gram's row blocks, ``pN × n_b``
  products) live on the heap once glibc has raised its mapping threshold, and the heap keeps their pages after they
  are freed: measured at past 100 / horizon 50, 50 MB of the least-squares fit's peak resident memory were such
  pages.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import mmap
import sys

import numpy as np

__all__ = ["release_freed_memory", "release_tail", "touched"]

_MADV_DONTNEED = 4  # Linux <sys/mman.h>


def _libc():
    if not sys.platform.startswith("linux"):  # pragma: no cover - other systems
        return None
    # glibc's soname first: ctypes.util.find_library runs `ldconfig -p` in a child process (about 10 ms at every
    # import, and a child a test waiting for the command's own workers could take for them)
    for name in ("libc.so.6", None):
        try:
            return ctypes.CDLL(name or ctypes.util.find_library("c"), use_errno=True)
        except (OSError, TypeError):  # pragma: no cover - another C library, or none
            continue
    return None  # pragma: no cover


def _function(libc, name: str, argtypes, restype):
    fn = getattr(libc, name, None) if libc is not None else None
    if fn is not None:
        fn.argtypes, fn.restype = argtypes, restype
    return fn


_LIBC = _libc()
_MADVISE = _function(_LIBC, "madvise", [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int], ctypes.c_int)
_MALLOC_TRIM = _function(_LIBC, "malloc_trim", [ctypes.c_size_t], ctypes.c_int)


def touched(size: int) -> np.ndarray:
    """A new flat float64 array of ``size`` items with every page written once (its values undefined): its page
    faults taken here, e.g. on an idle thread, by one strided NumPy assignment (which releases the GIL), instead of
    by the first computation that writes it."""
    buffer = np.empty(int(size))
    buffer[::max(1, mmap.PAGESIZE // 8)] = 0.0
    return buffer


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


def release_freed_memory() -> None:
    """Hand the heap's freed pages back to the operating system (glibc ``malloc_trim``; nothing elsewhere)."""
    if _MALLOC_TRIM is not None:
        _MALLOC_TRIM(0)
