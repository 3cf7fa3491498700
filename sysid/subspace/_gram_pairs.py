"""The left singular pairs of the fitting part's projection from the eigendecomposition of its Gram ``M Mᵀ``: a
cheaper decomposition for a matrix that only scores candidate orders (its models are not handed out).

For a wide ``k × nc`` matrix ``M`` the left singular vectors are the eigenvectors of ``M Mᵀ`` and the singular values
the square roots of its eigenvalues (Golub & Van Loan 2013, Matrix Computations, 4th ed., sec. 8.6.1). Forming the
``k × k`` product and one symmetric eigendecomposition (``dsyevr``, GIL released:
:func:`stimsteer.sysid._lapack_nogil.eigh_lower`) costs about a third of the QR of ``Mᵀ`` and the SVD of its ``R``
(:mod:`._left_svd`; 0.19 against 0.50 s of one thread at ``k`` = 1,000, ``nc`` = 2,450). The price is accuracy at
the bottom of the spectrum: an eigenvalue carries an absolute error of about ``ε k σ₁²``, so a singular value ``σ``
one of about ``ε k σ₁² / σ`` — rounding for the leading values the candidate orders use, but the rank test
(``SubspaceId._supported``: values above ``1e-8`` of the largest) could read noise as signal. The route is taken
only when every value is far above that cut-off (:data:`_SMALLEST`, :data:`_FLOOR`), so the supported rank is the
one the SVD gives; otherwise None and the caller takes the SVD. Leading vectors agree with the SVD's to about
``ε σ₁² / (σ_n² − σ_{n+1}²)`` (the span of the first ``n``), rounding for the orders the data support.
"""

from __future__ import annotations

import numpy as np

from .._lapack_nogil import eigh_lower, eigh_nogil_available

__all__ = ["pairs_from_gram"]

#: Smallest accepted ratio of the smallest to the largest eigenvalue of ``M Mᵀ`` (``σ_k / σ₁ >= 1e-4``): the
#: smallest singular value then carries a relative error of at most about ``ε k 1e8`` (2e-5 at ``k`` = 1,000), far
#: from the rank cut-off ``1e-8`` (chosen: four decades of margin on each side).
_SMALLEST = 1e-8
#: Smallest accepted singular value relative to ``max(σ₁, 1)`` (the rank cut-off's scale, unit-RMS channels):
#: 100 times the cut-off ``1e-8`` (chosen).
_FLOOR = 1e-6


def pairs_from_gram(mat: np.ndarray):
    """``(U, s)``: the left singular vectors (C order, ``k × k``, by descending value) and values of the wide
    ``k × nc`` matrix ``mat``, from the eigendecomposition of ``mat matᵀ``; None when a value is too small for it
    (see the module docstring) or the GIL-free ``dsyevr`` cannot be had."""
    k, nc = mat.shape
    if nc < k or k == 0 or not eigh_nogil_available():
        return None
    G = np.matmul(mat, mat.T)  # symmetric: its C order is its Fortran order
    got = eigh_lower(G, k, k)
    if got is None:
        return None
    d, V = got
    if not (d[0] >= _SMALLEST * d[-1] and np.sqrt(max(d[0], 0.0)) >= _FLOOR * max(np.sqrt(d[-1]), 1.0)):
        return None
    return np.ascontiguousarray(V[:, ::-1]), np.sqrt(d[::-1])
