"""The fast path of every controller: a QP set up once, whose vectors alone change from plan to plan (a dense
active-set solve, warm started, where it applies: :class:`_DenseQP`, :class:`_DenseSoftQP`, :class:`_BoxQP`; else
OSQP).

``min ½ zᵀPz + qᵀz  s.t.  l <= A z <= u`` with ``P`` and ``A`` fixed at fit; a plan updates ``q``, ``l``, ``u``
and re-solves (warm started). The settings are tight (1e-7) so that the fast path agrees with the cvxpy problem.

References
----------
Stellato B. et al. (2020), OSQP: an operator splitting solver for quadratic programs, Math. Prog. Comp.
"""

from __future__ import annotations

import contextlib

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ._budget_sqp import solve_budgeted
from ._exact_penalty import ExactPenaltyQP

__all__: list = []


def _osqp_settings(tight: bool):
    """OSQP settings (tight: 1e-7 tolerances, for plans that must match the cvxpy path) for OSQP 0.6 and 1.x."""
    import osqp

    old = str(getattr(osqp, "__version__", "1")).startswith("0.")
    s = {"verbose": False, "eps_abs": 1e-7 if tight else 1e-5, "eps_rel": 1e-7 if tight else 1e-5,
         "max_iter": 20000, "eps_prim_inf": 1e-7, "eps_dual_inf": 1e-7}
    s.update({"polish": True, "warm_start": True} if old else {"polishing": True, "warm_starting": True})
    return s


class _Silent:
    """A stream that swallows what is written to it (OSQP 1.x prints while polishing, even when not verbose)."""

    def write(self, text):
        return len(text)

    def flush(self):
        pass


_SILENT = _Silent()


class _FastQP:
    """One OSQP problem ``min ½zᵀPz + qᵀz s.t. l <= Az <= u``, set up once; each solve only updates q, l, u.

    OSQP is imported and the problem set up at the first solve: behind the dense path (:class:`_DenseSoftQP`) it is
    a fallback that most controllers never call (the demo's bench set up 33 problems and solved none).
    """

    def __init__(self, P, A, n_vars, tight=True):
        self.n_vars = n_vars
        self.solver = None
        P = sp.csc_matrix(sp.triu(sp.csc_matrix(P)))
        A = sp.csc_matrix(A)
        self.n_rows = A.shape[0]
        self._problem = (P, A, tight)  # what the first solve (and a copy's) sets up

    def _setup(self):
        import osqp

        P, A, tight = self._problem
        self.solver = osqp.OSQP()
        # OSQP >= 1 asks whether a failed solve should raise; we read the status instead (older versions: no arg)
        self._solve_kw = {} if str(getattr(osqp, "__version__", "1")).startswith("0.") else {"raise_error": False}
        self.solver.setup(P, np.zeros(self.n_vars), A, -np.inf * np.ones(A.shape[0]),
                          np.inf * np.ones(A.shape[0]), **_osqp_settings(tight))

    def __getstate__(self):
        """A copy or a pickle keeps the problem, not OSQP's workspace (it holds its extension module); the copy
        sets the problem up again at its first solve and starts cold, as after :meth:`reset` (answers within
        OSQP's tolerance)."""
        state = dict(self.__dict__)
        state["solver"] = None
        return state

    def reset(self):
        """Forget the warm start (the next solve starts from zero, as after setup)."""
        if self.solver is not None:
            self.solver.warm_start(x=np.zeros(self.n_vars), y=np.zeros(self.n_rows))

    def solve(self, q, l, u):
        if self.solver is None:
            self._setup()
        self.solver.update(q=q, l=l, u=u)
        # OSQP 1.x writes "Polishing not needed ..." to sys.stdout even when not verbose
        with contextlib.redirect_stdout(_SILENT):
            res = self.solver.solve(**self._solve_kw)
        status = str(res.info.status).lower()
        if status == "solved":
            return res.x, "optimal", ""
        if status == "solved inaccurate":
            return res.x, "optimal_inaccurate", ""
        kind = "infeasible" if "infeasible" in status else "failed"
        return None, kind, f"OSQP returned '{res.info.status}'"


_BIG = 1e30  # daqp's "no bound"


def dense_solver_available() -> bool:
    """Whether the dense active-set solver (``daqp``, a core dependency since the demo relies on it) is installed."""
    try:
        import daqp  # noqa: F401
    except ImportError:
        return False
    return True


