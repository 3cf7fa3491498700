"""The leading left singular pairs of the fitting part's projection from the eigendecomposition of its Gram
``M Mᵀ``: a cheaper decomposition for a matrix that only scores candidate orders (its models are not handed out).

For a wide ``k × nc`` matrix ``M`` the left singular vectors are the eigenvectors of ``M Mᵀ`` and the singular values
the square roots of its eigenvalues (Golub & Van Loan 2013, Matrix Computations, 4th ed., sec. 8.6.1). Forming the
``k × k`` product and the leading ``count`` eigenpairs of it (``dsyevr`` for an index range, the GIL released) costs
a quarter of the QR of ``Mᵀ`` and the SVD of its ``R`` (:mod:`._left_svd`; one thread, ``k`` = 1,000,
``nc`` = 2,450: 0.05 s for the product, 0.06 s for 64 pairs, against 0.14 s for all of them and 0.50 s for the QR
and the SVD). The price is accuracy at the bottom of the spectrum: an eigenvalue carries an absolute error of about
``ε k σ₁²``, so the route is taken only when every singular value is far above the rank cut-off of
``SubspaceId._supported`` (``1e-8`` of ``max(σ₁, 1)``), shown by a Cholesky factor of ``M Mᵀ − τ I`` (it exists
only when every eigenvalue exceeds ``τ``; Golub & Van Loan sec. 4.2); the supported rank is then the one the SVD
gives (all of them). Otherwise None, and the caller takes the SVD. Leading vectors agree with the SVD's to about
``ε σ₁² / (σ_n² − σ_{n+1}²)`` (the span of the first ``n``), rounding for the orders the data support.
"""

from __future__ import annotations

import ctypes

import numpy as np

from .._lapack_nogil import _DBL, _INT, scipy_c_function
from ._gil_free import potrf

__all__ = ["pairs_from_gram"]

#: Smallest accepted ratio of the smallest to the largest eigenvalue of ``M Mᵀ`` (``σ_k / σ₁ >= 1e-4``), far from
#: the rank cut-off ``1e-8`` (chosen: four decades of margin).
_SMALLEST = 1e-8
#: Smallest accepted singular value relative to ``max(σ₁, 1)`` (the rank cut-off's scale, unit-RMS channels):
#: 100 times the cut-off ``1e-8`` (chosen).
_FLOOR = 1e-6

_CHR = ctypes.c_char_p
# jobz, range, uplo, n, a, lda, vl, vu, il, iu, abstol, m, w, z, ldz, isuppz, work, lwork, iwork, liwork, info
_DSYEVR = scipy_c_function("lapack", "dsyevr", _CHR, _CHR, _CHR, _INT, _DBL, _INT, _DBL, _DBL, _INT, _INT, _DBL,
                           _INT, _DBL, _DBL, _INT, _INT, _DBL, _INT, _INT, _INT, _INT)


def _i(v: int):
    return ctypes.byref(ctypes.c_int(int(v)))


def _leading_eigenpairs(G: np.ndarray, count: int):
    """``(values, vectors)`` (ascending; vectors ``k × count`` in Fortran order) of the ``count`` largest eigenvalues
    of the symmetric ``G`` (C order; destroyed), or None on a LAPACK failure."""
    k = G.shape[0]
    w, Z = np.empty(k), np.empty((count, k))  # Z: Fortran k × count (its transpose in C order)
    isuppz, iwork = np.empty(2 * max(count, 1), dtype=np.intc), np.empty(10 * max(k, 1), dtype=np.intc)
    work = np.empty(64 * max(k, 1))  # >= 26 k, LAPACK's minimum; room for its blocked tridiagonal reduction
    found, info, zero = ctypes.c_int(0), ctypes.c_int(0), ctypes.c_double(0.0)
    _DSYEVR(b"V", b"I", b"L", _i(k), G.ctypes.data_as(_DBL), _i(k), ctypes.byref(zero), ctypes.byref(zero),
            _i(k - count + 1), _i(k), ctypes.byref(zero), ctypes.byref(found), w.ctypes.data_as(_DBL),
            Z.ctypes.data_as(_DBL), _i(k), isuppz.ctypes.data_as(_INT), work.ctypes.data_as(_DBL), _i(work.size),
            iwork.ctypes.data_as(_INT), _i(iwork.size), ctypes.byref(info))
    return (w[:count], Z.T) if info.value == 0 and found.value == count else None


def pairs_from_gram(mat: np.ndarray, count: int):
    """``(U, s, floor)`` of the wide ``k × nc`` matrix ``mat``: its ``min(count, k)`` leading left singular vectors
    (C order, ``k × count``, by descending value) and values, from the eigendecomposition of ``mat matᵀ``, and a
    lower bound ``floor`` of every singular value (above the rank cut-off: see the module docstring); None when a
    value may be too small for the route, or SciPy's exported ``dsyevr`` cannot be had."""
    k, nc = mat.shape
    count = min(int(count), k)
    if nc < k or count < 1 or _DSYEVR is None:
        return None
    G = np.matmul(mat, mat.T)  # symmetric: its C order is its Fortran order
    top = float(np.linalg.norm(G))  # >= the largest eigenvalue
    tau = max(_SMALLEST * top, _FLOOR ** 2 * max(top, 1.0))
    shifted = G.copy()
    shifted.flat[::k + 1] -= tau
    if potrf(shifted.T) != 0:  # an eigenvalue at or below tau
        return None
    del shifted
    got = _leading_eigenpairs(G, count)
    if got is None:
        return None
    d, V = got
    return np.ascontiguousarray(V[:, ::-1]), np.sqrt(np.maximum(d[::-1], 0.0)), float(np.sqrt(tau))
