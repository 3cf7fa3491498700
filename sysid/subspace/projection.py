"""The linear algebra of subspace identification on Gram blocks: conditional covariances, the weighted projection,
and the estimates of ``A, C``, ``B, D``, the noise covariances and the innovation form for one order.
"""

from __future__ import annotations

import functools
import warnings

import numpy as np
import scipy.linalg as sla

from ..exceptions import ExcitationError, StimsteerWarning
from ..statespace import kalman_gain
from .gram import _Layout
from .markov import _shift_weights, normal_equations, normal_equations_gemm, pattern_blocks
from .._lapack_nogil import one_norm
from ._gil_free import pocon, potrf, potrs
from .nested import NestedOrders
from .riccati import conditioned_cholesky, doubling_gain


# Relative cut-off for eigenvalues of (scaled, unit-RMS) covariance matrices treated as zero. Noise-free data make
# several conditional covariances exactly singular; their rounding-level eigenvalues (~1e-15) must not be inverted.
_RTOL = 1e-10
# Below this (relative to the unit output power of the scaled data) the residual covariances count as zero.
_NOISE_FREE = 1e-12


# ----------------------------------------------------------------------------------------------------- linear algebra
def _psd_parts(M: np.ndarray):
    """Eigenvectors and eigenvalues of a symmetric PSD matrix above the relative cut-off ``_RTOL``."""
    lam, V = np.linalg.eigh(0.5 * (M + M.T))
    keep = lam > _RTOL * max(float(lam[-1]), np.finfo(float).tiny)
    return V[:, keep], lam[keep]


def _cond_text(lam: np.ndarray) -> str:
    """Condition number of a symmetric PSD matrix from its ascending eigenvalues, as text ("inf" if singular)."""
    return f"{lam[-1] / lam[0]:.2e}" if lam[0] > 0 and lam[-1] / lam[0] < 1e300 else "inf"


def _pinv_psd(M: np.ndarray) -> np.ndarray:
    V, lam = _psd_parts(M)
    return (V / lam) @ V.T


#: From this many rows on, a well-conditioned covariance is factored by Cholesky instead of an eigendecomposition
#: (about 20x cheaper at 2,000 rows); smaller ones keep the eigen route (bit-for-bit the results of before).
_CHOLESKY_FROM = 512
#: Largest estimated 1-norm condition number for the Cholesky route: below it every eigenvalue is far above the
#: eigen route's cut-off ``_RTOL`` (κ₂ <= κ₁), so both give the same inverse up to rounding (common practice, no
#: source: two decades of margin for the estimate).
_CHOLESKY_CONDITION = 1e8


class _PsdInverse:
    """``M⁺`` of a symmetric PSD covariance, by Cholesky where it is large and well-conditioned, else by the
    eigendecomposition with the relative cut-off ``_RTOL`` (Golub & Van Loan 2013, Matrix Computations, 4th ed.,
    sec. 4.2 and 3.5.4: a Cholesky solve is backward stable; ``pocon`` estimates the condition number)."""

    def __init__(self, M: np.ndarray):
        M = 0.5 * (M + M.T)
        self.L = None
        if M.shape[0] >= _CHOLESKY_FROM:
            try:
                L = sla.cholesky(M, lower=True, check_finite=False)
                pocon, = sla.get_lapack_funcs(("pocon",), (L,))
                rcond, info = pocon(L, float(np.abs(M).sum(axis=0).max()), uplo="L")
                if info == 0 and rcond > 1.0 / _CHOLESKY_CONDITION:
                    self.L = L
            except np.linalg.LinAlgError:
                pass
        if self.L is None:
            self.V, self.lam = _psd_parts(M)
            self.pinv = (self.V / self.lam) @ self.V.T

    def times(self, X: np.ndarray) -> np.ndarray:
        """``X M⁺`` (on the eigen route the product with the explicit pseudo-inverse, as before)."""
        if self.L is not None:
            return sla.cho_solve((self.L, True), X.T, check_finite=False).T
        return X @ self.pinv

    def root(self) -> np.ndarray:
        """A factor ``F`` with ``F Fᵀ = M`` (on the retained eigen-directions)."""
        return self.L if self.L is not None else self.V * np.sqrt(self.lam)

    def times_inverse_root(self, X: np.ndarray) -> np.ndarray:
        """``X F⁻ᵀ`` for the factor ``F`` of :meth:`root` (``(X F⁻ᵀ)(X F⁻ᵀ)ᵀ = X M⁺ Xᵀ``)."""
        if self.L is not None:
            return sla.solve_triangular(self.L, X.T, lower=True, check_finite=False).T
        return X @ (self.V / np.sqrt(self.lam))