class _DenseQP:
    """A dense dual active-set QP (daqp), set up once and warm started from the last active set.

    ``min ½zᵀHz + qᵀz s.t. l <= [I; A] z <= u`` with ``H`` positive definite: the first ``n`` rows are simple
    bounds on ``z``, the others the rows of ``A``; the same layout of ``q``, ``l``, ``u`` as :class:`_FastQP`'s
    (whose constraint matrix is ``[I; A]``), so the two are interchangeable; with ``simple=False`` every row is a
    row of ``A`` (no simple bounds). Active-set solutions are exact up to
    rounding (no iteration tolerance), which is why plans from it agree with the cvxpy path to ~1e-9.

    References
    ----------
    Arnström D., Bemporad A., Axehill D. (2022), A dual active-set solver for embedded quadratic programming using
    recursive LDLᵀ updates, IEEE Trans. Automatic Control 67:4362–4369.
    """

    label = "DAQP (dense, warm)"

    def __init__(self, H, A_rows, n_vars, simple=True):
        import daqp

        self.n_vars = n_vars
        self._H = np.ascontiguousarray(H, dtype=np.float64)
        self._A = np.ascontiguousarray(A_rows if A_rows is not None else np.zeros((0, n_vars)), dtype=np.float64)
        self._daqp = daqp
        # ``simple=False``: no simple bounds, every row is a row of ``A_rows`` (daqp counts as simple bounds the
        # bounds beyond the rows of A)
        n_simple = n_vars if simple else 0
        self.n_rows = n_simple + self._A.shape[0]
        self._model = None
        self._mu = None  # the budget windows' multipliers of the last budgeted solve (its warm start)
        self.lam = None  # the multipliers of the last solve, one per row (upper bound active: > 0, lower: < 0)

    def reset(self):
        """Forget the warm start (the next solve sets the problem up afresh)."""
        self._model, self._mu = None, None

    def __getstate__(self):
        """A copy or a pickle keeps the problem and drops the solver's module and warm start (neither can be
        pickled); its first solve sets the problem up afresh, so it gives the same answers."""
        state = dict(self.__dict__)
        state.update(_daqp=None, _model=None, _mu=None)
        return state

    def __setstate__(self, state):
        import daqp

        self.__dict__.update(state)
        self._daqp = daqp

    def solve(self, q, l, u):
        lo = np.clip(np.asarray(l, np.float64), -_BIG, _BIG)
        hi = np.clip(np.asarray(u, np.float64), -_BIG, _BIG)
        return self.solve_finite(np.asarray(q, np.float64), lo, hi)

    def solve_budgeted(self, q, l, u, windows, Mu=None):
        """:meth:`solve` with the energy-budget windows (:mod:`._budget_sqp`) on the inputs ``Mu x`` (None: ``x``);
        ``(None, "budget", why)`` where the dense route does not settle (the caller then solves the cvxpy problem)."""
        x0, status, reason = self.solve(q, l, u)
        if x0 is None:
            return None, status, reason
        res = solve_budgeted(self._H, np.asarray(q, np.float64), self._A, np.asarray(l, np.float64),
                             np.asarray(u, np.float64), x0, windows, Mu, mu0=self._mu)
        if res is None:
            self._mu = None
            return None, "budget", "energy budget binding; the dense budget iteration did not settle"
        self.lam, self._mu = res[1], res[2]
        return res[0], "optimal", ""

    def solve_finite(self, q, lo, hi):
        """:meth:`solve` for float64 vectors whose bounds are finite already (no conversion: the live-loop path)."""
        if self._model is None:
            self._model = self._daqp.Model()
            flag = self._model.setup(self._H, q, self._A, hi, lo)
            flag = flag[0] if isinstance(flag, tuple) else flag
            if flag < 0:
                self._model = None
                return None, "failed", f"DAQP setup failed (exit flag {flag})"
        else:
            self._model.update(f=q, bupper=hi, blower=lo)
        x, _fval, flag, info = self._model.solve()
        if flag >= 1:
            self.lam = info.get("lam") if isinstance(info, dict) else None
            return np.asarray(x, np.float64), "optimal", ""
        self._model = None  # start the next solve afresh
        kind = "infeasible" if flag == -1 else "failed"
        return None, kind, f"DAQP returned exit flag {flag}"


def _positive_definite(H) -> bool:
    """Whether the symmetric ``H`` is positive definite with room to spare (no flat direction for DAQP)."""
    ev = np.linalg.eigvalsh(0.5 * (H + H.T))
    return bool(ev[0] > 1e-10 * max(ev[-1], 1e-300))


