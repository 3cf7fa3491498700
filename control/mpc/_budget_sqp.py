"""Plans whose energy budget binds, on the dense path: sequential quadratic programming with exact Hessians.

The budget-free dense QP (:mod:`.fastqp`) answers ``min ½xᵀHx + qᵀx s.t. lo <= A x <= hi``; an energy budget adds,
for every window ``j`` of every budget (:class:`~._budget._RollingBudget`), the convex constraint
``g_j(u) = (Σ_k Mp[j,k] ‖u_k‖² + Σ_t Mr[j,t] r_t(u_{N−1})) / E <= (E − Mh[j] h) / E``, with ``u = Mu x + cu`` the
stacked inputs (``Mu = I`` for the condensed problem, the data map of DeePC's weights otherwise) and
``r_t(v) = Σ_i max(|v_i| − t·slew_i, 0)²`` the ramp to zero after the plan (continuously differentiable).

Each iteration linearises the windows at ``x_k`` and adds the Lagrangian's curvature ``Σ_j μ_j ∇²g_j`` (diagonal
in ``u``; the multipliers ``μ`` of the previous iteration) to ``H``, and the dense active-set solver (daqp) solves
that QP exactly. At a fixed point the step is zero, so ``x`` with the QP's multipliers meets the KKT conditions of
the problem with the budget, which is convex with ``H`` positive definite: the optimum, unique (Nocedal & Wright
2006, Numerical Optimization, 2nd ed., Sec. 18.1, the local SQP method as Newton's method on the KKT system). It
stops when the step and the windows' excess are at rounding level; an iteration limit, a failed QP or a window
still over budget returns None, and the controller solves the cvxpy problem instead (the reference). The answer is
verified against every hard limit by the controller afterwards, like every solver's.
"""

from __future__ import annotations

import numpy as np

__all__: list = []

_MAX_ITER = 40
_STEP_TOL = 1e-9  # relative to the largest |x|: Newton's next step would be of its square
_EXCESS_TOL = 1e-9  # relative to the budget (the controller's projection then blends onto the exact budget)
_BIG = 1e30


