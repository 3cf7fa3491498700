"""The factor route of subspace identification: the projections of one (scaled) Hankel Gram from a single Cholesky
factor of it, for Grams of many rows.

With the Gram's rows in the block order ``[Uf₁; u₀; P; y₀; Yf₁]`` (:meth:`~.gram._Layout.factor_order`;
``Uf = [Uf₁; u₀]``, ``Yf = [y₀; Yf₁]``) and ``S = L Lᵀ`` (``L`` lower triangular, blocks ``L_ab``), the columns of a
Hankel matrix with this Gram are ``z = L e`` for white ``e``. Every covariance the projections need is then a
product of contiguous blocks of ``L`` — the LQ route of Van Overschee & De Moor (1996, Subspace Identification for
Linear Systems, Kluwer, sec. 4.3), with the Cholesky factor of the Gram in place of the ``L`` of an LQ of the data:

- ``Σ_{Wp Wp|Uf} = L_PP L_PPᵀ`` and ``Σ_{Yf Wp|Uf} = L_YP L_PPᵀ``, so ``Θ = L_YP L_PP⁻¹`` and the MOESP matrix is
  ``L_YP``; the N4SID matrix ``Θ Σ_{WpWp}^{1/2}`` is ``Θ [L_PU L_PP] = [L_YP V, L_YP]`` with ``V = L_PP⁻¹ L_PU``
  (any square root of ``Σ_{WpWp}`` gives the same left singular vectors and values);
- one step later the past ``P₁ = [u₀; P; y₀]`` given ``Uf₁`` is again a contiguous block:
  ``Θ₊ = L_{Yf₁P₁} L_{P₁P₁}⁻¹``;
- given the past: ``Σ_{UfUf|Wp} = L_UU (I + VᵀV)⁻¹ L_UUᵀ`` and ``Σ_{YfUf|Wp} = (L_YU − L_YP V)(I + VᵀV)⁻¹ L_UUᵀ``
  (``e_U`` given ``Wp = L_PP (V e_U + e_P)`` has covariance ``(I + VᵀV)⁻¹``);
- a linear map ``M`` of the column has ``M S Mᵀ = (M L)(M L)ᵀ``, and ``Θ Wp`` in factor coordinates is
  ``[L_YP V, L_YP, 0]``: the residual covariances of every candidate order are products of ``n``-row matrices.

One Cholesky factorisation of the whole Gram and two triangular solves with ``m f`` right-hand sides replace the
three factorisations and four solves with ``p f`` right-hand sides of the covariance route
(:class:`~.projection._Projection`). The route is taken only when the Gram's estimated condition number is below
``_CHOLESKY_CONDITION`` (then every block and Schur complement is at least as well conditioned, the covariance
route inverts them exactly too, and the two agree to rounding, about ``κ ε``); otherwise the covariance route,
with its eigenvalue cut-off, is used.
"""

from __future__ import annotations

import threading

import numpy as np
import scipy.linalg as sla

from .._lapack_nogil import one_norm
from ._gil_free import pocon, potrf
from .._pages import release_tail
from ._gram_pairs import pairs_from_gram
from ._left_svd import left_singular_pairs, work_size
from .gram import _Layout
from .nested import NestedOrders
from .projection import _CHOLESKY_CONDITION, _psd_parts


#: Leading singular pairs of a scoring projection (the fitting part's) taken at first
#: (:meth:`_FactorProjection.decompose`): enough for orders up to 32 (the default cap of 10 grown once reads 40
#: columns); more are taken when a larger order is asked. Measured: 0.06 s of one thread at 1,000 rows, against
#: 0.14 s for all of them.
SCORING_PAIRS = 64


def _zero_upper(S: np.ndarray, band: int = 512) -> None:
    """Zero the strict upper triangle of the square ``S``, a band of rows at a time."""
    n = S.shape[0]
    for a in range(0, n, band):
        b = min(n, a + band)
        S[a:b, b:] = 0.0
        S[a:b, a:b][np.triu_indices(b - a, 1)] = 0.0


def cholesky_in_place(S: np.ndarray) -> bool:
    """Overwrite the C-ordered symmetric ``S`` with its lower Cholesky factor (upper triangle zeroed); True when it
    exists and its estimated 1-norm condition number is below ``_CHOLESKY_CONDITION`` (``pocon``; Golub & Van Loan
    2013, Matrix Computations, 4th ed., sec. 3.5.4). On False, ``S`` holds no usable numbers.

    LAPACK's ``dpotrf("U")`` and ``dpocon("U")`` on ``Sᵀ`` (the same memory in Fortran order; its upper factor is
    our lower one) with the GIL released (:mod:`._gil_free`): the numbers of SciPy's ``potrf(lower=0, clean=1)`` and
    ``pocon(uplo="U")``, bit for bit, while the other projection's decomposition runs on its thread."""
    anorm = one_norm(S)
    F = S.T  # the same memory in Fortran order: LAPACK's upper factor of Sᵀ = S is our lower one
    if potrf(F, uplo="U") != 0:
        return False
    _zero_upper(S)  # SciPy's clean=1
    return pocon(F, anorm, uplo="U") > 1.0 / _CHOLESKY_CONDITION


