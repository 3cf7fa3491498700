"""Soft output bounds that cannot all be held, solved exactly on the dense path: the ℓ1 exact-penalty QP.

The controllers' problem with soft output bounds (:mod:`.condensed`, :mod:`.data`) is, in the variables ``x`` of the
dense QP (the inputs, or DeePC's reduced weights) and the slack ``s >= 0`` of the soft rows::

    minimise ½ xᵀHx + qᵀx + Σ_j q_t,j s_j   s.t.  lo <= A x <= hi (hard rows),  a_i x − c_i s_j <= hi_i,
                                                  a_i x + c_i s_j >= lo_i (soft rows, slack column j of row i)

With one slack per row (a slack shared by the two sides of one output, which cannot both be broken) this is the
exact-penalty problem ``min ½ xᵀHx + qᵀx + Σ_i w_i dist(a_i x, [lo_i, hi_i])`` with ``w_i = q_t,j / c_i``: the same
objective as the cvxpy problem's ``ρ Σ s`` (``s`` the optimal slack), over ``x`` alone. Its optimum is unique when
``H`` is positive definite (strictly convex; the slack of the optimum is then ``dist(a_i x, [lo_i, hi_i])``).

Method. An active set over the soft rows: each is *held* (a hard row, multiplier ``λ_i``) or *broken* on one side
``σ_i = ±1`` (left out of the rows, its penalty ``σ_i w_i a_i x`` added to the linear term). Each set is an
ordinary strictly convex QP, which the dense dual active-set solver (daqp, tight tolerances, warm started from the
last set) solves exactly. The optimality conditions of the penalty problem (Nocedal & Wright 2006, Numerical
Optimization, 2nd ed., Sec. 17.2: the ℓ1 penalty's subgradient; from memory) are, for every soft row: held with
``|λ_i| <= w_i``, or broken with the violation ``σ_i (a_i x − bound) >= 0``. A held row whose multiplier exceeds
its price is broken on the side of its multiplier, a broken row found inside its bound is held again, until both
hold; the answer is then checked against every condition (stationarity, the hard rows, the soft rows' sides and
prices) and returned with its multipliers, else None (the caller falls back to OSQP and then the cvxpy problem).

Feasibility of every set. The first set breaks the rows that the solution with only the hard rows breaks, so that
solution is feasible for it; afterwards a row is broken only where it was active (multiplier beyond its price) and
held only where the last answer keeps it, so the last answer is feasible for the next set. A set revisited (a cycle)
ends the method (None). A warm start from the previous plan's set is used when its QP is feasible.
"""

from __future__ import annotations

import numpy as np

__all__: list = []

_BIG = 1e30  # daqp's "no bound"
_MAX_SETS = 60
# daqp's tolerances: a row is added once it is broken by more than primal_tol (absolute; the default 1e-6 leaves
# answers that far from a bound); the others as daqp's defaults
_SETTINGS = {"primal_tol": 1e-11, "dual_tol": 1e-12}
_PRICE_RTOL = 1e-9  # a held row's multiplier above w_i (1 + this) breaks it
_SIDE_TOL = 1e-11  # a broken row this far inside its bound (relative to max(1, |bound|)) is held again
_KKT_RTOL = 1e-7  # stationarity of the answer, relative to the largest term of the gradient