class _DenseSoftQP:
    """Soft output bounds on the dense path: the exact dense QP with them held hard, OSQP with the slack otherwise.

    The OSQP problem :class:`_FastQP` solves is ``min ½xᵀPx + qₓᵀx + q_tᵀt`` over ``z = [x; t]`` (``t >= 0`` the
    slack of the soft output rows, with costs ``q_t``), ``l <= A z <= u``. Held hard (``t = 0``), the output rows
    leave a QP in ``x`` alone, which the dense active-set solver (:class:`_DenseQP`, warm started) solves exactly,
    with its multipliers ``λ``. If that QP is feasible and every slack's column ``c_j`` of ``A`` prices it within
    its cost (``Σᵢ |c_ij| |λᵢ| <= q_t,j``), then ``(x, t = 0)`` with the same ``λ`` meets the KKT conditions of the
    problem with the slack, so it is its optimum (the problem is convex; common practice, no source: an exact
    penalty above the multiplier leaves the constraint hard). Otherwise (a bound that cannot be held, or held at a
    higher price than its penalty) OSQP solves the problem with the slack.

    Rows whose bounds are always equal (``eq_rows``: DeePC's ``E g = [u_past; 0]``) are eliminated first,
    ``x = A_eq⁺ b + Z w`` with ``Z`` a basis of the null space of ``A_eq``: ``P`` may be singular (DeePC's Hessian
    with outputs of zero weight) while ``ZᵀPZ`` is positive definite, and the problem in ``w`` is smaller.
    """

    label = "DAQP (dense, warm; exact penalty QP where an output bound takes slack)"

    def __init__(self, osqp, dense, n_x, rows, out, elim):
        self._osqp, self._dense, self._n_x, self._rows = osqp, dense, n_x, rows
        self._out = out  # (positions among the dense rows, |A[those rows, t columns]|), or None without slack
        self._elim = elim  # (P, A_eq⁺, Z, rows of A_eq, A_rest) or None
        self.n_vars, self.n_rows = osqp.n_vars, osqp.n_rows
        self.n_dense_, self.n_osqp_, self.n_exact_ = 0, 0, 0
        self._uz = None
        self._exact = None  # the exact penalty QP (:mod:`._exact_penalty`) where a bound takes slack

    @classmethod
    def around(cls, osqp, P, A, n_x, eq_rows=None):
        """The dense path for the OSQP problem ``(P, A)`` of ``osqp`` (``x`` its first ``n_x`` variables), or
        None when it does not apply (daqp missing, no positive definite Hessian). ``eq_rows``: a mask of the rows
        of ``A`` whose lower and upper bounds are always equal."""
        if not dense_solver_available():
            return None
        P, A = sp.csr_matrix(P), sp.csr_matrix(A)
        H = P[:n_x, :n_x].toarray()
        H = 0.5 * (H + H.T)
        Ax, At = A[:, :n_x].toarray(), np.abs(A[:, n_x:].toarray())
        eq = np.zeros(A.shape[0], bool) if eq_rows is None else np.asarray(eq_rows, bool)
        # every row but the equalities and those free of x: the slack's own bounds (t >= 0), and output rows that no
        # input moves (their slack is fixed by the data, whatever x is: they do not change the optimum in x)
        rows = np.flatnonzero(np.any(Ax != 0, axis=1) & ~eq)
        elim, Hr, Ar = None, H, Ax[rows]
        if eq.any():
            A_eq = Ax[eq]
            Z = sla.null_space(A_eq)
            if Z.shape[1] == 0 or np.linalg.matrix_rank(A_eq) < A_eq.shape[0]:
                return None
            elim = (H, np.linalg.pinv(A_eq), Z, np.flatnonzero(eq), Ar)
            Hr, Ar = Z.T @ H @ Z, Ar @ Z
        if not _positive_definite(Hr):
            return None
        n_w = Hr.shape[0]
        simple = elim is None and rows.size >= n_w and np.array_equal(Ar[:n_w], np.eye(n_w))
        dense = _DenseQP(Hr, Ar[n_w:] if simple else Ar, n_w, simple=simple)
        out = np.flatnonzero(np.any(At[rows] != 0, axis=1))
        qp = cls(osqp, dense, n_x, rows, None if not out.size else (out, At[rows][out]), elim)
        if out.size and np.all(np.count_nonzero(At[rows][out], axis=1) == 1):  # one slack per soft row
            C = At[rows][out]
            qp._exact = ExactPenaltyQP(Hr, dense._A, simple, out, np.argmax(C, axis=1), np.max(C, axis=1), C.shape[1])
        return qp

    def reset(self):
        self._dense.reset()
        self._osqp.reset()
        if self._exact is not None:
            self._exact.reset()

    def solve(self, q, l, u):
        q, l, u = (np.asarray(v, np.float64) for v in (q, l, u))
        n = self._n_x
        qx, lo, hi, xp = self._reduced(q, l, u)
        w, status, reason = self._dense.solve(qx, lo, hi)
        x = w if w is None or xp is None else xp + self._elim[2] @ w
        if x is not None and self._priced_within(q[n:]):
            self.n_dense_ += 1
            return np.concatenate([x, np.zeros(self.n_vars - n)]), status, reason
        w = None if self._exact is None else self._exact.solve(qx, lo, hi, q[n:])
        if w is not None:  # the bounds that take slack, exactly: x, and the slack it leaves (t = κ·s of OSQP's)
            self.n_exact_ += 1
            x = w if xp is None else xp + self._elim[2] @ w
            return np.concatenate([x, self._exact.slack_]), "optimal", ""
        self.n_osqp_ += 1
        return self._osqp.solve(q, l, u)

    def solve_budgeted(self, q, l, u, windows, Usel=None):
        """:meth:`solve` with the energy-budget windows (:mod:`._budget_sqp`) on the inputs ``Usel x`` (None:
        ``x``), the output bounds held hard; ``(None, "budget", why)`` where that is not the optimum or the
        iteration does not settle (the caller then solves the cvxpy problem)."""
        q, l, u = (np.asarray(v, np.float64) for v in (q, l, u))
        n = self._n_x
        qx, lo, hi, xp = self._reduced(q, l, u)
        Mu, cu = Usel, None
        if xp is not None:
            Z = self._elim[2]
            if Usel is not None and (self._uz is None or self._uz[0] is not Usel):
                self._uz = (Usel, Usel @ Z)  # the inputs' map of w, the same for every plan
            Mu, cu = (Z, xp) if Usel is None else (self._uz[1], Usel @ xp)
        w0, status, reason = self._dense.solve(qx, lo, hi)
        res = None if w0 is None else solve_budgeted(self._dense._H, qx, self._dense._A, lo, hi, w0, windows, Mu,
                                                      cu, mu0=self._dense._mu)
        self._dense._mu = None if res is None else res[2]
        slack = np.zeros(self.n_vars - n)
        if res is None or not self._priced_within(q[n:], res[1]):
            res = self._exact_budgeted(q[n:], qx, lo, hi, windows, Mu, cu)
            if res is None:
                return None, "budget", "energy budget binding; the dense budget iteration did not settle"
            slack = self._exact.slack_
            self.n_exact_ += 1
        else:
            self.n_dense_ += 1
        x = res[0] if xp is None else xp + self._elim[2] @ res[0]
        return np.concatenate([x, slack]), "optimal", ""

    def _exact_budgeted(self, q_t, qx, lo, hi, windows, Mu, cu):
        """The budget iteration with the output bounds soft (:mod:`._exact_penalty` for each of its QPs), from the
        budget-free optimum; None where it does not apply or settle."""
        x0 = None if self._exact is None else self._exact.solve(qx, lo, hi, q_t)
        if x0 is None:
            return None
        return solve_budgeted(self._dense._H, qx, self._dense._A, lo, hi, x0, windows, Mu, cu,
                              subproblem=self._exact.budget_subproblem(q_t))

    def _reduced(self, q, l, u):
        """The dense problem's ``q``, lower and upper bounds, and the particular solution ``xp`` of the eliminated
        equalities (``x = xp + Z w``; None when there are none)."""
        qx, lo, hi = q[:self._n_x], l[self._rows], u[self._rows]
        if self._elim is None:
            return qx, lo, hi, None
        H, pinv, Z, eq, Ar = self._elim  # x = A_eq⁺ b + Z w
        xp = pinv @ l[eq]
        shift = Ar @ xp
        return Z.T @ (H @ xp + qx), lo - shift, hi - shift, xp

    def _priced_within(self, q_t, lam=None) -> bool:
        if self._out is None:
            return True
        pos, C = self._out
        lam = self._dense.lam if lam is None else lam
        if lam is None:
            return False
        price = C.T @ np.abs(np.asarray(lam, np.float64)[pos])
        return bool((price <= q_t * (1.0 - 1e-9)).all())