def _conditional(S: np.ndarray, a, b, given, inverse: _PsdInverse | None = None) -> np.ndarray:
    """``S_ab − S_a,g S_gg⁺ S_g,b``: the covariance of the parts of ``a`` and ``b`` not explained by ``given``."""
    inv = _PsdInverse(S[np.ix_(given, given)]) if inverse is None else inverse
    return S[np.ix_(a, b)] - inv.times(S[np.ix_(a, given)]) @ S[np.ix_(given, b)]


class _Projection:
    """Oblique projection, weighting and SVD of one (scaled) Hankel covariance; shared by every candidate order.

    Notes
    -----
    With ``Σ_{·|U}`` the covariances conditioned on the future inputs ``Uf`` and ``Wp = [Up; Yp]`` the past, the
    oblique projection of ``Yf`` along ``Uf`` onto ``Wp`` is ``O = Θ Wp`` with ``Θ = Σ_{YfWp|U} Σ_{WpWp|U}⁺``
    (Van Overschee & De Moor 1996, Theorem 2). The weighted matrix whose SVD gives the observability matrix is

    - N4SID: ``O`` itself (W1 = I, W2 = I), i.e. ``Θ Σ_{WpWp}^{1/2}``;
    - MOESP: ``O Π_{Uf⊥}`` (W2 = Π_{Uf⊥}), i.e. ``Σ_{YfWp|U} Σ_{WpWp|U}^{−1/2}`` (the ``L32`` of the LQ);
    - CVA:   ``Σ_{YfYf|U}^{−1/2} O Π_{Uf⊥}``; its singular values are canonical correlations.

    ``Γ = W1⁻¹ U₁ S₁^{1/2}`` for the leading ``n`` singular triplets.

    ``exact=True`` (the projection of all training data, whose fits are the models handed out) keeps the
    computations of before bit for bit: ``A`` and the state maps by pseudo-inverses, the dense basis of ``B, D``, the
    QZ Riccati route. Otherwise (the fitting part's candidate orders, which only score) the nested orders, the
    structured sums and the doubling Riccati solver: the same equations, equal to rounding (tested).
    """

    def nested(self, n: int):
        """``(A, X0, X1)`` of order ``n`` (``X0`` on the columns ``P``, ``X1`` on ``P1``) from one QR shared by every
        order (:mod:`.nested`), or None (CVA weighting, or ``Γ₋`` near rank deficiency: the pseudo-inverses)."""
        return None if self._nested is None else self._nested(n)

    def __init__(self, S: np.ndarray, layout: _Layout, weighting: str, exact: bool = False):
        L = layout
        self.S = S
        self.layout = L
        self.exact = exact
        Sc_pp = _conditional(S, L.P, L.P, L.Uf)
        Sc_yp = _conditional(S, L.Yf, L.P, L.Uf)
        inv_pp = _PsdInverse(Sc_pp)
        del Sc_pp
        self.theta = inv_pp.times(Sc_yp)
        w_inv = None
        if weighting == "n4sid":
            mat = self.theta @ self._past.root()
        else:
            mat = inv_pp.times_inverse_root(Sc_yp)
            if weighting == "cva":
                H, om = _psd_parts(_conditional(S, L.Yf, L.Yf, L.Uf))
                mat = ((H / np.sqrt(om)) @ H.T) @ mat
                w_inv = (H * np.sqrt(om)) @ H.T
        U, sv, _ = np.linalg.svd(mat, full_matrices=False)
        k = len(L.Yf)
        self.singular_values = np.concatenate([sv, np.zeros(max(0, k - sv.size))])[:k]
        self.U = U
        self.w_inv = w_inv
        self._nested = None if w_inv is not None or exact else NestedOrders(
            U, self.singular_values, L.p, lambda: (self.theta, self.theta_next))

    @functools.cached_property
    def _past(self) -> _PsdInverse:
        """The inverse of the past's covariance ``S_{Wp Wp}`` (shared by the weighting and ``given_past``)."""
        P = self.layout.P
        return _PsdInverse(self.S[np.ix_(P, P)])

    @functools.cached_property
    def given_past(self):
        """Covariances of ``Uf`` and of ``Yf`` with ``Uf`` conditioned on the past ``Wp`` (for ``B, D``)."""
        S, L = self.S, self.layout
        return (_conditional(S, L.Uf, L.Uf, L.P, self._past), _conditional(S, L.Yf, L.Uf, L.P, self._past))

    @functools.cached_property
    def future_cov(self):
        """Covariances ``S_{Uf Uf}`` and ``S_{Yf Uf}`` (for ``B, D``)."""
        S, L = self.S, self.layout
        return S[np.ix_(L.Uf, L.Uf)], S[np.ix_(L.Yf, L.Uf)]

    def residual_covariances(self, gamma, A, B, C, D, states=None):
        """``Q, R, S`` of the state- and output-equation residuals (:func:`_noise`); ``states``: the state maps
        ``(X0, X1)`` of :meth:`nested` when known."""
        return _noise(self, gamma, A, B, C, D, states)

    @functools.cached_property
    def theta_next(self) -> np.ndarray:
        """``Θ₊``: the oblique projection one step later (past one block longer, future one shorter)."""
        S, L = self.S, self.layout
        inv = _PsdInverse(_conditional(S, L.P1, L.P1, L.Uf1))
        return inv.times(_conditional(S, L.Yf1, L.P1, L.Uf1))

    def gamma(self, n: int) -> np.ndarray:
        """Extended observability matrix for order ``n``, shape (p f, n)."""
        G = self.U[:, :n] * np.sqrt(self.singular_values[:n])
        return G if self.w_inv is None else self.w_inv @ G


