"""The ``B, D`` systems' Cholesky route with the GIL released: LAPACK's ``dpotrf``, ``dpocon`` and ``dpotrs`` on
column-major matrices and their leading blocks (any leading dimension, no copy; the factor, its condition estimate
and the 1-norm are the shared calls of :mod:`stimsteer.sysid._lapack_nogil`: ``potrf_block``, ``pocon_block``,
``one_norm``).

SciPy's f2py wrappers of these routines hold the GIL for the whole call (measured: a pure-Python thread beside a
3000 × 3000 ``dpotrf`` ran at 11 % of its idle rate, beside ``dpotrs`` at 3 %, against 50-65 % beside NumPy's
``matmul``, ``svd`` and ``solve``), so the candidate orders scored on two threads took turns through their
factorisations, the largest part of their work. The same routines are called here through SciPy's exported C
functions (:func:`stimsteer.sysid._lapack_nogil.scipy_c_function`): the same numbers, bit for bit, and a leading
block is read where it lies instead of being copied first. Where SciPy's exported functions cannot be had, SciPy's
wrappers are used (the same numbers, without the overlap).
"""

from __future__ import annotations

import ctypes

import numpy as np
import scipy.linalg as sla

from .._lapack_nogil import _CHR, _DBL, _DPOCON, _DPOTRF, _INT, _refs, scipy_c_function
from .._lapack_nogil import column_major_ld as _column_major
from .._lapack_nogil import pocon_block as pocon
from .._lapack_nogil import potrf_block as potrf

__all__ = ["available", "potrf", "pocon", "potrs"]

_DPOTRS = scipy_c_function("lapack", "dpotrs", _CHR, _INT, _INT, _DBL, _INT, _DBL, _INT, _INT)


def available() -> bool:
    """Whether the calls below release the GIL (SciPy's exported functions were found)."""
    return None not in (_DPOTRF, _DPOCON, _DPOTRS)


def potrs(F: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """``(F Fᵀ)⁻¹ rhs`` for the lower factor ``F`` (a vector ``rhs``), as SciPy's ``cho_solve``."""
    ld = _column_major(F)
    if not available():  # pragma: no cover - other SciPy builds
        return sla.cho_solve((F, True), rhs, check_finite=False)
    b = np.array(rhs, dtype=np.float64, order="F", copy=True)
    info = ctypes.c_int(0)
    n, nrhs, lda, ldb = _refs(F.shape[0], 1 if b.ndim == 1 else b.shape[1], ld, max(1, F.shape[0]))
    _DPOTRS(b"L", n, nrhs, F.ctypes.data_as(_DBL), lda, b.ctypes.data_as(_DBL), ldb, ctypes.byref(info))
    if info.value != 0:  # pragma: no cover - only for invalid arguments
        raise ValueError(f"LAPACK dpotrs failed (info={info.value})")
    return b
