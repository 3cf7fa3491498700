"""The condensed formulation: prediction maps in, QP data out.

Every controller whose prediction is affine in the future inputs, ``ŷ = Gy u + f(past)``, tracks a signal
``z = Gz u + fz(past)`` and builds the same problem from those maps::

    minimise  ‖Lz (Gz u + fz − r)‖² + ‖Ru u‖² [+ ‖Lp (T u + t)‖²] + ρ Σ s   (hard input limits, soft output bounds)

The state-space maps ``Gy, Phi_y, Gx, Phi_x`` of a model come from :func:`condensed_prediction`; a linear
predictor's maps ``P, F, c`` (:meth:`~stimsteer.sysid.LinearPredictor.prediction_maps`) give ``Gy = F`` and
``f = P past + c``. :class:`_CondensedCore` turns them into the cvxpy problem (built once, DPP) and the reusable
OSQP problem of the fast path.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ...sysid import markov_toeplitz
from ._core import _PredictiveController
from ._cone_solve import LazyProblem
from .fastqp import _DenseQP, _DenseSoftQP, _FastQP, _positive_definite, dense_solver_available
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__ = ["condensed_outputs", "condensed_prediction"]

# Costs that change by less than this over the input box are solved as they are (σ = 1): only badly scaled
# problems (targets far beyond reach) are rescaled, well-scaled ones keep the solver's own accuracy.
_COST_SCALE_FREE = 1e3


def condensed_prediction(model, horizon_steps: int):
    """Stacked prediction matrices of a state-space model over a horizon.

    Parameters
    ----------
    model : StateSpaceModel
        Its matrices ``A``, ``B``, ``C``, ``D`` are used.
    horizon_steps : int
        ``N``.

    Returns
    -------
    Gy : ndarray, shape (N·p, N·m)
        ``vec(ŷ_0..ŷ_{N−1}) = Gy vec(u) + Phi_y x_0`` (time-major stacking).
    Phi_y : ndarray, shape (N·p, n)
    Gx : ndarray, shape (N·n, N·m)
        ``vec(x_1..x_N) = Gx vec(u) + Phi_x x_0``.
    Phi_x : ndarray, shape (N·n, n)

    Notes
    -----
    Blocks: ``Gy[k, j] = C A^(k−1−j) B`` for ``j < k`` and ``D`` for ``j = k``; ``Gx[k, j] = A^(k−j) B`` for
    ``j <= k``; ``Phi_y[k] = C A^k``; ``Phi_x[k] = A^(k+1)``.
    """
    A, C = model.A, model.C
    n, p, N = model.n_states, model.n_outputs, int(horizon_steps)
    AB, Gy = _input_responses(model, N)
    # Gx and Gy are the block-Toeplitz maps of the state and output Markov parameters (the one builder of sysid)
    Gx = markov_toeplitz(np.stack(AB))
    Phi_x = np.empty((N * n, n))
    Phi_y = np.empty((N * p, n))
    Ak = np.eye(n)
    for k in range(N):
        Phi_y[k * p:(k + 1) * p] = C @ Ak
        Ak = A @ Ak
        Phi_x[k * n:(k + 1) * n] = Ak
    return Gy, Phi_y, Gx, Phi_x


def _input_responses(model, N: int):
    """``[B, A B, …, A^(N−1) B]`` and ``Gy``, the block-Toeplitz map of the output Markov parameters over ``N``
    steps (:func:`~stimsteer.sysid.statespace.markov_toeplitz`)."""
    AB = [model.B]
    for _ in range(1, N):
        AB.append(model.A @ AB[-1])
    return AB, markov_toeplitz(np.stack([model.D] + [model.C @ AB[k] for k in range(N - 1)]))


def condensed_outputs(model, horizon_steps: int):
    """What an output-tracking controller needs of :func:`condensed_prediction`: ``Gy``, ``Phi_y`` and the last
    block row of ``Gx`` (``x_N = Gx_N vec(u) + A^N x_0``, for a terminal cost), without ``Phi_x`` and the rest of
    ``Gx`` (``N·n`` rows each: 2.1 GB and 138 MB for a ridge ARX at past 100 ms, 2,297 states, over 50 steps).
    From :data:`ROW_RECURSION_STATES` states on ``Phi_y`` is built row block by row block, ``C A^k = (C A^(k−1))
    A`` (``p n²`` per step where the powers of ``A`` cost ``n³``: the same numbers to rounding); smaller models keep
    :func:`condensed_prediction`'s numbers bit for bit (closed loops run on them amplify rounding: the demo's
    benchmark moved visibly when its ``Phi_y`` moved by rounding)."""
    A, C = model.A, model.C
    n, p, N = model.n_states, model.n_outputs, int(horizon_steps)
    AB, Gy = _input_responses(model, N)
    Gx_last = np.hstack(AB[::-1]) if N else np.zeros((n, 0))  # [A^(N−1) B, …, B]
    Phi_y = np.empty((N * p, n))
    row, Ak = np.array(C, dtype=np.float64), (np.eye(n) if n < ROW_RECURSION_STATES else None)
    for k in range(N):
        Phi_y[k * p:(k + 1) * p] = row if n >= ROW_RECURSION_STATES else C @ Ak
        if n >= ROW_RECURSION_STATES:
            row = row @ A
        else:
            Ak = A @ Ak
    return Gy, Phi_y, Gx_last


#: States from which :func:`condensed_outputs` builds ``Phi_y`` by the row recursion.
ROW_RECURSION_STATES = 512


# ---------------------------------------------------------------------------------------------------- condensed core
class _CondensedCore(_PredictiveController):
    """Controllers whose prediction is ``ŷ = Gy u + f(past)`` and tracked signal ``z = Gz u + fz(past)``."""

    def _build_condensed(self, Gy, Gz, Lz, T=None, Lp=None):
        """cvxpy problem and fast QP for ``min ‖Lz(Gz u + ez)‖² + ‖Ru u‖² + ‖Lp(T u + t)‖² + ρ Σ s``."""
        self._Gy, self._LG = Gy, Lz @ Gz
        self._LpT = None if T is None else Lp @ T
        self.problem_ = LazyProblem(self, "_condensed_problem")  # cvxpy's, built where a plan needs it
        self._fast_tpl = None
        # with an energy budget the fast QP leaves the budget out; plan() keeps its answer only where the budget
        # is not binding (then it is also the optimum with the budget: the problem is convex)
        self._fast = self._fast_condensed()

    def _condensed_problem(self):
        """The cvxpy problem (DPP), built at its first use (:class:`~._cone_solve.LazyProblem`): the plain path, and
        the fast path's fallback; plans the dense path solves never import cvxpy."""
        N, m = self.horizon_steps_, self.n_inputs_
        self._u = u = cp.Variable(N * m, name="inputs_ua")
        self._ew = cp.Parameter(self._LG.shape[0], name="tracking_offset")
        sw = self._cost_scale_parameters()
        cost = cp.sum_squares(sw * (self._LG @ u) + self._ew) + cp.sum_squares(sw * (self._Ru @ u))
        if self._LpT is not None:
            self._tw = cp.Parameter(self._LpT.shape[0], name="terminal_offset")
            cost = cost + cp.sum_squares(sw * (self._LpT @ u) + self._tw)
        self._yhi_param = cp.Parameter(self._idx_hi.size, name="output_upper_offset") if self._idx_hi.size else None
        self._ylo_param = cp.Parameter(self._idx_lo.size, name="output_lower_offset") if self._idx_lo.size else None
        cons, self._slack_var = self._common_constraints(u, lambda idx: self._Gy[idx] @ u, self._yhi_param,
                                                         self._ylo_param)
        if self._slack_var is not None:
            cost = cost + self._sw2 * (float(self.output_penalty) * cp.sum(self._slack_var))
        return cp.Problem(cp.Minimize(cost), cons)

    def _fast_condensed(self):
        Nm, nb = self._LG.shape[1], self._idx_b.size
        H = self._LG.T @ self._LG + self._Ru.T @ self._Ru
        if self._LpT is not None:
            H = H + self._LpT.T @ self._LpT
        P = sp.block_diag([sp.csc_matrix(2.0 * H), sp.csc_matrix((nb, nb))], format="csc")
        sel = sp.hstack([sp.eye(Nm), sp.csr_matrix((Nm, nb))])
        rows = self._box_rows(sel)
        if self._idx_hi.size:
            rows.append(sp.hstack([sp.csr_matrix(self._Gy[self._idx_hi]), -self._S_hi / self._kappa]))
        if self._idx_lo.size:
            rows.append(sp.hstack([sp.csr_matrix(self._Gy[self._idx_lo]), self._S_lo / self._kappa]))
        if nb:
            rows.append(sp.hstack([sp.csr_matrix((nb, Nm)), sp.eye(nb)]))
        if not nb:
            dense = self._dense_qp(H, rows, Nm)
            return dense if dense is not None else _FastQP(P, sp.vstack(rows, format="csc"), Nm)
        # soft output bounds: held hard on the dense path when their multipliers stay below the penalty, else OSQP
        A = sp.vstack(rows, format="csc")
        osqp = _FastQP(P, A, Nm + nb)
        return _DenseSoftQP.around(osqp, P, A, Nm) or osqp

    def _dense_qp(self, H, rows, Nm):
        """The dense warm-started active-set QP when it applies: ``H`` positive definite and the solver installed
        (a core dependency); else None (OSQP, the general fast path)."""
        if not dense_solver_available():
            return None
        H2 = 2.0 * 0.5 * (H + H.T)
        if not _positive_definite(H2):  # a flat direction (no input weight): OSQP copes, DAQP may not
            return None
        A = sp.vstack(rows[1:], format="csr").toarray() if len(rows) > 1 else None
        return _DenseQP(H2, A, Nm)

    def _fast_vectors(self):
        """Templates of q, l, u for the condensed fast path: the parts that never change are filled in once."""
        Nm, nb = self._LG.shape[1], self._idx_b.size
        q = np.concatenate([np.zeros(Nm), np.full(nb, float(self.output_penalty) / self._kappa)])  # t = κ·s
        lo, hi = [np.zeros(Nm)], [np.zeros(Nm)]
        if self._slew_rows is not None:
            lo.append(-self._slew_rows[1])
            hi.append(self._slew_rows[1])
        n_hi, n_lo = self._idx_hi.size, self._idx_lo.size
        lo += [np.full(n_hi, -np.inf), np.zeros(n_lo), np.zeros(nb)]
        hi += [np.zeros(n_hi), np.full(n_lo, np.inf), np.full(nb, np.inf)]
        lo, hi = np.concatenate(lo), np.concatenate(hi)
        s_hi = Nm + (0 if self._slew_rows is None else self._slew_rows[1].size)
        self._fast_tpl = (q, lo, hi, s_hi, s_hi + n_hi, 2.0 * self._LG.T,
                          None if self._LpT is None else 2.0 * self._LpT.T)

    def _solve_fast(self, offsets, lb, ub, windows=None):
        """The fast QP's answer (``windows``: with the energy-budget windows, :mod:`._budget_sqp`)."""
        ew, tw, fy = offsets
        if self._fast_tpl is None:
            self._fast_vectors()
        q, lo, hi, s_hi, s_lo, Mq, Mt = self._fast_tpl
        Nm, n_hi, n_lo = self._LG.shape[1], self._idx_hi.size, self._idx_lo.size
        q, lo, hi = q.copy(), lo.copy(), hi.copy()
        q[:Nm] = Mq @ ew if Mt is None else Mq @ ew + Mt @ tw
        lo[:Nm], hi[:Nm] = lb.reshape(-1), ub.reshape(-1)
        if n_hi:
            hi[s_hi:s_hi + n_hi] = self._ymax[self._idx_hi] - fy[self._idx_hi]
        if n_lo:
            lo[s_lo:s_lo + n_lo] = self._ymin[self._idx_lo] - fy[self._idx_lo]
        z, status, reason = (self._fast.solve(q, lo, hi) if windows is None
                             else self._fast.solve_budgeted(q, lo, hi, windows))
        if z is None:
            return None, None, status, reason
        return z[:Nm], None, status, ""

    def _cost_scale_parameters(self):
        """``√(1/σ)`` and ``1/σ`` as Parameters: the cost is divided by σ (set per plan by :meth:`_set_cost_scale`)."""
        self._sw = cp.Parameter(nonneg=True, name="cost_scale_sqrt", value=1.0)
        self._sw2 = cp.Parameter(nonneg=True, name="cost_scale", value=1.0)
        self._cost_sw = 1.0
        return self._sw

    def _cost_magnitude(self, offsets):
        """How much the cost can change over the input box: its slope at zero inputs times the bound scale."""
        ew, tw, _ = offsets
        g = self._LG.T @ ew
        g = g if self._LpT is None else g + self._LpT.T @ tw
        return 2.0 * self._scale * float(np.linalg.norm(g))

    def _set_cost_scale(self, offsets):
        """σ = the cost's magnitude beyond :data:`_COST_SCALE_FREE` (at least 1); the minimiser stays the same."""
        sigma = max(1.0, self._cost_magnitude(offsets) / _COST_SCALE_FREE)
        self._cost_sw = 1.0 / np.sqrt(sigma)
        self._sw.value, self._sw2.value = self._cost_sw, 1.0 / sigma

    def _assign(self, offsets):
        ew, tw, fy = offsets
        self._ew.value = self._cost_sw * ew
        if self._LpT is not None:
            self._tw.value = self._cost_sw * tw
        if self._yhi_param is not None:
            self._yhi_param.value = self._ymax[self._idx_hi] - fy[self._idx_hi]
        if self._ylo_param is not None:
            self._ylo_param.value = self._ymin[self._idx_lo] - fy[self._idx_lo]

    def _aux_value(self):
        return None

    def _condensed_terms(self, u, ew, tw):
        return _condensed_terms(self._LG, self._Ru, self._LpT, u, ew, tw)