# ----------------------------------------------------------------------------------------------------- estimation
def _toeplitz_basis(A, C, layout: _Layout, feedthrough: bool) -> np.ndarray:
    """Basis ``H_k`` of the block-Toeplitz matrix of Markov parameters, linear in ``θ = [vec(B); vec(D)]``.

    Shape (n_theta, p f, m f); ``vec`` is column-major, so ``B = θ[:n m].reshape(n, m, order="F")``. Block
    ``(r, s)`` of the basis matrix of ``B = e_j e_lᵀ`` holds ``C A^(r−s−1) e_j`` in column ``l`` (``r > s``); that of
    ``D = e_a e_lᵀ`` holds ``e_a`` in column ``l`` of the diagonal blocks (``markov_toeplitz`` of each unknown's
    Markov parameters, written by blocks).
    """
    n, m, p, f = A.shape[0], layout.m, layout.p, layout.f
    CA = [C]
    for _ in range(f - 2):
        CA.append(CA[-1] @ A)
    n_theta = n * m + (p * m if feedthrough else 0)
    Hs = np.zeros((n_theta, f, p, f, m))  # [unknown, block row r, output, block column s, input]
    for t in range(1, f):
        block = CA[t - 1].T  # (n, p): unknowns j of one input against the outputs
        for s in range(f - t):
            for l in range(m):
                Hs[l * n:(l + 1) * n, s + t, :, s, l] = block
    if feedthrough:
        a, l = np.meshgrid(np.arange(p), np.arange(m), indexing="ij")
        for r in range(f):
            Hs[n * m + l * p + a, r, a, r, l] = 1.0
    return Hs.reshape(n_theta, p * f, m * f)