class _Windows:
    """Value, Jacobian and Lagrangian curvature of every window of the (unweighted) budgets on stacked inputs.

    The arithmetic of each number is fixed (the SQP's iterates, and the plans of a closed loop, must not change in
    their last digit); what is not repeated: ``2 / E`` and the windows' masks per budget (once), the ramp of the
    last step (computed by :meth:`excess`, read again by :meth:`curvature` at the same inputs), and the Jacobian's
    array (written in place into the caller's buffer, the rows the QP takes).
    """

    def __init__(self, budgets, hists, N: int, m: int):
        self.N, self.m = int(N), int(m)
        self.items = [(b, (b.budget - b.Mh @ np.asarray(h, np.float64)) / b.budget) for b, h in zip(budgets, hists)]
        self.n = sum(b.Mp.shape[0] for b in budgets)
        # per budget: 2/E and Mp as (k, N, 1) for the Jacobian's product
        self._consts = [(2.0 / b.budget, b.Mp[:, :, None]) for b, _ in self.items]
        # the inputs with a slew limit: a slice where every input has one (the same entries as the mask, a view)
        self._fin = [slice(None) if b.fin.all() else b.fin for b, _ in self.items]
        self._ramps = None  # (u, [(pos, sgn) per budget]) of the last excess

    @staticmethod
    def _ramp(b, last):
        """``max(|v_i| − t·slew_i, 0)`` for the inputs with a slew limit, shape (n_tail, n_limited), and signs."""
        v = last[b._fin_idx]  # b._ramp_drop: t·slew of the ramp's steps, computed once per budget
        return np.maximum(np.abs(v)[None, :] - b._ramp_drop, 0.0), np.sign(v)

    def values(self, u):
        """``g(u) − left`` for every window (relative to its budget), without the Jacobian."""
        U = np.asarray(u, np.float64).reshape(self.N, self.m)
        vals = []
        for b, left in self.items:
            g = b.Mp @ _row_squares(U) / b.budget
            if b.n_tail:
                pos, _ = self._ramp(b, U[-1])
                g = g + b.Mr @ _row_squares(pos) / b.budget
            vals.append(g - left)
        return vals[0] if len(vals) == 1 else np.concatenate(vals)

    def excess(self, u, out=None):
        """``g(u) − left`` for every window (relative to its budget), and the Jacobian in ``u`` (n, N·m), written
        into ``out`` when given (an (n, N·m) C-contiguous array)."""
        U = np.asarray(u, np.float64).reshape(self.N, self.m)
        J_all = np.empty((self.n, self.N * self.m)) if out is None else out
        vals, ramps, i = [], [], 0
        sq = _row_squares(U)
        for (b, left), (c, Mp3), fin in zip(self.items, self._consts, self._fin):
            k = b.Mp.shape[0]
            J = J_all[i:i + k].reshape(k, self.N, self.m)
            np.multiply(Mp3, U[None, :, :], out=J)
            J *= c
            g = b.Mp @ sq / b.budget
            if b.n_tail:
                pos, sgn = self._ramp(b, U[-1])
                g = g + b.Mr @ _row_squares(pos) / b.budget
                J[:, -1, fin] += c * (b.Mr @ (pos * sgn[None, :]))
                ramps.append(pos)
            else:
                ramps.append(None)
            vals.append(g - left)
            i += k
        self._ramps = (u, ramps)
        return (vals[0] if len(vals) == 1 else np.concatenate(vals)), J_all

    def curvature(self, u, mu):
        """The diagonal of ``Σ_j μ_j ∇²g_j(u)`` (length N·m)."""
        U = np.asarray(u, np.float64).reshape(self.N, self.m)
        kept = self._ramps if self._ramps is not None and self._ramps[0] is u else None
        d = np.zeros((self.N, self.m))
        i = 0
        for j, ((b, _left), (c, _Mp3), fin) in enumerate(zip(self.items, self._consts, self._fin)):
            w = mu[i:i + b.Mp.shape[0]]
            i += b.Mp.shape[0]
            d += c * (b.Mp.T @ w)[:, None]
            if b.n_tail:
                pos = kept[1][j] if kept is not None else self._ramp(b, U[-1])[0]
                d[-1, fin] += c * ((b.Mr.T @ w) @ (pos > 0).astype(np.float64))
        return d.reshape(-1)


def _row_squares(U):
    """``np.sum(U**2, axis=1)``: the same reduction (``U**2`` is ``U·U``) without its wrappers."""
    return np.add.reduce(U * U, axis=1)


def fast_budgeted(ctrl, offsets, lb, ub):
    """A controller's fast path with its energy-budget windows: ``(u, aux, status, reason)``, ``status`` "budget"
    where it does not apply (a weighted load, an OSQP fast path) or does not settle (then the cvxpy problem)."""
    if not (applies(ctrl._budgets) and hasattr(ctrl._fast, "solve_budgeted")):
        return None, None, "budget", "energy budget binding"
    windows = _Windows(ctrl._budgets, ctrl._hists, ctrl.horizon_steps_, ctrl.n_inputs_)
    u, aux, status, reason = ctrl._solve_fast(offsets, lb, ub, windows=windows)
    if u is None:
        return None, None, "budget", "energy budget binding"
    return u, aux, status, reason


def applies(budgets) -> bool:
    """Whether every budget is the per-sample ``Σ u²`` layout (weighted loads with ``|u|`` go to cvxpy)."""
    return bool(budgets) and all(not b.weighted for b in budgets)


