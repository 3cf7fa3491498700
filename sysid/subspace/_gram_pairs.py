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

import numpy as np

from .._lapack_nogil import _DSYEVR, eigh_lower
from ._gil_free import potrf

__all__ = ["pairs_from_gram"]

#: Smallest accepted ratio of the smallest to the largest eigenvalue of ``M Mᵀ`` (``σ_k / σ₁ >= 1e-4``), far from
#: the rank cut-off ``1e-8`` (chosen: four decades of margin).
_SMALLEST = 1e-8
#: Smallest accepted singular value relative to ``max(σ₁, 1)`` (the rank cut-off's scale, unit-RMS channels):
#: 100 times the cut-off ``1e-8`` (chosen).
_FLOOR = 1e-6


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
    got = eigh_lower(G, k, k, count)  # G symmetric: its C order is its Fortran order
    if got is None:
        return None
    d, V = got
    return np.ascontiguousarray(V[:, ::-1]), np.sqrt(np.maximum(d[::-1], 0.0)), float(np.sqrt(tau))