#: Largest dense Toeplitz basis (doubles) :func:`_b_d` builds; beyond it the structured sums of markov.py are used.
_DENSE_BASIS_MAX = 2_000_000


def _dense_normal_equations(A, C, L: _Layout, feedthrough, Q, S_uu, S_yu, Sc_uu, Sc_yu):
    """``M`` and ``rhs`` of the ``B, D`` least squares from one dense basis matrix per unknown."""
    Hs = _toeplitz_basis(A, C, L, feedthrough)
    P1 = Q @ Q.T
    target = S_yu + P1 @ (Sc_yu - S_yu)
    image = Hs @ S_uu + P1 @ (Hs @ (Sc_uu - S_uu))
    flat = Hs.reshape(Hs.shape[0], -1)
    return flat @ image.reshape(Hs.shape[0], -1).T, flat @ target.reshape(-1)


def _a_c(gamma: np.ndarray, p: int):
    """``C`` = first block row of Γ; ``A`` from the shift invariance ``Γ_up A = Γ_down`` by least squares."""
    C = gamma[:p].copy()
    A = np.linalg.lstsq(gamma[:-p], gamma[p:], rcond=None)[0]
    return A, C


#: Largest estimated 1-norm condition number of the ``B, D`` normal equations solved by Cholesky without their
#: eigenvalues: 1000 times below the rule's 1e12 (the 2-norm condition is at most the 1-norm one, and LAPACK's
#: estimate is within a factor of a few of it; Higham 2002, Accuracy and Stability of Numerical Algorithms,
#: chapter 15), so the rule decides as with the eigenvalues.
_CHOLESKY_COND_MAX = 1e9


def _solve_excited(M: np.ndarray, rhs: np.ndarray):
    """``M⁻¹ rhs`` by Cholesky where ``M`` is clearly well conditioned (``n³/3`` flops, against the ``(4/3) n³``
    and more of its eigenvalues and the LU solve); None otherwise (the caller checks the eigenvalues)."""
    solved = _cholesky_solve(M, rhs)
    return None if solved is None else solved[0]


def _cholesky_solve(M: np.ndarray, rhs: np.ndarray, factor=None, norm=None, overwrite: bool = False):
    """``(M⁻¹ rhs, lower Cholesky factor)`` as :func:`_solve_excited`, or None; ``factor``: a lower Cholesky factor
    of ``M`` already at hand (the leading block of a larger system's), checked the same way, with ``norm`` =
    ``one_norm(M)`` when known (``M`` is then not read); ``overwrite``: factor ``M`` in place.

    Column-major systems and factors (the candidate orders') take LAPACK with the GIL released, in place
    (:mod:`._gil_free`): the same routines on the same numbers as SciPy's wrappers."""
    if factor is None and overwrite and M.flags.f_contiguous:
        anorm = one_norm(M)  # (before the factor overwrites it)
        if potrf(M) != 0 or not pocon(M, anorm) * _CHOLESKY_COND_MAX >= 1.0:
            return None
        return potrs(M, rhs), M
    if factor is not None and factor.strides[0] == factor.itemsize:  # a block of a column-major factor
        rcond = pocon(factor, one_norm(M) if norm is None else norm)
        return (potrs(factor, rhs), factor) if rcond * _CHOLESKY_COND_MAX >= 1.0 else None
    if factor is None:
        F = conditioned_cholesky(M, _CHOLESKY_COND_MAX, overwrite)
    else:
        rcond, info = sla.lapack.dpocon(factor, one_norm(M) if norm is None else norm, uplo="L")
        F = (factor, True) if info == 0 and rcond * _CHOLESKY_COND_MAX >= 1.0 else None
    return None if F is None else (sla.cho_solve(F, rhs, check_finite=False), F[0])


