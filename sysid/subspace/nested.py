"""Nested candidate orders: the shift-invariance ``A`` and the state maps of every order as leading blocks of one
QR, shared by the projections of both routes (:mod:`.projection`, :mod:`.factor`).

With ``Γ = U_n S_n^{1/2}`` (``U`` orthonormal, unweighted: N4SID and MOESP) and ``U₋ = Q R`` (``U`` without its last
block row): ``Γ⁺ = S_n^{-1/2} U_nᵀ`` and ``Γ₋⁺ = S_n^{-1/2} R_n⁻¹ Q_nᵀ``, so ``A = Γ₋⁺ Γ₊`` and the state maps
``X0 = Γ⁺ Θ``, ``X1 = Γ₋⁺ Θ₊`` of order ``n`` are leading blocks of products taken once (the leading blocks of a
QR do not depend on the columns after them). Equal to the pseudo-inverse estimates to rounding where ``R_n`` is
well conditioned; elsewhere the caller takes the pseudo-inverses (Van Overschee & De Moor 1996, Subspace
Identification for Linear Systems, Kluwer, sec. 4.3, for the estimates).
"""

from __future__ import annotations

import threading

import numpy as np
import scipy.linalg as sla

#: Smallest reciprocal condition number (1-norm estimate) of ``R_n``; below it the pseudo-inverses of before (with
#: their cut-off) are used (common practice, no source).
_NESTED_RCOND = 1e-8


class NestedOrders:
    """``(A, X0, X1)`` of each order from one QR of the leading columns of ``U`` (see the module docstring).

    ``rows()`` returns ``(Θ, Θ₊)``: the maps of the projection and of the one a step later in the projection's own
    column coordinates (asked for at the first order only).
    """

    def __init__(self, U: np.ndarray, singular_values: np.ndarray, p: int, rows):
        self.U, self.sv, self.p, self.rows = U, singular_values, p, rows
        self._cache = None
        self._lock = threading.Lock()  # candidate orders may be fitted on several threads

    def _shifted(self, n: int):
        """``R`` of ``U₋ = Q R`` and ``Uᵀ Θ``, ``Qᵀ Θ₊``, ``Qᵀ U₊``, for the leading columns of ``U``. Kept for twice the
        orders asked, so memory follows the candidate orders, not the ``p f`` columns of ``U``."""
        with self._lock:
            if self._cache is None or self._cache[0] < min(n, self.U.shape[1]):
                k = min(self.U.shape[1], max(2 * n, 16))
                U = self.U[:, :k]
                theta, theta_next = self.rows()
                Q, R = np.linalg.qr(U[:-self.p])
                self._cache = (k, R, U.T @ theta, Q.T @ theta_next, Q.T @ U[self.p:])
            return self._cache[1:]

    def __call__(self, n: int):
        """``(A, X0, X1)`` of order ``n``, or None when ``R_n`` is near rank deficiency."""
        R, ut_theta, qt_next, qt_up = self._shifted(n)
        Rn = R[:n, :n]
        rcond, info = sla.lapack.dtrcon(Rn, norm="1", uplo="U")
        if info != 0 or not rcond > _NESTED_RCOND:
            return None
        root = np.sqrt(self.sv[:n])
        A = sla.solve_triangular(Rn, qt_up[:n, :n], check_finite=False) * (root[None, :] / root[:, None])
        X1 = sla.solve_triangular(Rn, qt_next[:n], check_finite=False) / root[:, None]
        return A, ut_theta[:n] / root[:, None], X1