class ExactPenaltyQP:
    """``min ½xᵀHx + qᵀx + Σ_i w_i dist(a_i x, [lo_i, hi_i])`` over the soft rows ``i``, the other rows hard.

    Parameters
    ----------
    H : ndarray, shape (n, n)
        Positive definite.
    A : ndarray, shape (n_A, n)
        The rows beyond the simple bounds.
    simple : bool
        Whether the first ``n`` entries of the bound vectors are simple bounds on ``x`` (daqp's layout).
    soft : ndarray of int
        Positions of the soft rows in the bound vectors.
    slack_col, slack_coef : ndarray, shape (n_soft,)
        The slack column of each soft row and the magnitude of its coefficient: ``w_i = q_t[slack_col] / coef``.
    n_slack : int
        The number of slack columns (two rows, the two sides of one output, may share one).

    Attributes
    ----------
    slack_ : ndarray, shape (n_slack,)
        The slack of the last answer, ``max_i dist(a_i x, [lo_i, hi_i]) / c_i`` over the rows of each column.
    """

    def __init__(self, H, A, simple: bool, soft, slack_col, slack_coef, n_slack: int):
        import daqp

        self._daqp = daqp
        self._H = np.ascontiguousarray(H, np.float64)
        n = self._H.shape[0]
        self._A = np.ascontiguousarray(A if A is not None else np.zeros((0, n)), np.float64)
        self._n_simple = n if simple else 0
        self._rows = np.vstack([np.eye(n), self._A]) if simple else self._A
        self._soft = np.asarray(soft, np.intp)
        self._S = self._rows[self._soft]
        self._col, self._coef = np.asarray(slack_col, np.intp), np.asarray(slack_coef, np.float64)
        self._sign = None  # the last plan's set (0 held, ±1 broken on that side): the next plan's warm start
        self._model = None
        self.n_sets_ = 0  # QPs solved by the last call
        self.lam = None  # multipliers of the last answer, one per row (broken soft rows: σ_i w_i)
        self.slack_ = np.zeros(int(n_slack))

    def __getstate__(self):
        state = dict(self.__dict__)
        state.update(_daqp=None, _model=None, _sign=None)
        return state

    def __setstate__(self, state):
        import daqp

        self.__dict__.update(state)
        self._daqp = daqp

    def reset(self):
        self._sign, self._model = None, None

    def solve(self, q, lo, hi, q_t):
        """The optimum ``x`` (or None where the method does not settle or the check fails)."""
        q, lo, hi = (np.asarray(v, np.float64) for v in (q, lo, hi))
        lo, hi = np.clip(lo, -_BIG, _BIG), np.clip(hi, -_BIG, _BIG)
        w = np.asarray(q_t, np.float64)[self._col] / self._coef
        sign, seen, x = self._sign, set(), None
        if sign is not None:
            x, lam = self._set_qp(q, lo, hi, w, sign)
        if x is None:
            sign, x, lam = self._first_set(q, lo, hi, w)
        self.n_sets_ = 1
        while x is not None and self.n_sets_ <= _MAX_SETS:
            key = sign.tobytes()
            if key in seen:
                break
            seen.add(key)
            new = self._next_set(x, lam, lo, hi, w, sign)
            if new is None:
                return self._checked(x, lam, q, lo, hi, w, sign)
            sign = new
            x, lam = self._set_qp(q, lo, hi, w, sign)
            self.n_sets_ += 1
        self._sign = None
        return None

    def budget_subproblem(self, q_t):
        """The QP of each iteration of the energy-budget SQP (:func:`._budget_sqp.solve_budgeted`, argument
        ``subproblem``) with these soft rows: the iteration's Hessian and rows (the windows' rows appended, hard),
        the set of broken rows carried from one iteration to the next; the answer's slack in :attr:`slack_`."""
        carry = [self._sign]

        def solve(H, f, rows, upper, lower, _start):
            qp = ExactPenaltyQP(H, rows, self._n_simple > 0, self._soft, self._col,
                                self._coef, self.slack_.size)
            qp._sign = carry[0]
            x = qp.solve(f, lower, upper, q_t)
            if x is None:
                return None
            carry[0], self.slack_, self._sign = qp._sign, qp.slack_, qp._sign
            return x, qp.lam

        return solve

    # ------------------------------------------------------------------------------------ the sets
    def _first_set(self, q, lo, hi, w):
        """The set of the rows broken by the solution with only the hard rows (None where even that fails)."""
        free = np.zeros(self._soft.size, np.int8)
        x, _ = self._set_qp(q, lo, hi, w, free, penalise=False)
        if x is None:
            return free, None, None
        a = self._S @ x
        sign = (a > hi[self._soft]).astype(np.int8) - (a < lo[self._soft]).astype(np.int8)
        x, lam = self._set_qp(q, lo, hi, w, sign)
        return sign, x, lam

    def _set_qp(self, q, lo, hi, w, sign, penalise=True):
        """The QP of one set: held soft rows hard, broken ones out (their penalty in the linear term when
        ``penalise``; else every soft row out, no penalty). Returns ``(x, λ)`` or ``(None, None)``."""
        out = sign != 0 if penalise else np.ones(sign.size, bool)
        lo2, hi2 = lo.copy(), hi.copy()
        lo2[self._soft[out]], hi2[self._soft[out]] = -_BIG, _BIG
        f = q + (sign * w) @ self._S if penalise else q
        if self._model is None:
            self._model = self._daqp.Model()
            flag = self._model.setup(self._H, f, self._A, hi2, lo2)
            if (flag[0] if isinstance(flag, tuple) else flag) < 0:
                self._model = None
                return None, None
            settings = self._model.settings
            settings.update(_SETTINGS)
            self._model.settings = settings
        else:
            self._model.update(f=f, bupper=hi2, blower=lo2)
        x, _fval, flag, info = self._model.solve()
        if flag < 1:
            self._model = None  # the next QP sets up afresh
            return None, None
        return np.asarray(x, np.float64), np.asarray(info["lam"], np.float64)

    def _next_set(self, x, lam, lo, hi, w, sign):
        """The next set, or None when every soft row meets its condition (held within its price, broken on its
        side)."""
        a = self._S @ x
        lo_s, hi_s = lo[self._soft], hi[self._soft]
        inside = np.where(sign > 0, a - hi_s, lo_s - a)
        drop = (sign != 0) & (inside < -_SIDE_TOL * np.maximum(1.0, np.abs(np.where(sign > 0, hi_s, lo_s))))
        lam_s = lam[self._soft]
        add = (sign == 0) & (np.abs(lam_s) > w * (1.0 + _PRICE_RTOL))
        if not drop.any() and not add.any():
            return None
        new = sign.copy()
        new[drop] = 0
        new[add] = np.sign(lam_s[add]).astype(np.int8)
        return new

    def _checked(self, x, lam, q, lo, hi, w, sign):
        """``x`` when it meets the optimality conditions of the penalty problem (multipliers ``σ_i w_i`` on the
        broken rows), else None."""
        lam = lam.copy()
        lam[self._soft[sign != 0]] = (sign * w)[sign != 0]
        grad_terms = (self._H @ x, q, self._rows.T @ lam)
        g = grad_terms[0] + grad_terms[1] + grad_terms[2]
        scale = max(1.0, *(float(np.max(np.abs(t), initial=0.0)) for t in grad_terms))
        r = self._rows @ x
        held = np.ones(r.size, bool)
        held[self._soft[sign != 0]] = False
        tol = 1e-9 * np.maximum(1.0, np.maximum(np.abs(np.where(lo > -_BIG, lo, 0)), np.abs(np.where(hi < _BIG, hi, 0))))
        # complementarity: a row's multiplier only where it is at the bound of its sign
        slack_of_lam = np.where(lam > 0, hi - r, np.where(lam < 0, r - lo, 0.0))
        ok = (float(np.max(np.abs(g), initial=0.0)) <= _KKT_RTOL * scale
              and np.all((r[held] >= lo[held] - tol[held]) & (r[held] <= hi[held] + tol[held]))
              and np.all(np.abs(slack_of_lam[held]) <= 1e3 * tol[held])
              and np.all(np.abs(lam[self._soft]) <= w * (1.0 + 1e-7)))
        broken_cols = self._col[sign != 0]
        if not ok or np.unique(broken_cols).size < broken_cols.size:  # one column broken on two rows: not this
            self._sign = None                                              # problem's cost (one slack for both)
            return None
        s = np.maximum(np.maximum(r[self._soft] - hi[self._soft], lo[self._soft] - r[self._soft]), 0.0) / self._coef
        self.slack_ = np.zeros(self.slack_.size)
        np.maximum.at(self.slack_, self._col, s)
        self._sign, self.lam = sign, lam
        return x