def solve_budgeted(H, q, A, lo, hi, x0, windows: _Windows, Mu=None, cu=None, mu0=None, subproblem=None):
    """SQP from ``x0`` (the budget-free answer) and the windows' multipliers ``mu0`` (default zero; those of the
    previous plan make a good start); ``(x, multipliers of the rows of [simple bounds; A], of the windows)`` or None.

    ``lo``/``hi`` in daqp's layout: when they are longer than the rows of ``A``, their first entries are simple
    bounds on ``x``. ``u = Mu x + cu`` (``Mu`` None: ``u = x``). ``subproblem(H, f, rows, upper, lower, start)``
    solves each iteration's QP, ``(x, multipliers)`` or None (default: daqp with the rows hard; the soft output
    bounds' exact penalty QP of :mod:`._exact_penalty` solves the same iteration with some rows soft).
    """
    subproblem = _daqp_subproblem if subproblem is None else subproblem
    H = np.asarray(H, np.float64)
    A = np.zeros((0, H.shape[0])) if A is None else np.asarray(A, np.float64)
    lo, hi = np.clip(lo, -_BIG, _BIG), np.clip(hi, -_BIG, _BIG)
    n_rows, n_a = lo.size, A.shape[0]
    x = np.asarray(x0, np.float64).copy()
    mu = np.zeros(windows.n) if mu0 is None or np.shape(mu0) != (windows.n,) else np.asarray(mu0, np.float64)
    lam = None
    # the rows [A; Jx] and bounds of every iteration's QP: A and the fixed bounds written once, the windows' rows
    # in place (the same numbers as stacking them anew)
    rows = np.empty((n_a + windows.n, H.shape[0]))
    rows[:n_a] = A
    upper = np.concatenate([hi, np.zeros(windows.n)])
    lower = np.concatenate([lo, np.full(windows.n, -_BIG)])
    # with u = x the curvature is diagonal: H + diag(d) is H with d on its diagonal, and for H exactly symmetric
    # (the dense path's, symmetrised at fit) its symmetrisation 0.5·(Hk + Hkᵀ) gives Hk itself, bit for bit
    plain = Mu is None and np.array_equal(H, H.T)
    diag = np.arange(H.shape[0]) * (H.shape[0] + 1)
    for _ in range(_MAX_ITER):
        u = x if Mu is None else Mu @ x + (0.0 if cu is None else cu)
        if Mu is None:
            g, Jx = windows.excess(u, out=rows[n_a:])
        else:
            g, Ju = windows.excess(u)
            rows[n_a:] = Jx = Ju @ Mu
        d = windows.curvature(u, mu)
        if plain:
            Hs = H + 0.0  # (the sum's zeros, as H + diag(d) writes them)
            Hs.flat[diag] += d
            f = q - d * x  # diag(d) @ x: one nonzero product per row
        else:
            L = np.diag(d) if Mu is None else (Mu.T * d) @ Mu
            Hk = H + L
            Hs, f = np.ascontiguousarray(0.5 * (Hk + Hk.T)), q - L @ x
        upper[n_rows:] = Jx @ x - g
        start = None if lam is None else np.concatenate([lam, mu])
        res = subproblem(Hs, f, rows, upper, lower, start)
        if res is None:
            return None
        x_new, all_lam = res
        lam, mu = all_lam[:n_rows], np.maximum(all_lam[n_rows:], 0.0)
        step = float(np.max(np.abs(x_new - x), initial=0.0))
        x = x_new
        if step <= _STEP_TOL * max(1.0, float(np.max(np.abs(x), initial=0.0))):
            u = x if Mu is None else Mu @ x + (0.0 if cu is None else cu)
            if float(np.max(windows.values(u), initial=-np.inf)) <= _EXCESS_TOL:
                return x, lam, mu
            return None
    return None


def _daqp_subproblem(H, f, rows, upper, lower, start):
    """One iteration's QP by daqp, every row hard (warm started from ``start``, the last multipliers)."""
    import daqp

    kw = {} if start is None else {"dual_start": start}
    x, _f, flag, info = daqp.solve(H, f, rows, upper, lower, **kw)
    if flag < 1:
        return None
    return np.asarray(x, np.float64), np.asarray(info["lam"], np.float64)
