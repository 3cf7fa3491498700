"""DeePC's fast paths without its ``r`` Hankel columns: ``g`` minimised out, by the null space or by structure.

The DeePC problem of :class:`~stimsteer.control.mpc.data.DataPredictiveController` (Coulson, Lygeros, Dörfler 2019)
with a quadratic regulariser is, for fixed inputs ``u``, a quadratic in ``g`` under linear equalities, so ``g`` can
be minimised out in closed form and the plan is a QP in the inputs alone.

* :func:`null_space_elimination`, for any blocks: ``g = A⁺b + Z w`` with ``Z`` a basis of the null space of the
  equalities and ``w`` from ``ZᵀHZ``. It works on ``r × r`` matrices (an SVD with its full ``V``, ``ZᵀHZ`` and its
  factor, ``Z (ZᵀHZ)⁻¹ Zᵀ``): at past 100 / horizon 50 of a 1 kHz, 23-channel session (``r`` = 3,450) most of a
  plan's 15–18 s.
* :class:`ProjectionReduced`, for the Hankel predictor's compressed blocks with the projection regulariser
  (``D = [Up; Yp; Uf] = [D1 0]``, ``D1`` square lower triangular and invertible, ``M = diag(0, I)``): the same
  problem on ``pN``-sized matrices, below.

The structure (the derivation is ours; the equivalence of DeePC with the projection regulariser to a predictor that
penalises the distance from the least-squares prediction is Dörfler F., Coulson J., Markovsky I. (2023), Bridging
direct and indirect data-driven control formulations via regularizations and relaxations, IEEE Transactions on
Automatic Control). With
``g = [g1; g2]`` and ``w = D1 g1 = [u_past; ŷp; u; 0]`` (``ŷp`` the fitted past outputs), the predicted outputs
are ``ŷ = Θ w + Yf2 g2`` with ``Θ = Yf1 D1⁻¹`` (the least-squares map) and the cost is::

    ‖Lz ŷ − r‖² + ‖Ru u‖² + λ_y ‖ŷp − y_past‖² + λ_g ‖g2‖²

``ŷp`` and ``g2`` enter through ``v = [ŷp − y_past; g2]`` only, with ``ŷ = ŷ_ls(u) + B v``, ``B = [Θ_yp, Yf2]``,
``ŷ_ls = Θ_up u_past + Θ_yp y_past + Θ_uf u`` and the weight ``Λ = diag(λ_y I, λ_g I)`` on ``v``. Hence

* for given ``u`` the least cost over ``v`` is ``fᵀ S⁻¹ f`` with ``f = Lz ŷ_ls(u) − r`` and
  ``S = I + Lz W Lzᵀ``, ``W = B Λ⁻¹ Bᵀ`` (``pN × pN``; the ridge identity ``min_v ‖C v − f‖² + vᵀΛv =
  fᵀ(I + CΛ⁻¹Cᵀ)⁻¹f``), reached at ``v = −Λ⁻¹ Bᵀ Lzᵀ S⁻¹ f``: the input-only QP;
* for given ``u`` and predicted outputs ``ŷ`` the least cost over ``v`` is ``eᵀ W⁺ e``, ``e = ŷ − ŷ_ls(u)`` in the
  range of ``W``: with ``e = R ξ``, ``R = U_k diag(√σ_k)`` from ``W = U diag(σ) Uᵀ``, it is ``‖ξ‖²``, and output
  bounds on ``ŷ = ŷ_ls(u) + R ξ`` are rows of a QP in ``[u; ξ]`` (``N m + k`` variables, ``k <= pN``) instead of
  one in ``g`` (``r``). The bounded rows see ``ξ`` in the row space of their rows of ``R`` only; the rest of ``ξ``
  is minimised out as well (:meth:`ProjectionReduced.bounded_form`), which leaves ``N m`` plus at most one
  variable per bounded output value, for the fast path and for the cvxpy problem alike.

At past 100 / horizon 50 (``r`` = 3,450, ``pN`` = 1,000), ``stimsteer plan`` with the demo's limits took 15–18 s
and 1.46 GB by the null space, 3.0–3.1 s and 0.57 GB by this form (``benchmarks/bench_cli_fit.py --plan``); one
plan by the cvxpy problem took 97 s and 17.1 GB in ``g``, 1.1 s and 0.75 GB here (``benchmarks/bench_deepc_plan.py
--weights``).

With hard past outputs (``λ_y = ∞``) ``ŷp = y_past`` and ``B = Yf2``. ``g`` itself is recovered for each plan (its
regulariser and slack terms are reported): ``g1 = D1⁻¹ w`` by one triangular solve.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ...sysid.datadriven.kkt import _is_coordinate_projector, _is_lower
from .fastqp import _DenseQP, _DenseSoftQP, _FastQP, _positive_definite, dense_solver_available
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__ = ["ProjectionReduced", "REDUCED_MIN_COLUMNS", "eliminated_qp", "null_space_elimination"]

#: From this many Hankel columns on, DeePC with the projection regulariser plans on its reduced form. Smaller
#: problems keep the null-space route's numbers bit for bit (the demo's closed loops depend on them; both routes are
#: the same problem, tested against each other and against cvxpy).
REDUCED_MIN_COLUMNS = 512
#: ``D1`` is used when LAPACK's estimate of its reciprocal condition number is above this (else the null space).
_RCOND_MIN = 1e-12
#: Eigenvalues of ``W`` at most this fraction of its largest are taken as zero (``W⁺`` on its range).
_RANGE_TOL = 1e-12


def null_space_elimination(H, LY, E, Yp, Uf, lam_y):
    """The maps of ``g*(u)`` and of the input-only QP by the null space of the equalities, or None when they are
    dependent or the reduced Hessian is not positive definite (:meth:`DataPredictiveController._fast_deepc_eliminated`).

    For fixed ``u`` the cost is a quadratic in ``g`` under ``E g = [u_past; 0]``, (``Yp g = y_past`` when hard,
    ``lam_y`` None) and ``Uf g = u``; its minimiser ``g = A⁺b + Z w``, ``w = (ZᵀHZ)⁻¹ Zᵀ(h − H A⁺ b)``, is better
    conditioned than the KKT inverse.
    """
    r = H.shape[0]
    hard = lam_y is None
    fixed = np.vstack([E, Yp]) if hard else E
    A = np.vstack([fixed, Uf])
    U_, sv, Vt = np.linalg.svd(A, full_matrices=True)
    if sv.size == 0 or sv[-1] <= 1e-10 * sv[0] or sv.size < A.shape[0]:
        return None  # dependent equalities (e.g. hard past outputs on exact data)
    Z = Vt[A.shape[0]:].T
    A_pinv = Vt[:A.shape[0]].T @ ((U_.T) / sv[:, None])
    try:
        c = sla.cho_factor(Z.T @ H @ Z)
    except np.linalg.LinAlgError:
        return None
    S_Zt = sla.cho_solve(c, Z.T)
    G_h = Z @ S_Zt
    G_b = A_pinv - G_h @ (H @ A_pinv)
    G_f, G_u = G_b[:, :fixed.shape[0]], G_b[:, fixed.shape[0]:]
    Q_h = 2.0 * G_u.T @ (H @ G_h - np.eye(r))
    GH = 2.0 * G_u.T @ H  # (2 G_uᵀ) H, shared by the two products below (evaluated in the same order as before)
    # g = G_h h + G_f b + G_u u with h = LYᵀ r (+ λ_y Ypᵀ y_past): G_h folded into the maps of r and y_past
    elim = {
        "G_r": G_h @ LY.T, "G_y": None if hard else G_h @ (lam_y * Yp.T), "G_f": G_f, "G_u": G_u,
        "Q_r": Q_h @ LY.T, "Q_f": GH @ G_f, "Q_y": None if hard else Q_h @ (lam_y * Yp.T), "hard": hard,
    }
    P = GH @ G_u
    elim["P"] = 0.5 * (P + P.T)
    return elim


def eliminated_qp(ctrl, P, Nm):
    """The input-only QP of Hessian ``P``: dense and warm started (daqp) where ``P`` is positive definite, else
    OSQP, with the controller's input rows."""
    rows = ctrl._box_rows(sp.eye(Nm, format="csr"))
    if dense_solver_available() and _positive_definite(P):  # exact, warm started
        return _DenseQP(P, sp.vstack(rows[1:], format="csr").toarray() if len(rows) > 1 else None, Nm)
    return _FastQP(sp.csc_matrix(P), sp.vstack(rows, format="csc"), Nm)