def _normal_equations(proj: _Projection, A, C, Q, feedthrough: bool):
    """``M`` and ``rhs`` of the ``θ = [vec(B); vec(D)]`` least squares (:func:`_b_d`'s Notes); symmetrised on an
    ``exact`` projection, as before (elsewhere the solvers read its lower triangle only)."""
    L = proj.layout
    n, m, p = A.shape[0], L.m, L.p
    S_uu, S_yu = proj.future_cov
    Sc_uu, Sc_yu = proj.given_past
    if proj.exact and (n * m + p * m) * len(L.Yf) * len(L.Uf) <= _DENSE_BASIS_MAX:  # the dense basis, as before
        M, rhs = _dense_normal_equations(A, C, L, feedthrough, Q, S_uu, S_yu, Sc_uu, Sc_yu)
    elif proj.exact:  # the same sums taken over the block-Toeplitz structure (markov.py)
        target = S_yu + Q @ (Q.T @ (Sc_yu - S_yu))
        M, rhs = normal_equations(pattern_blocks(A, C, L.f, feedthrough), Q, S_uu, Sc_uu - S_uu, target, n, m,
                                  feedthrough)
    else:  # by matrix products, with the terms no order changes computed once (the same numbers)
        D_uu, D_yu, weights = _order_free_terms(proj)
        target = S_yu + Q @ (Q.T @ D_yu)
        M, rhs = normal_equations_gemm(pattern_blocks(A, C, L.f, feedthrough), Q, S_uu, D_uu, target, n, m,
                                       feedthrough, weights)
    return (0.5 * (M + M.T) if proj.exact else M), rhs


def _order_free_terms(proj):
    """The parts of the ``B, D`` normal equations that no order changes: ``Sc_uu − S_uu``, ``Sc_yu − S_yu`` and the
    input covariance's shift weights (:func:`~.markov._shift_weights`), computed at the first order and kept on the
    projection for the others (the same numbers; either projection class)."""
    terms = getattr(proj, "_order_free", None)
    if terms is None:
        (S_uu, S_yu), (Sc_uu, Sc_yu) = proj.future_cov, proj.given_past
        f, m = proj.layout.f, proj.layout.m
        terms = (Sc_uu - S_uu, Sc_yu - S_yu, _shift_weights(S_uu.reshape(f, m, f, m)))
        proj._order_free = terms
    return terms


def _solve_b_d(M, rhs, n: int, L: _Layout, feedthrough: bool, factor=None, norm=None, remake=None):
    """``(B, D)`` and the Cholesky factor used (None: solved by LU) from the normal equations ``M θ = rhs``.

    ``remake``: a function returning ``M`` afresh (the same numbers); given it, a full system is factored in place
    and ``M`` is remade for the eigenvalue route. ``factor``, ``norm``: see :func:`_cholesky_solve`."""
    m, p = L.m, L.p
    solved = _cholesky_solve(M, rhs, factor, norm, overwrite=remake is not None and factor is None)
    if solved is None:
        M = M if remake is None else remake()
        M = 0.5 * (M + M.T)  # (already symmetric on an exact projection: then the same numbers)
        lam = np.linalg.eigvalsh(M)
        if lam[0] <= 1e-12 * max(lam[-1], np.finfo(float).tiny):
            raise ExcitationError(
                "the inputs do not excite the model enough to estimate B"
                + (" and D" if feedthrough else "")
                + f" (normal equations of condition {_cond_text(lam)}). "
                "Use a richer stimulation schedule (`stimsteer schedule`), or a lower order."
            )
        solved = (np.linalg.solve(M, rhs), None)
    theta = solved[0]
    B = theta[:n * m].reshape(n, m, order="F")
    D = theta[n * m:].reshape(p, m, order="F") if feedthrough else np.zeros((p, m))
    return (B, D), solved[1]