def _condensed_terms(LG, Ru, LpT, u, ew, tw) -> dict:
    """The cost terms of the condensed problem at ``u`` for the weighted offsets ``ew``, ``tw`` of its plan (a
    function of its arguments alone: a plan may compute them at their first read, :mod:`.plan`)."""
    v = u.reshape(-1)
    terms = {"tracking": float(np.sum((LG @ v + ew) ** 2)), "input_energy": float(np.sum((Ru @ v) ** 2))}
    if LpT is not None:
        terms["terminal"] = float(np.sum((LpT @ v + tw) ** 2))
    return terms



def _data_terms(Lz, Ru, u, y, r, g, y_past, Yp, lam_y, lam_g, M) -> dict:
    """DeePC's cost terms at inputs ``u``, predicted outputs ``y``, stacked target ``r`` and weights ``g`` (None: the
    predictor's own prediction), past outputs ``y_past`` stacked (used when ``lam_y`` is not None) and the regulariser
    of ``g`` (``M`` None: ℓ1). A function of its arguments alone: a plan may compute them at their first read."""
    terms = {"tracking": float(np.sum((Lz @ (y.reshape(-1) - r)) ** 2)),
             "input_energy": float(np.sum((Ru @ u.reshape(-1)) ** 2))}
    if g is not None:
        if lam_y is not None:
            terms["past_consistency"] = lam_y * float(np.sum((Yp @ g - y_past) ** 2))
        if lam_g > 0:
            reg = np.sum(np.abs(g)) if M is None else np.sum((M @ g) ** 2)
            terms["regularizer"] = lam_g * float(reg)
    return terms