class ProjectionReduced:
    """DeePC with the projection regulariser on its ``pN``-sized form (module docstring).

    Built by :meth:`of` from the controller's blocks (None where the structure is absent); the controller's offsets
    ``(eq, y_past, r)`` are those of the g-space problem: ``eq = [u_past; 0]`` the right-hand side of ``E g``.
    """

    def __init__(self, D1, Yf, n_up, n_yp, Nm, lam_y, lam_g, Lz, Ru):
        n_b = D1.shape[0]
        self._D1, self._n_up, self._n_yp, self._Nm = D1, n_up, n_yp, Nm
        self._lam_y, self._lam_g, self._Lz = lam_y, float(lam_g), Lz
        self._Yf2 = np.ascontiguousarray(Yf[:, n_b:])
        # Θ = Yf1 D1⁻¹, the least-squares map of w = [u_past; y_past; u; tail]: D1ᵀ Θᵀ = Yf1ᵀ
        theta = sla.solve_triangular(D1.T, np.ascontiguousarray(Yf[:, :n_b].T), lower=False,
                                     check_finite=False).T
        a, b = n_up + n_yp, n_up + n_yp + Nm
        self._T_E = np.hstack([theta[:, :n_up], theta[:, b:]])  # the columns of E's rows: [u_past; 0 tail]
        self._T_yp, self._F = np.ascontiguousarray(theta[:, n_up:a]), np.ascontiguousarray(theta[:, a:b])
        W = self._Yf2 @ self._Yf2.T / self._lam_g
        if lam_y is not None:
            W += self._T_yp @ self._T_yp.T / float(lam_y)
        self._W = 0.5 * (W + W.T)
        S = Lz @ self._W @ Lz.T
        S[np.diag_indices_from(S)] += 1.0
        self._S = sla.cho_factor(0.5 * (S + S.T))
        self._Ru2 = Ru.T @ Ru
        self._bform = None  # the problem with output bounds (bounded_form), built where it is needed

    @classmethod
    def of(cls, ctrl, blocks, N, m, p):
        """The reduced form of the controller's DeePC problem, or None (another regulariser or structure, a nearly
        singular ``D1``, or fewer than :data:`REDUCED_MIN_COLUMNS` columns)."""
        M = blocks.reg_matrix
        if str(blocks.regularizer) != "projection" or not ctrl._lam_g > 0 or M is None:
            return None
        Up, Yp, Uf = (np.asarray(x, np.float64) for x in (blocks.Up, blocks.Yp, blocks.Uf))
        r, n_b = Up.shape[1], Up.shape[0] + Yp.shape[0] + Uf.shape[0]
        if r < REDUCED_MIN_COLUMNS or r <= n_b or any(np.any(x[:, n_b:]) for x in (Up, Yp, Uf)):
            return None
        if not _is_coordinate_projector(np.asarray(M), n_b):
            return None
        D1 = np.vstack([Up[:, :n_b], Yp[:, :n_b], Uf[:, :n_b]])  # row by row: D1ᵀ is LAPACK's upper triangle
        if not _is_lower(D1):
            return None
        trcon, = sla.get_lapack_funcs(("trcon",), (D1.T,))
        rcond, info = trcon(D1.T, norm="I", uplo="U", diag="N")  # (the 1-norm estimate of D1)
        if info != 0 or not rcond > _RCOND_MIN:
            return None
        Yf = np.asarray(blocks.Yf, np.float64)[:p * N]
        return cls(D1, Yf, Up.shape[0], Yp.shape[0], m * N, ctrl._lam_y, ctrl._lam_g, ctrl._Lz, ctrl._Ru)

    # ------------------------------------------------------------------------------------ no output bounds
    def elimination(self):
        """The input-only QP's maps, as :func:`null_space_elimination` gives them (``q = Q_r r + Q_f b + Q_y
        y_past``, ``b = [u_past; 0]``, with ``y_past`` appended to ``b`` when hard), and ``g_of`` for ``g*(u)``."""
        Lz, F = self._Lz, self._F
        SinvLzF = sla.cho_solve(self._S, Lz @ F)  # S⁻¹ Lz F
        Q_lin = 2.0 * SinvLzF.T @ Lz  # 2 Fᵀ Lzᵀ S⁻¹ Lz: the map of the least-squares prediction's free part
        P = 2.0 * (self._Ru2 + (Lz @ F).T @ SinvLzF)
        hard = self._lam_y is None
        Q_y = Q_lin @ self._T_yp
        return {"P": 0.5 * (P + P.T), "Q_r": -2.0 * SinvLzF.T,
                "Q_f": np.hstack([Q_lin @ self._T_E, Q_y]) if hard else Q_lin @ self._T_E,
                "Q_y": None if hard else Q_y, "hard": hard, "g_of": self._g_eliminated}

    def _g_eliminated(self, u, eq, yp, rw):
        """``g*(u)`` of the input-only QP: ``v = −Λ⁻¹ Bᵀ Lzᵀ S⁻¹ f``."""
        t = self._Lz.T @ sla.cho_solve(self._S, self._Lz @ self._least_squares(u, eq, yp) - rw)
        return self._g(u, eq, yp, -t)

    def _least_squares(self, u, eq, yp):
        return self._T_E @ eq + self._T_yp @ yp + self._F @ u

    def _g(self, u, eq, yp, t):
        """``g`` for the inputs ``u`` and ``v = Λ⁻¹ Bᵀ t``."""
        fitted = yp if self._lam_y is None else yp + self._T_yp.T @ t / float(self._lam_y)
        n_up = self._n_up
        w = np.concatenate([eq[:n_up], fitted, u, eq[n_up:]])
        g1 = sla.solve_triangular(self._D1.T, w, lower=False, trans="T", check_finite=False)  # D1 g1 = w
        return np.concatenate([g1, self._Yf2.T @ t / self._lam_g])

    # ------------------------------------------------------------------------------------ with output bounds
    def bounded_form(self, idx):
        """The problem with soft bounds on the stacked outputs ``idx``, over ``z = [u; a]`` (built once).

        ``ŷ = ŷ_ls(0) + F u + R ξ`` with ``R = U_k diag(√σ_k)``; the bounded rows see ``ξ`` through ``R[idx]`` only.
        With ``ξ = V_b a + V_c c`` (``V_b`` an orthonormal basis of the row space of ``R[idx]``, ``V_c`` of its
        complement), ``c`` is free of every constraint and is minimised out (its Hessian block is at least ``I``):
        the QP keeps ``N m`` inputs and at most ``len(idx)`` coordinates ``a``, whatever the Hankel columns."""
        key = np.asarray(idx, np.intp).tobytes()
        if self._bform is not None and self._bform["key"] == key:
            return self._bform
        sigma, U = np.linalg.eigh(self._W)
        keep = sigma > _RANGE_TOL * max(float(sigma[-1]), 1e-300)
        root = np.sqrt(sigma[keep])
        R, to_t = U[:, keep] * root, U[:, keep] / root  # e = R ξ; v = Λ⁻¹ Bᵀ W⁺ e = Λ⁻¹ Bᵀ (to_t ξ)
        Nm, k = self._Nm, R.shape[1]
        Q, sv, _ = np.linalg.svd(R[idx].T, full_matrices=True)
        kb = int(np.count_nonzero(sv > _RANGE_TOL * max(float(sv[0]), 1e-300))) if sv.size else 0
        Vb, Vc = Q[:, :kb], Q[:, kb:]
        LF, LR = self._Lz @ self._F, self._Lz @ R
        LK = np.hstack([LF, LR @ Vb])  # Lz ŷ = Lz ŷ_ls(0) + LK z + (LR Vc) c
        LC = LR @ Vc
        HK = LK.T @ LK
        HK[:Nm, :Nm] += self._Ru2
        HK[Nm:, Nm:] += np.eye(kb)
        Hcc = LC.T @ LC
        Hcc[np.diag_indices_from(Hcc)] += 1.0
        cf = sla.cho_factor(Hcc)
        X = sla.cho_solve(cf, LC.T @ LK)  # c = −(X z + Y d), d = Lz ŷ_ls(0) − r
        Y = sla.cho_solve(cf, LC.T)
        H = HK - (LC.T @ LK).T @ X
        # the cost less its constant, as zᵀ H z + 2 (LKᵀ − Xᵀ LCᵀ) d · z (c minimised out)
        self._bform = {"key": key, "H": 0.5 * (H + H.T), "D": 2.0 * (LK.T - X.T @ LC.T), "X": X, "Y": Y,
                       "Vb": Vb, "Vc": Vc, "to_t": to_t, "rows": np.hstack([self._F[idx], R[idx] @ Vb]),
                       "n": Nm + kb}
        return self._bform

    def _bounded_g(self, z, eq, yp, d):
        """``g`` of the answer ``z = [u; a]`` of the bounded form, ``d = Lz ŷ_ls(0) − r``."""
        f, u = self._bform, z[:self._Nm]
        c = -(f["X"] @ z + f["Y"] @ d)
        return self._g(u, eq, yp, f["to_t"] @ (f["Vb"] @ z[self._Nm:] + f["Vc"] @ c))

    def bounded_qp(self, ctrl):
        """The QP over ``[z; t]`` (``t = κ·s`` the soft output rows' slack, as the g-space QP's): dense and warm
        started where it applies (:class:`~.fastqp._DenseSoftQP`), else OSQP."""
        f = self.bounded_form(ctrl._idx_b)
        Nm, nb, n = self._Nm, ctrl._idx_b.size, f["n"]
        at = {int(i): j for j, i in enumerate(ctrl._idx_b)}
        P = sp.block_diag([sp.csc_matrix(2.0 * f["H"]), sp.csc_matrix((nb, nb))], format="csc")
        rows = ctrl._box_rows(sp.hstack([sp.eye(Nm), sp.csr_matrix((Nm, n - Nm + nb))], format="csr"))
        if ctrl._idx_hi.size:
            B = f["rows"][[at[int(i)] for i in ctrl._idx_hi]]
            rows.append(sp.hstack([sp.csr_matrix(B), -ctrl._S_hi / ctrl._kappa]))
        if ctrl._idx_lo.size:
            B = f["rows"][[at[int(i)] for i in ctrl._idx_lo]]
            rows.append(sp.hstack([sp.csr_matrix(B), ctrl._S_lo / ctrl._kappa]))
        if nb:
            rows.append(sp.hstack([sp.csr_matrix((nb, n)), sp.eye(nb)]))
        A = sp.vstack(rows, format="csc")
        osqp = _FastQP(P, A, n + nb)
        self._u_sel = np.hstack([np.eye(Nm), np.zeros((Nm, n - Nm))])
        return _DenseSoftQP.around(osqp, P, A, n) or osqp

    def solve_bounded(self, ctrl, qp, offsets, lb, ub, windows=None):
        """``(u, g, status, reason)`` of the QP with output bounds (as the g-space fast path's)."""
        eq, yp, rw = offsets
        f, nb = self._bform, ctrl._idx_b.size
        y0 = self._T_E @ eq + self._T_yp @ yp
        d = self._Lz @ y0 - rw
        q = np.concatenate([f["D"] @ d, np.full(nb, float(ctrl.output_penalty) / ctrl._kappa)])
        lo, hi = (np.concatenate(v) for v in ctrl._row_bounds(lb, ub, y0))
        z, status, reason = (qp.solve(q, lo, hi) if windows is None
                             else qp.solve_budgeted(q, lo, hi, windows, self._u_sel))
        if z is None:
            return None, None, status, reason
        z = z[:f["n"]]
        return z[:self._Nm], self._bounded_g(z, eq, yp, d), status, ""

    # ------------------------------------------------------------------------------------ the cvxpy problem
    def cvxpy_problem(self, ctrl):
        """The bounded form in cvxpy (DPP): variables ``z = [u; a]``, the past through the least-squares free
        response ``ŷ_ls(0)`` (a Parameter). Its optimal value is the g-space problem's (module docstring) less a
        constant; the g-space one held ``r × r`` dense data (at ``r`` = 3,450: 89 s and a 17 GB peak for one
        plan)."""
        f = self.bounded_form(ctrl._idx_b)
        at = {int(i): j for j, i in enumerate(ctrl._idx_b)}
        z = cp.Variable(f["n"], name="inputs_and_output_freedom")
        ctrl._u, self._z = z[:self._Nm], z
        self._y0 = cp.Parameter(f["rows"].shape[0], name="least_squares_free_response_bounded")
        self._q = cp.Parameter(f["n"], name="linear_cost")
        ctrl._cost_scale_parameters()
        cost = ctrl._sw2 * cp.quad_form(z, cp.psd_wrap(f["H"])) + self._q @ z  # divided by σ

        def bounded(idx):
            j = [at[int(i)] for i in idx]
            return f["rows"][j] @ z + self._y0[j]

        more, ctrl._slack_var = ctrl._common_constraints(ctrl._u, bounded, ctrl._ymax[ctrl._idx_hi],
                                                         ctrl._ymin[ctrl._idx_lo])
        if ctrl._slack_var is not None:
            cost = cost + ctrl._sw2 * (float(ctrl.output_penalty) * cp.sum(ctrl._slack_var))
        return cp.Problem(cp.Minimize(cost), more)

    def assign(self, ctrl, offsets):
        """The cvxpy problem's Parameters for the g-space offsets ``(eq, y_past, r)``."""
        eq, yp, rw = offsets
        y0 = self._T_E @ eq + self._T_yp @ yp
        d = self._Lz @ y0 - rw
        self._y0.value = y0[ctrl._idx_b] if ctrl._idx_b.size else np.zeros(0)
        self._q.value = ctrl._cost_sw ** 2 * (self._bform["D"] @ d)
        self._offsets = (eq, yp, d)

    def aux_value(self, ctrl):
        """``g`` of the cvxpy problem's answer."""
        eq, yp, d = self._offsets
        return self._bounded_g(np.asarray(self._z.value, np.float64), eq, yp, d)