class _Blocks:
    """Slices of the factor order (:meth:`_Layout.factor_order`)."""

    def __init__(self, L: _Layout):
        m, p = L.m, L.p
        self.a = m * (L.f - 1)  # end of Uf₁
        self.b = self.a + m  # end of Uf = [Uf₁; u₀]
        self.e = self.b + len(L.P)  # end of the past
        self.g = self.e + p  # end of y₀
        # Uf in the layout's (time-major) order [u₀; Uf₁] from its place [Uf₁; u₀] in the factor order
        self.uf = np.concatenate([np.arange(self.a, self.b), np.arange(self.a)])


def _solve_lower(Lf: np.ndarray, r0: int, r1: int, B: np.ndarray, band: int = 512) -> np.ndarray:
    """``X = T⁻¹ B`` for the lower-triangular diagonal block ``T = Lf[r0:r1, r0:r1]``, by block forward
    substitution on views of ``Lf`` (a solver handed the block itself would copy it: 42 MB at 2,300 rows)."""
    X = np.empty_like(B)
    for a in range(0, r1 - r0, band):
        b = min(r1 - r0, a + band)
        rhs = B[a:b] - Lf[r0 + a:r0 + b, r0:r0 + a] @ X[:a] if a else B[a:b].copy()
        X[a:b] = sla.solve_triangular(Lf[r0 + a:r0 + b, r0 + a:r0 + b], rhs, lower=True, check_finite=False)
    return X