def _b_d(proj: _Projection, gamma, A, C, feedthroughs: tuple, basis=None) -> dict:
    """``B`` and ``D`` by least squares on the block-Hankel data given ``A`` and ``C``, for each direct-term setting
    in ``feedthroughs`` (``{setting: (B, D)}``).

    Notes
    -----
    Minimises ``‖Yf − Γ Z Wp − H(B, D) Uf‖²`` over ``B``, ``D`` and the free map ``Z`` from the past to the column
    states. Eliminating ``Z`` leaves ``tr(P₁ R Π_{Wp⊥} Rᵀ) + tr(P₂ R Rᵀ)``, ``R = Yf − H Uf``, ``P₁`` the projector
    on range(Γ) and ``P₂ = I − P₁``: a quadratic in ``θ`` written with Hankel covariances only. Exact for
    noise-free data; consistent for open-loop data, where future noise is uncorrelated with past and future inputs.

    Without a direct term the unknowns are the leading ``n m`` of ``θ``: the equations are the leading block of
    those with it, and their Cholesky factor the leading block of its factor, so both settings share one system
    (not on an ``exact`` projection, whose models are computed as before).
    """
    L = proj.layout
    n = A.shape[0]
    Q = np.linalg.qr(gamma)[0] if basis is None else basis  # an orthonormal basis of range(Γ): only Q Qᵀ enters
    out, shared, k = {}, None, n * L.m
    for ft in sorted(feedthroughs, reverse=True):  # with the direct term first: the other is its leading block
        if shared is not None:
            full, rhs, F, norm = shared  # (the full system's lower triangle is its factor now)
            remake = lambda: _normal_equations(proj, A, C, Q, True)[0][:k, :k]  # noqa: E731
            if F is None:  # the full factor failed: the leading block's own, as before
                out[ft], F = _solve_b_d(remake(), rhs[:k], n, L, ft)
            else:
                out[ft], F = _solve_b_d(None, rhs[:k], n, L, ft, F[:k, :k], norm, remake)
            continue
        M, rhs = _normal_equations(proj, A, C, Q, ft)
        if proj.exact:  # the models of before, as before
            out[ft], F = _solve_b_d(M, rhs, n, L, ft)
            continue
        # the candidates' systems (Fortran order) are factored in place; what the other setting reads of them
        # (the leading block's norm) is taken first, and the fallbacks remake them
        norm = one_norm(M[:k, :k]) if ft and len(feedthroughs) > 1 else None
        out[ft], F = _solve_b_d(M, rhs, n, L, ft, remake=lambda ft=ft: _normal_equations(proj, A, C, Q, ft)[0])
        shared = (M, rhs, F, norm) if ft else None
    return out


def _state_maps(proj: _Projection, gamma, states=None):
    """Linear maps from a Hankel column ``z`` to the estimated states at its first and second future sample.

    ``x̂_t = Γ⁺ Θ Wp`` and ``x̂_{t+1} = Γ₋⁺ Θ₊ Wp₊`` (past one step longer, future one shorter, Γ₋ = Γ without its
    last block row): Van Overschee & De Moor 1996, sec. 4.3. ``states``: ``(Γ⁺ Θ, Γ₋⁺ Θ₊)`` when known.
    """
    L = proj.layout
    if states is None:
        states = (np.linalg.pinv(gamma) @ proj.theta, np.linalg.pinv(gamma[:-L.p]) @ proj.theta_next)
    n = gamma.shape[1]
    X0 = np.zeros((n, L.nz))
    X0[:, L.P] = states[0]
    X1 = np.zeros((n, L.nz))
    X1[:, L.P1] = states[1]
    return X0, X1