class _BoxQP:
    """``min ½zᵀHz + qᵀz s.t. l <= z <= u`` (bounds only) by a primal-dual active-set method, warm started.

    Each iteration solves the problem with the bounds of the current active set held as equalities: on the few
    free variables (``H_FF`` factorised) when most bounds are active, else through the precomputed ``H⁻¹`` and the
    Schur complement ``(H⁻¹)_AA`` of the active ones. The sets are then updated from the primal violations and the
    signs of the multipliers (Hintermüller, Ito & Kunisch 2002, "The primal-dual active set strategy as a semismooth
    Newton method", SIAM J. Optim. 13:865–888). It stops when the KKT conditions hold (rounding level: the answer is
    exact, like an active-set solver's) and falls back to the dense dual active-set solver when they do not within
    :attr:`max_iter` iterations. A warm start from the last active set makes a loop's step one or two iterations
    costing ``O(n²)`` at most, where a dual active-set solver pays ``O(n²)`` per active bound it keeps.
    """

    label = "box active set (dense, warm)"
    max_iter = 25

    def __init__(self, H, n_vars):
        import scipy.linalg as sla

        self.n_vars = n_vars
        self._H = np.ascontiguousarray(H, dtype=np.float64)
        self._Hinv = sla.cho_solve(sla.cho_factor(self._H), np.eye(n_vars))
        self._posv = sla.get_lapack_funcs("posv", (self._H,))
        self._fallback = _DenseQP(self._H, None, n_vars)
        self._state = np.zeros(n_vars, np.int8)  # -1 at the lower bound, +1 at the upper, 0 free
        self.n_iter_, self.n_fallback_ = 0, 0

    def reset(self):
        """Forget the warm start (the next solve starts with every variable free)."""
        self._state[:] = 0
        self._fallback.reset()

    def solve(self, q, l, u):
        lo = np.clip(np.asarray(l, np.float64), -_BIG, _BIG)
        hi = np.clip(np.asarray(u, np.float64), -_BIG, _BIG)
        return self.solve_finite(np.asarray(q, np.float64), lo, hi)

    def _equality_solve(self, q, lo, hi, s):
        """``z`` and the gradient ``g = Hz + q`` with the active bounds held (``g`` is zero on the free ones)."""
        free = s == 0
        z = np.where(s > 0, hi, lo)
        z[free] = 0.0
        n_free = int(np.count_nonzero(free))
        if 2 * n_free <= self.n_vars:
            g = self._H @ z
            g += q
            if n_free:
                F = np.flatnonzero(free)
                HF = self._H[:, F]
                _, c, info = self._posv(HF[F], -g[F])
                if info:
                    raise np.linalg.LinAlgError("singular free block")
                z[F] = c
                g += HF @ c
                g[F] = 0.0
            return z, g
        hq = self._Hinv @ q
        if n_free == self.n_vars:
            return -hq, np.zeros(self.n_vars)
        A = np.flatnonzero(~free)
        HA = self._Hinv[:, A]
        _, nu, info = self._posv(HA[A], -(z[A] + hq[A]))
        if info:
            raise np.linalg.LinAlgError("singular active block")
        zA = z[A]
        z = -hq
        z -= HA @ nu
        z[A] = zA
        g = np.zeros(self.n_vars)
        g[A] = -nu
        return z, g

    def solve_finite(self, q, lo, hi):
        """:meth:`solve` for float64 vectors whose bounds are finite already."""
        s = self._state
        s[((s < 0) & (lo <= -_BIG)) | ((s > 0) & (hi >= _BIG))] = 0  # no bound to hold there
        tol = 1e-12 * max(1.0, float(np.abs(q).max()))
        for it in range(self.max_iter):
            try:
                z, g = self._equality_solve(q, lo, hi, s)
            except np.linalg.LinAlgError:
                break
            new = (z > hi).view(np.int8) - (z < lo).view(np.int8)  # free ones that break a bound
            keep = s * g <= tol  # active ones whose multiplier has its sign (g >= 0 at lower, <= 0 at upper)
            keep &= s != 0
            new[keep] = s[keep]
            if (new == s).all():
                self.n_iter_ = it + 1
                return z, "optimal", ""
            s[:] = new
        self.n_fallback_ += 1
        s[:] = 0
        return self._fallback.solve_finite(q, lo, hi)