class _LinearStateMap:
    """The state estimate of a model as the linear map of the past window it is (read off once, then one product).

    ``StateSpaceModel.estimate_state`` solves a least-squares problem on every call, and its answer is linear in
    the window ``[vec(u_past); vec(y_past)]`` (a pseudo-inverse applied to it); at the first plan the map is built
    from all unit windows at once (one least-squares solve with ``T (m + p)`` right-hand sides, where reading it
    column by column from that function cost ``T (m + p)`` solves: 0.5 s per controller of the demo's bench), checked
    against the function on that plan's window, and then applied as one matrix product, so loops stop paying the
    solve. Every plan of a controller uses the map (the same window gives the same plan whatever was planned
    before); should the check fail, every plan uses the function. Windows of another length use the function.
    """

    def __init__(self, model, past_steps, calls_before=0):
        self._model, self._T, self._left = model, int(past_steps), int(calls_before)
        self._E = None

    def _build(self):
        """The map, from every unit window at once (:meth:`StateSpaceModel.state_map`: one least-squares solve for
        all columns, what ``estimate_state`` computes column by column; checked against it on the first window the
        map serves)."""
        if self._model.n_states == 0:
            return np.zeros((0, self._T * (self._model.n_inputs + self._model.n_outputs)))
        return self._model.state_map(self._T)

    def __call__(self, u_past, y_past):
        if u_past.shape[0] != self._T:
            return self._model.estimate_state(u_past, y_past)
        if self._E is None:
            if self._left > 0:
                self._left -= 1
                return self._model.estimate_state(u_past, y_past)
            self._E = self._build()
            x = self._apply(u_past, y_past)
            ref = self._model.estimate_state(u_past, y_past)
            if not np.allclose(x, ref, rtol=1e-8, atol=1e-8 * max(1.0, float(np.max(np.abs(ref), initial=0.0)))):
                self._E, self._left = None, 1 << 62  # not this model's estimate: the function itself from now on
                return ref
            return x
        return self._apply(u_past, y_past)

    def _apply(self, u_past, y_past):
        T, m = self._T, u_past.shape[1]
        w = np.empty(self._E.shape[1])
        w[:T * m] = u_past.reshape(-1)
        w[T * m:] = y_past.reshape(-1)
        return self._E @ w