class _FactorProjection:
    """The projection of :class:`~.projection._Projection` (same attributes and methods used by
    :func:`~.projection._fit_order`) from the Cholesky factor ``Lf`` of a Gram in the factor order.

    Only ``n``-independent pieces of ``Lf`` are kept (about ``2 p f × (m f + p i)`` numbers), so the factor itself
    can be freed after construction; :meth:`decompose` then takes the SVD.
    """

    #: every candidate order by the nested orders, the structured sums and the doubling Riccati solver
    exact = False

    def __init__(self, Lf: np.ndarray, S_uu, S_yu, S_yy, layout: _Layout, weighting: str):
        L, k = layout, _Blocks(layout)
        a, b, e, g = k.a, k.b, k.e, k.g
        self.layout = L
        L_uu, L_yp = Lf[:b, :b], Lf[e:, b:e]
        V = _solve_lower(Lf, b, e, Lf[b:e, :b])
        theta = np.zeros((L.nz - e, g))  # Θ Wp in factor coordinates (columns Uf, P, y₀)
        np.matmul(L_yp, V, out=theta[:, :b])
        theta[:, b:e] = L_yp
        V1 = _solve_lower(Lf, a, g, Lf[a:g, :a])
        theta1 = np.empty((L.nz - g, g))  # Θ₊ Wp₊ in factor coordinates (columns Uf₁, P₁)
        np.matmul(Lf[g:, a:g], V1, out=theta1[:, :a])
        theta1[:, a:] = Lf[g:, a:g]
        del V1
        self.theta_rows, self.theta_next_rows = theta, theta1
        self.u0_rows, self.y0_rows = Lf[a:b, :g].copy(), Lf[e:g, :g].copy()
        # the covariances given the past (for B, D), in the layout's order of Uf
        Wi = np.linalg.inv(np.eye(b) + V.T @ V)
        Sc_uu = L_uu @ Wi @ L_uu.T
        Sc_yu = (Lf[e:, :b] - theta[:, :b]) @ Wi @ L_uu.T  # theta[:, :b] = L_YP V, computed above
        self.given_past = (Sc_uu[np.ix_(k.uf, k.uf)], Sc_yu[:, k.uf])
        self.future_cov = (S_uu, S_yu)
        self._weighting = (weighting, S_yy, Lf[e:, :b].copy() if weighting == "cva" else None)

    def decompose(self, work: np.ndarray | None = None, keep: int | None = None, scoring: bool = False) -> None:
        """The SVD of the weighted projection (``singular_values``, ``U``, ``w_inv``); needs no part of the factor,
        so the factor can be freed before it, or its memory handed over as ``work`` (a flat float64 array the
        decomposition computes in, overwritten; :func:`._left_svd.left_singular_pairs`: the same numbers). Given
        ``keep``, the pages of ``work`` beyond its first ``keep`` items and beyond what the decomposition uses are
        handed back to the system first (:func:`.._pages.release_tail`). ``scoring`` (a projection whose orders only
        score: the fitting part's): its ``SCORING_PAIRS`` leading pairs (more when a larger order asks:
        :meth:`_enough`) from the eigendecomposition of the matrix's Gram where its smallest singular value allows
        (:func:`._gram_pairs.pairs_from_gram`: the same to rounding, a quarter of the work), else as above."""
        weighting, S_yy, L_yu = self._weighting
        b, e = self.layout.m * self.layout.f, self.layout.m * self.layout.f + len(self.layout.P)
        mat = self.theta_rows[:, :e] if weighting == "n4sid" else self.theta_rows[:, b:e]  # N4SID, else L_YP
        w_inv = None
        if weighting == "cva":  # Σ_{YfYf|Uf} = S_YY − L_YU L_YUᵀ
            H, om = _psd_parts(S_yy - L_yu @ L_yu.T)
            mat = ((H / np.sqrt(om)) @ H.T) @ mat
            w_inv = (H * np.sqrt(om)) @ H.T
        self._weighting = None
        wide = mat.shape[1] > mat.shape[0]
        if keep is not None and work is not None:
            release_tail(work, max(keep, work_size(*mat.shape) if wide else 0))
        self.w_inv = w_inv
        self._lock = threading.Lock()
        self._take_pairs(mat, SCORING_PAIRS if wide and scoring else None, work)

    def _take_pairs(self, mat: np.ndarray, count: int | None, work=None) -> None:
        """``U``, ``singular_values`` and the nested orders: the ``count`` leading pairs from the Gram of ``mat``
        (:func:`._gram_pairs.pairs_from_gram`; the values beyond them replaced by its lower bound, which is all the
        rank test reads of them), or, with ``count`` None or that route refused, every pair by the SVD."""
        got = None if count is None else pairs_from_gram(mat, count)
        fill = 0.0
        if got is not None:
            U, sv, fill = got
        elif mat.shape[1] > mat.shape[0]:  # the left singular pairs of mat = Rᵀ Qᵀ are those of Rᵀ (square)
            U, sv = left_singular_pairs(mat, work)
        else:
            U, sv, _ = np.linalg.svd(mat, full_matrices=False)
        self._mat = None if got is None else mat  # (the scoring route: more pairs may be asked for)
        k = len(self.layout.Yf)
        self.singular_values = np.concatenate([sv, np.full(max(0, k - sv.size), fill)])[:k]
        self.U = U
        self._nested = None if self.w_inv is not None else NestedOrders(
            U, self.singular_values, self.layout.p, lambda: (self.theta_rows, self.theta_next_rows))

    def _enough(self, n: int) -> None:
        """On the scoring route, more leading pairs once order ``n`` needs more than are held (the nested orders
        read twice the order's columns of ``U``): asked for first by the largest order of a round
        (:func:`~.selection.score_orders`), before its threads start."""
        if self._mat is not None and self.U.shape[1] < min(2 * n, self.U.shape[0]):
            with self._lock:
                if self.U.shape[1] < min(2 * n, self.U.shape[0]):
                    self._take_pairs(self._mat, max(4 * n, SCORING_PAIRS))

    def gamma(self, n: int) -> np.ndarray:
        """Extended observability matrix for order ``n``, shape (p f, n)."""
        self._enough(n)
        G = self.U[:, :n] * np.sqrt(self.singular_values[:n])
        return G if self.w_inv is None else self.w_inv @ G

    def nested(self, n: int):
        """``(A, X0, X1)`` of order ``n`` from one factorisation shared by every order (:mod:`.nested`), or None
        (CVA weighting, or ``Γ₋`` of order ``n`` near rank deficiency: then the pseudo-inverses of before)."""
        self._enough(n)
        return None if self._nested is None else self._nested(n)

    def forget_orders(self) -> None:
        """Drop what scoring candidate orders left behind (the nested orders' QR, sized by the largest order asked,
        and on the scoring route the pairs added for large orders): orders scored again then give the numbers of a
        first scoring."""
        if self._mat is not None and self.U.shape[1] != min(SCORING_PAIRS, self.U.shape[0]):
            self._take_pairs(self._mat, SCORING_PAIRS)
        elif self._nested is not None:
            self._nested = NestedOrders(self.U, self.singular_values, self.layout.p,
                                        lambda: (self.theta_rows, self.theta_next_rows))

    def residual_covariances(self, gamma, A, B, C, D, states=None):
        """``Q, R, S`` of the state- and output-equation residuals (as :func:`~.projection._noise`); ``states``: the
        state maps ``(X0, X1)`` of :meth:`nested` when known."""
        if states is None:
            states = (np.linalg.pinv(gamma) @ self.theta_rows,
                      np.linalg.pinv(gamma[:-self.layout.p]) @ self.theta_next_rows)
        X0, X1 = states
        W = X1 - A @ X0 - B @ self.u0_rows
        V = self.y0_rows - C @ X0 - D @ self.u0_rows
        Q, R = W @ W.T, V @ V.T
        return 0.5 * (Q + Q.T), 0.5 * (R + R.T), W @ V.T


def factor_projection(S: np.ndarray, layout: _Layout, weighting: str):
    """The :class:`_FactorProjection` of the Gram ``S`` (factor order, scaled), or None when it is too ill
    conditioned for the factor route. ``S`` is overwritten (by its factor)."""
    k = _Blocks(layout)
    S_uu = S[np.ix_(k.uf, k.uf)]
    S_yu = S[k.e:, k.uf]
    S_yy = S[k.e:, k.e:].copy() if weighting == "cva" else None
    if not cholesky_in_place(S):
        return None
    return _FactorProjection(S, S_uu, S_yu, S_yy, layout, weighting)