def _noise(proj: _Projection, gamma, A, B, C, D, states=None):
    """Process, measurement and cross covariances of the state-equation and output-equation residuals."""
    L, S = proj.layout, proj.S
    X0, X1 = _state_maps(proj, gamma, states)
    Eu, Ey = L.select(L.u0), L.select(L.y0)
    # every map lives on the columns of the past one block longer (P1 holds u0 and y0), the leading k rows and
    # columns of the time-major Hankel layout: S restricted to them is a view
    k = L.nz if proj.exact and L.nz < _CHOLESKY_FROM else (L.i + 1) * L.c  # (small, exact: all of S, as before)
    Wmap = (X1 - A @ X0 - B @ Eu)[:, :k]
    Vmap = (Ey - C @ X0 - D @ Eu)[:, :k]
    Sk = S[:k, :k]
    Q, R, Sx = Wmap @ Sk @ Wmap.T, Vmap @ Sk @ Vmap.T, Wmap @ Sk @ Vmap.T
    return 0.5 * (Q + Q.T), 0.5 * (R + R.T), Sx


def _innovation_form(A, C, Q, R, Sx, doubling: bool = False):
    """Steady-state Kalman gain and innovation covariance; ``K = 0`` for (numerically) noise-free data.

    ``doubling`` (every candidate order and the factor route) tries the doubling solver first (:mod:`.riccati`); it
    falls back to the QZ route, and that one to ``K = 0``, as before.
    """
    joint = np.block([[Q, Sx], [Sx.T, R]])
    # max |λ| of the symmetric joint lies between its largest diagonal entry and its Frobenius norm: the
    # eigenvalues are needed only when the two bounds straddle the threshold
    if np.max(np.diagonal(joint)) > _NOISE_FREE:
        noise_free = False
    elif np.linalg.norm(joint) <= _NOISE_FREE:
        noise_free = True
    else:
        noise_free = bool(np.max(np.abs(np.linalg.eigvalsh(joint))) <= _NOISE_FREE)
    if noise_free:
        return np.zeros((A.shape[0], C.shape[0])), R, "noise-free residuals: K = 0"
    Rr = R + _NOISE_FREE * np.eye(R.shape[0])
    try:
        K, P = (doubling and doubling_gain(A, C, Q, Rr, Sx)) or kalman_gain(A, C, Q, Rr, Sx)
    except (np.linalg.LinAlgError, ValueError) as exc:
        warnings.warn(
            f"the steady-state Kalman gain could not be computed ({exc}); the model keeps K = 0 (output-error "
            "form), so k-step predictions ignore the measured past beyond the initial state.",
            StimsteerWarning, stacklevel=5,
        )
        return np.zeros((A.shape[0], C.shape[0])), R, "Riccati equation failed: K = 0"
    Re = C @ P @ C.T + R
    return K, 0.5 * (Re + Re.T), "steady-state Kalman gain (DARE)"


def _fit_order(proj: _Projection, n: int, feedthrough: bool):
    """All scaled-coordinate matrices of the order-``n`` model of one projection."""
    return _fit_orders(proj, n, (feedthrough,))[feedthrough]


def _fit_orders(proj: _Projection, n: int, feedthroughs: tuple) -> dict:
    """:func:`_fit_order` for each direct-term setting in ``feedthroughs`` (``{setting: matrices}``); ``A``, ``C``,
    the state maps and the ``B, D`` equations are shared."""
    gamma = proj.gamma(n)
    nested = proj.nested(n)
    if nested is None:
        A, C = _a_c(gamma, proj.layout.p)
        basis, states = None, None
    else:  # A and the state maps from one factorisation shared by the orders (:mod:`.nested`); range(Γ) = range(U_n)
        A, C = nested[0], gamma[:proj.layout.p].copy()
        basis, states = proj.U[:, :n], nested[1:]
    out = {}
    for ft, (B, D) in _b_d(proj, gamma, A, C, feedthroughs, basis).items():
        Q, R, Sx = proj.residual_covariances(gamma, A, B, C, D, states=states)
        K, Re, how = _innovation_form(A, C, Q, R, Sx, doubling=not proj.exact)
        out[ft] = {"A": A, "B": B, "C": C, "D": D, "K": K, "Re": Re, "Q": Q, "R": R, "S": Sx, "gain": how}
    return out
