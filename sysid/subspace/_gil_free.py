"""The ``B, D`` systems' Cholesky route with the GIL released: LAPACK's ``dpotrf``, ``dpocon`` and ``dpotrs`` on
column-major matrices and their leading blocks (any leading dimension, no copy; their 1-norm: the shared
:func:`stimsteer.sysid._lapack_nogil.one_norm`).

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

from .._lapack_nogil import _DPOCON, _DPOTRF, scipy_c_function

__all__ = ["available", "potrf", "pocon", "potrs"]

_INT = ctypes.POINTER(ctypes.c_int)
_DBL = ctypes.POINTER(ctypes.c_double)
_CHR = ctypes.c_char_p

_DPOTRS = scipy_c_function("lapack", "dpotrs", _CHR, _INT, _INT, _DBL, _INT, _DBL, _INT, _INT)


def available() -> bool:
    """Whether the calls below release the GIL (SciPy's exported functions were found)."""
    return None not in (_DPOTRF, _DPOCON, _DPOTRS)


def _column_major(A: np.ndarray) -> int:
    """The leading dimension of the column-major float64 matrix ``A`` (a Fortran array or a block of one)."""
    if A.dtype != np.float64 or A.ndim != 2 or A.strides[0] != 8 or A.strides[1] < 8 * max(1, A.shape[0]):
        raise ValueError("a column-major float64 matrix (a Fortran array or a block of one) is needed")
    return A.strides[1] // 8


def _ints(*values):
    return [ctypes.byref(ctypes.c_int(int(v))) for v in values]


def potrf(A: np.ndarray, uplo: str = "L") -> int:
    """The Cholesky factor of the square column-major ``A`` in its lower (``uplo="L"``: ``A = F Fᵀ``) or upper
    (``"U"``: ``A = Fᵀ F``) triangle, in place (the other triangle kept); LAPACK's ``info`` (0: done)."""
    ld = _column_major(A)
    if not available():  # pragma: no cover - other SciPy builds
        _c, info = sla.lapack.dpotrf(A, lower=int(uplo == "L"), clean=0, overwrite_a=1)
        return int(info)
    info = ctypes.c_int(0)
    n, lda = _ints(A.shape[0], ld)
    _DPOTRF(uplo.encode(), n, A.ctypes.data_as(_DBL), lda, ctypes.byref(info))
    return int(info.value)


def pocon(F: np.ndarray, norm: float, uplo: str = "L") -> float:
    """The reciprocal 1-norm condition estimate of ``F Fᵀ`` from its lower factor ``F`` (``uplo="U"``: of ``Fᵀ F``
    from its upper factor; ``norm`` its 1-norm); 0 on a LAPACK error."""
    ld = _column_major(F)
    if not available():  # pragma: no cover - other SciPy builds
        rcond, info = sla.lapack.dpocon(F, norm, uplo=uplo)
        return float(rcond) if info == 0 else 0.0
    n_ = F.shape[0]
    rcond, info = ctypes.c_double(0.0), ctypes.c_int(0)
    work, iwork = np.empty(3 * max(n_, 1)), np.empty(max(n_, 1), dtype=np.intc)
    n, lda = _ints(n_, ld)
    _DPOCON(uplo.encode(), n, F.ctypes.data_as(_DBL), lda, ctypes.byref(ctypes.c_double(norm)), ctypes.byref(rcond),
            work.ctypes.data_as(_DBL), iwork.ctypes.data_as(_INT), ctypes.byref(info))
    return float(rcond.value) if info.value == 0 else 0.0


def potrs(F: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """``(F Fᵀ)⁻¹ rhs`` for the lower factor ``F`` (a vector ``rhs``), as SciPy's ``cho_solve``."""
    ld = _column_major(F)
    if not available():  # pragma: no cover - other SciPy builds
        return sla.cho_solve((F, True), rhs, check_finite=False)
    b = np.array(rhs, dtype=np.float64, order="F", copy=True)
    info = ctypes.c_int(0)
    n, nrhs, lda, ldb = _ints(F.shape[0], 1 if b.ndim == 1 else b.shape[1], ld, max(1, F.shape[0]))
    _DPOTRS(b"L", n, nrhs, F.ctypes.data_as(_DBL), lda, b.ctypes.data_as(_DBL), ldb, ctypes.byref(info))
    if info.value != 0:  # pragma: no cover - only for invalid arguments
        raise ValueError(f"LAPACK dpotrs failed (info={info.value})")
    return b
