"""Finite-horizon predictive control of stimulation under declared limits, for both routes.

Each controller builds its cvxpy problem **once** (in :meth:`fit`) with Parameters for everything that changes
from one plan to the next (the measured past through the predicted free response, the target, the step bounds),
so the problem is DPP and a plan only assigns ``.value`` and re-solves. A second, faster path for closed loops
sets up one OSQP problem from the same matrices and only updates its vectors; both paths give the same plan
(tested). The fast path exists for quadratic programs (no L1 regulariser); otherwise plans use the cvxpy problem,
and so does a plan whose OSQP solve fails. With an energy budget the fast QP leaves the budget out and its answer is
kept only when it uses less than the budget (then it is the optimum of the budgeted convex problem as well); when
the budget binds, the plan solves the cvxpy cone program. For DeePC without output bounds the fast path
minimises the Hankel weights out in closed form once, so its QP is in the inputs alone.

Problem solved over the horizon ``k = 0 … N−1`` (inputs ``u_k``, predicted outputs ``ŷ_k``)::

    minimise    Σ_k ‖ŷ_k − r_k‖²_Q  +  Σ_k ‖u_k‖²_R  [+ ‖x_N − x_T‖²_P]  [+ route terms]  +  ρ Σ s
    subject to  lo_i <= u_ik <= hi_i                     (amplitude ∩ charge-density bound, hard)
                |u_ik − u_i,k−1| <= slew_i, u_−1 = last applied input                     (hard)
                ‖vec(u)‖₂ <= sqrt(E)                    (energy budget, second-order cone, hard)
                y_min − s <= ŷ <= y_max + s,  s >= 0      (output bounds, soft; exact L1 penalty ρ)

* indirect (:class:`ModelPredictiveController`): ``ŷ = G u + Φ x̂`` from a :class:`StateSpaceModel`, with
  ``x̂`` from the model's Kalman predictor over the measured past; condensed or sparse (states as variables).
  The target is an output trajectory, or a state (then the state cost replaces the output cost).
* direct, SPC (:class:`DataPredictiveController` with an ``LsqPredictor``): ``ŷ = Kp [u_past; y_past] + Kf u``.
* direct, DeePC (with a ``HankelPredictor``): ``ŷ = Yf g`` with ``Up g = u_past``, ``Uf g = u``, route terms
  ``λ_y ‖Yp g − y_past‖² + λ_g R(g)`` (the slack on past outputs and the predictor's regulariser and strengths),
  on the predictor's (compressed) blocks.

Safety. Every returned input sequence respects the hard limits. Before a solve the step bounds are checked
(the slew window of the first step against the amplitude window, and the energy of the safe sequence); after a
solve the answer is verified, clipped onto the exact bounds when it exceeds them by solver tolerance only, and
re-checked. A plan that cannot be solved (limits conflict, solver failure, infeasible data constraints) carries
the safe fallback of :meth:`StimLimits.safe_inputs`: towards zero stimulation as fast as the slew limit allows,
inside the amplitude window. The only case where that fallback itself breaks a limit is when no input sequence
can meet the limits at all (the last applied input lies outside the amplitude window, or even the fallback's
least-energy sequence exceeds the energy budget); the plan then says so (status ``"infeasible"``).

References
----------
Rawlings J.B., Mayne D.Q., Diehl M.M. (2017), Model Predictive Control: Theory, Computation, and Design, 2nd ed.
Coulson J., Lygeros J., Dörfler F. (2019), Data-Enabled Predictive Control: In the Shallows of the DeePC, ECC.
Favoreel W., De Moor B., Van Overschee P. (1999), SPC: Subspace Predictive Control, IFAC World Congress.
Stellato B. et al. (2020), OSQP: an operator splitting solver for quadratic programs, Math. Prog. Comp.
"""

from __future__ import annotations

import contextlib
import textwrap
import time
import warnings
from dataclasses import dataclass, replace as _replace

import cvxpy as cp
import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ..sysid._base import check_fitted
from ..sysid.exceptions import NotFittedError, SessionError
from ..sysid.statespace import StateSpaceModel
from .cli import CAUTION
from .limits import StimLimits

__all__ = [
    "Plan",
    "ModelPredictiveController",
    "DataPredictiveController",
    "condensed_prediction",
    "controller_for",
    "parse_target",
    "write_plan",
    "PlanRun",
    "plan_to_folder",
]

_ACCEPT = {cp.OPTIMAL: "optimal", cp.OPTIMAL_INACCURATE: "optimal_inaccurate"}
# Clarabel's default tolerances (1e-8) leave plans ~1e-5 apart on flat objectives; tighter ones cost a few
# iterations and make the plain path a reference for the fast one. solver_options override these.
_CVX_DEFAULTS = {"CLARABEL": {"tol_gap_abs": 1e-9, "tol_gap_rel": 1e-9, "tol_feas": 1e-9}}
# An answer that breaks a hard bound by more than this (relative to the bound scale) is a failed solve.
_ACCEPT_RTOL = 1e-5


# ---------------------------------------------------------------------------------------------------- the plan
@dataclass(frozen=True)
class Plan:
    """A stimulation plan over a horizon, with everything needed to judge it.

    Attributes
    ----------
    inputs : ndarray, shape (horizon_steps, n_inputs)
        Stimulation amplitudes, µA, in the limits' physical units. Always inside the hard limits (see ``status``
        for the one documented exception).
    predicted_outputs : ndarray, shape (horizon_steps, n_outputs)
        The controller's prediction of the outputs under ``inputs``.
    target : ndarray, shape (horizon_steps, n_outputs) or (horizon_steps, n_states)
        The tracked target (outputs, or the target state repeated, see ``target_kind``).
    target_kind : str
        ``"output"`` or ``"state"``.
    cost_terms : dict of str to float
        ``tracking``, ``input_energy``, ``output_penalty`` and, where they apply, ``terminal``,
        ``past_consistency``, ``regularizer``; ``total`` is their sum. Evaluated at the returned inputs.
    active_limits : dict
        ``amplitude_min``, ``amplitude_max``, ``charge_density``, ``slew`` → bool arrays (horizon_steps, n_inputs),
        True where that hard limit is binding; ``energy_budget`` → bool; ``output_bounds`` → bool array
        (horizon_steps, n_outputs), True where a predicted output is at or beyond its soft bound.
    output_slack : ndarray, shape (horizon_steps, n_outputs)
        How far each predicted output exceeds its soft bound (0 inside or unbounded), in the output's units.
    step_bounds : tuple of ndarray
        ``(lower, upper)``, each (horizon_steps, n_inputs): the amplitude window per step (the first step also
        within the slew window of ``last_input``), µA.
    last_input : ndarray, shape (n_inputs,)
        The input applied before the plan, µA.
    solver : str
    status : str
        ``"optimal"``, ``"optimal_inaccurate"`` (accepted after verification), ``"infeasible"`` (the limits
        conflict, or the constraints have no solution) or ``"failed"`` (the solver gave no usable answer).
    message : str
        Why a plan is not optimal, or how it was solved when the fast path had to hand over; empty otherwise.
    fallback : bool
        True when ``inputs`` are the safe fallback instead of an optimised plan.
    solve_time_s : float
        Wall time of the parameter update and solve, seconds.
    input_names, output_names : tuple of str
    output_bounds : tuple of ndarray or None
        ``(output_min, output_max)``, each (n_outputs,), ``±inf`` where unbounded; None without output bounds.
    caution : str
        :data:`stimsteer.control.cli.CAUTION`.
    """

    inputs: np.ndarray
    predicted_outputs: np.ndarray
    target: np.ndarray
    target_kind: str
    cost_terms: dict
    active_limits: dict
    output_slack: np.ndarray
    step_bounds: tuple
    last_input: np.ndarray
    solver: str
    status: str
    message: str
    fallback: bool
    solve_time_s: float
    input_names: tuple
    output_names: tuple
    output_bounds: tuple = None
    caution: str = CAUTION

    @property
    def ok(self) -> bool:
        """True for an optimised plan (not a fallback)."""
        return self.status in ("optimal", "optimal_inaccurate") and not self.fallback

    @property
    def horizon_steps(self) -> int:
        return int(self.inputs.shape[0])

    @property
    def slack_total(self) -> float:
        return float(np.sum(self.output_slack))

    def active_summary(self) -> list[str]:
        """Readable lines naming the binding limits (input or output, and the steps)."""
        lines = []
        for key in ("amplitude_min", "amplitude_max", "charge_density", "slew"):
            act = self.active_limits[key]
            for i, name in enumerate(self.input_names):
                steps = np.flatnonzero(act[:, i])
                if steps.size:
                    lines.append(f"{key} on {name} at steps {_ranges(steps)}")
        if self.active_limits["energy_budget"]:
            lines.append("energy_budget over the horizon")
        act = self.active_limits["output_bounds"]
        for j, name in enumerate(self.output_names):
            steps = np.flatnonzero(act[:, j])
            if steps.size:
                lines.append(f"output bound on {name} at steps {_ranges(steps)}")
        return lines

    def to_dict(self) -> dict:
        """A JSON-ready summary (no arrays of the plan itself: those go to the plan table)."""
        return {
            "status": self.status, "message": self.message, "fallback": bool(self.fallback),
            "solver": self.solver, "solve_time_s": float(self.solve_time_s),
            "horizon_steps": self.horizon_steps, "target_kind": self.target_kind,
            "cost_terms": {k: float(v) for k, v in self.cost_terms.items()},
            "active_limits": self.active_summary(),
            "active_counts": {k: int(np.sum(v)) for k, v in self.active_limits.items()},
            "output_slack_total": self.slack_total, "output_slack_max": float(np.max(self.output_slack, initial=0)),
            "input_energy_ua2": float(np.sum(self.inputs**2)),
            "input_names": list(self.input_names), "output_names": list(self.output_names),
            "caution": self.caution,
        }


def _ranges(steps) -> str:
    """'0-3, 7' for [0, 1, 2, 3, 7]."""
    parts, start = [], int(steps[0])
    prev = start
    for s in list(map(int, steps[1:])) + [None]:
        if s is None or s != prev + 1:
            parts.append(f"{start}" if start == prev else f"{start}-{prev}")
            start = s
        prev = s if s is not None else prev
    return ", ".join(parts)


# ---------------------------------------------------------------------------------------------------- helpers
def _sqrt_weight(name, w, dim):
    """A factor ``L`` with ``LᵀL = W`` for a scalar, per-channel vector or PSD matrix weight."""
    W = np.asarray(w, dtype=np.float64)
    if W.ndim == 0:
        W = np.full(dim, float(W))
    if not np.all(np.isfinite(W)):
        raise SessionError(f"{name} must be finite; got {w!r}.")
    if W.ndim == 1:
        if W.shape != (dim,) or np.any(W < 0):
            raise SessionError(f"{name} must be a non-negative number, {dim} non-negative values or a ({dim}, {dim})"
                               f" PSD matrix; got {W.tolist() if W.size < 20 else W.shape}.")
        return np.diag(np.sqrt(W))
    if W.shape != (dim, dim) or not np.allclose(W, W.T, atol=1e-12 * max(1.0, np.abs(W).max())):
        raise SessionError(f"{name} as a matrix must be symmetric with shape ({dim}, {dim}); got {W.shape}.")
    ev, V = np.linalg.eigh(0.5 * (W + W.T))
    if ev.min() < -1e-10 * max(1.0, ev.max()):
        raise SessionError(f"{name} must be positive semidefinite; its smallest eigenvalue is {ev.min():.3g}.")
    return np.sqrt(np.clip(ev, 0, None))[:, None] * V.T


def condensed_prediction(model: StateSpaceModel, horizon_steps: int):
    """Stacked prediction matrices of a state-space model over a horizon.

    Parameters
    ----------
    model : StateSpaceModel
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
    A, B, C, D = model.A, model.B, model.C, model.D
    n, m, p, N = model.n_states, model.n_inputs, model.n_outputs, int(horizon_steps)
    AB = [B]
    for _ in range(1, N):
        AB.append(A @ AB[-1])
    Gx = np.zeros((N * n, N * m))
    Gy = np.zeros((N * p, N * m))
    Phi_x = np.empty((N * n, n))
    Phi_y = np.empty((N * p, n))
    Ak = np.eye(n)
    for k in range(N):
        Phi_y[k * p:(k + 1) * p] = C @ Ak
        Ak = A @ Ak
        Phi_x[k * n:(k + 1) * n] = Ak
        Gy[k * p:(k + 1) * p, k * m:(k + 1) * m] = D
        for j in range(k + 1):
            Gx[k * n:(k + 1) * n, j * m:(j + 1) * m] = AB[k - j]
            if j < k:
                Gy[k * p:(k + 1) * p, j * m:(j + 1) * m] = C @ AB[k - 1 - j]
    return Gy, Phi_y, Gx, Phi_x


def _osqp_settings(tight: bool):
    import osqp

    old = str(getattr(osqp, "__version__", "1")).startswith("0.")
    s = {"verbose": False, "eps_abs": 1e-7 if tight else 1e-5, "eps_rel": 1e-7 if tight else 1e-5,
         "max_iter": 20000, "eps_prim_inf": 1e-7, "eps_dual_inf": 1e-7}
    s.update({"polish": True, "warm_start": True} if old else {"polishing": True, "warm_starting": True})
    return s


class _Silent:
    def write(self, text):
        return len(text)

    def flush(self):
        pass


_SILENT = _Silent()


class _FastQP:
    """One OSQP problem ``min ½zᵀPz + qᵀz s.t. l <= Az <= u``, set up once; each solve only updates q, l, u."""

    def __init__(self, P, A, n_vars, tight=True):
        import osqp

        self.n_vars = n_vars
        self.solver = osqp.OSQP()
        # OSQP >= 1 asks whether a failed solve should raise; we read the status instead (older versions: no arg)
        self._solve_kw = {} if str(getattr(osqp, "__version__", "1")).startswith("0.") else {"raise_error": False}
        P = sp.csc_matrix(sp.triu(sp.csc_matrix(P)))
        A = sp.csc_matrix(A)
        self.n_rows = A.shape[0]
        self.solver.setup(P, np.zeros(n_vars), A, -np.inf * np.ones(A.shape[0]), np.inf * np.ones(A.shape[0]),
                          **_osqp_settings(tight))

    def reset(self):
        """Forget the warm start (the next solve starts from zero, as after setup)."""
        self.solver.warm_start(x=np.zeros(self.n_vars), y=np.zeros(self.n_rows))

    def solve(self, q, l, u):
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


# ---------------------------------------------------------------------------------------------------- base
class _PredictiveController:
    """Shared machinery: limits, step bounds, guards, solve, projection, plan packaging."""

    _param_names: tuple = ()

    def get_params(self) -> dict:
        return {k: getattr(self, k) for k in self._param_names}

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={_short(getattr(self, k))}" for k in self._param_names)
        return f"{type(self).__name__}({args})"

    # ------------------------------------------------------------------------------------ construction
    def _setup_common(self, input_names, output_names, N):
        if not isinstance(self.limits, StimLimits):
            raise SessionError(f"limits must be a StimLimits (see stimsteer.control.limits); got "
                               f"{type(self.limits).__name__}.")
        self.limits_ = self.limits.aligned(input_names, output_names)
        self.input_names_, self.output_names_ = tuple(input_names), tuple(output_names)
        self.n_inputs_, self.n_outputs_ = len(input_names), len(output_names)
        self.horizon_steps_ = N
        m, p = self.n_inputs_, self.n_outputs_
        self._lo, self._hi = self.limits_.input_bounds()
        lo_src, hi_src = self.limits_.bound_sources()
        self._charge_sides = (np.array([s == "charge_density" for s in lo_src]),
                              np.array([s == "charge_density" for s in hi_src]))
        self._slew = self.limits_.slew_max_ua
        self._energy = self.limits_.energy_budget_ua2
        self._scale = max(1.0, float(np.max(np.abs(np.concatenate([self._lo, self._hi])))))
        self._Ru = sla.block_diag(*[_sqrt_weight("input_weight", self.input_weight, m)] * N)
        penalty = float(self.output_penalty)
        if not np.isfinite(penalty) or penalty <= 0:
            raise SessionError(f"output_penalty must be positive and finite; got {self.output_penalty!r}.")
        # The fast path's slack variable is t = κ·s with κ = sqrt(ρ) and cost (ρ/κ)·t: both the multiplier of
        # t >= 0 and t itself stay moderate, which ADMM reaches in far fewer iterations than with s itself.
        self._kappa = float(np.sqrt(penalty))
        ymin, ymax = self.limits_.output_min, self.limits_.output_max
        if ymin is None:
            ymin, ymax = np.full(p, -np.inf), np.full(p, np.inf)
        self._ymin, self._ymax = np.tile(ymin, N), np.tile(ymax, N)
        self._idx_hi = np.flatnonzero(np.isfinite(self._ymax))
        self._idx_lo = np.flatnonzero(np.isfinite(self._ymin))
        self._idx_b = np.union1d(self._idx_hi, self._idx_lo)
        nb = self._idx_b.size
        pos = {int(i): j for j, i in enumerate(self._idx_b)}
        self._S_hi = sp.csr_matrix((np.ones(self._idx_hi.size), ([*range(self._idx_hi.size)],
                                    [pos[int(i)] for i in self._idx_hi])), shape=(self._idx_hi.size, nb))
        self._S_lo = sp.csr_matrix((np.ones(self._idx_lo.size), ([*range(self._idx_lo.size)],
                                    [pos[int(i)] for i in self._idx_lo])), shape=(self._idx_lo.size, nb))
        self._slew_rows = self._slew_matrix(N, m)

    def _slew_matrix(self, N, m):
        """Rows ``u_{k,i} − u_{k−1,i}`` (k >= 1) for the inputs with a finite slew limit, and their limits."""
        if self._slew is None or N < 2:
            return None
        rows, cols, vals, lim = [], [], [], []
        r = 0
        for k in range(1, N):
            for i in range(m):
                if np.isfinite(self._slew[i]):
                    rows += [r, r]
                    cols += [k * m + i, (k - 1) * m + i]
                    vals += [1.0, -1.0]
                    lim.append(self._slew[i])
                    r += 1
        if r == 0:
            return None
        return sp.csr_matrix((vals, (rows, cols)), shape=(r, N * m)), np.array(lim)

    def _common_constraints(self, u, y_expr, yhi, ylo):
        """Hard input limits and soft output bounds in cvxpy; returns (constraints, slack variable or None).

        ``y_expr(idx)`` is the predicted-output expression at the stacked indices ``idx``; ``yhi``/``ylo`` the
        right-hand sides of the upper and lower output rows (Parameters or constants).
        """
        N, m = self.horizon_steps_, self.n_inputs_
        self._lb = cp.Parameter(N * m, name="step_lower_ua")
        self._ub = cp.Parameter(N * m, name="step_upper_ua")
        cons = [u >= self._lb, u <= self._ub]
        if self._slew_rows is not None:
            Dm, lim = self._slew_rows
            cons += [Dm @ u <= lim, Dm @ u >= -lim]
        if self._energy is not None:
            cons.append(cp.norm(u, 2) <= np.sqrt(self._energy))
        slack = None
        if self._idx_b.size:
            slack = cp.Variable(self._idx_b.size, nonneg=True, name="output_slack")
            if self._idx_hi.size:
                cons.append(y_expr(self._idx_hi) - self._S_hi @ slack <= yhi)
            if self._idx_lo.size:
                cons.append(y_expr(self._idx_lo) + self._S_lo @ slack >= ylo)
        return cons, slack

    def _box_rows(self, u_sel):
        """OSQP rows for the hard input limits given the linear map ``u = u_sel @ z``."""
        blocks = [u_sel]
        if self._slew_rows is not None:
            blocks.append(self._slew_rows[0] @ u_sel)
        return blocks

    def reset(self):
        """Forget the fast path's warm start, so that a run repeated from the same state gives the same numbers.

        Plans are optimal either way; warm starting only changes them within solver tolerance.
        """
        check_fitted(self, "problem_")
        if self._fast is not None:
            self._fast.reset()
        return self

    # ------------------------------------------------------------------------------------ planning
    def _check_past(self, u_past, y_past):
        m, p, T = self.n_inputs_, self.n_outputs_, self.past_steps_
        u_past = np.asarray(u_past, dtype=np.float64)
        y_past = np.asarray(y_past, dtype=np.float64)
        for name, a, c in (("u_past", u_past, m), ("y_past", y_past, p)):
            if a.ndim != 2 or a.shape[1] != c:
                raise SessionError(f"{name} must have shape (n_past, {c}); got {a.shape}.")
            if a.shape[0] < T:
                raise SessionError(f"{name} needs at least {T} samples (the controller's past window); got "
                                   f"{a.shape[0]}. Record or simulate a longer past before planning.")
            if not np.all(np.isfinite(a[-T:])):
                raise SessionError(f"{name} holds NaN or infinite values in its last {T} samples; plan from a "
                                   "clean stretch of data.")
        return u_past[-T:], y_past[-T:]

    def _check_last(self, last_input, u_past):
        if last_input is None:
            return u_past[-1].copy()
        last = np.asarray(last_input, dtype=np.float64).reshape(-1)
        if last.shape != (self.n_inputs_,) or not np.all(np.isfinite(last)):
            raise SessionError(f"last_input must be {self.n_inputs_} finite values (µA); got {last_input!r}.")
        return last

    def _step_bounds(self, last):
        N = self.horizon_steps_
        lb, ub = np.tile(self._lo, (N, 1)), np.tile(self._hi, (N, 1))
        if self._slew is not None:
            lb[0] = np.maximum(lb[0], last - self._slew)
            ub[0] = np.minimum(ub[0], last + self._slew)
        return lb, ub

    def _guard(self, lb, ub, last, fallback):
        """Reason why no input sequence can meet the limits from ``last``, or '' when one can."""
        bad = np.flatnonzero(lb[0] > ub[0])
        if bad.size:
            i = int(bad[0])
            return (f"the slew window of input {self.input_names_[i]!r} around the last applied input "
                    f"{last[i]:g} µA does not meet its amplitude window [{self._lo[i]:g}, {self._hi[i]:g}] µA; "
                    "the amplitude bound takes precedence and the slew limit is broken at step 0")
        if self._energy is not None and np.sum(fallback**2) > self._energy:
            return (f"even the least-energy sequence allowed by the slew limit uses {np.sum(fallback**2):.4g} µA² "
                    f"> the energy budget {self._energy:g} µA²; raise the budget or the slew limit")
        return ""

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None) -> Plan:
        """Plan the stimulation over the horizon from the measured past.

        Parameters
        ----------
        u_past : ndarray, shape (n_past, n_inputs)
            Applied inputs, µA, ending just before the plan; the last ``past_steps_`` samples are used.
        y_past : ndarray, shape (n_past, n_outputs)
            Measured outputs at the same samples.
        target : ndarray
            Output kind: shape (horizon_steps, n_outputs) (a trajectory; longer ones are cut) or (n_outputs,)
            (constant). State kind: shape (n_states,).
        last_input : ndarray, shape (n_inputs,), optional
            The input applied just before the plan (for the slew limit); default ``u_past[-1]``.
        use_fast_path : bool, optional
            Solve with the reusable OSQP problem (True) or the cvxpy problem (False); default the controller's
            ``fast_path`` setting. The fast path is used only where it exists (see the module docstring); when
            OSQP fails (e.g. its iteration limit on a badly scaled penalty), the cvxpy problem is solved instead
            and ``Plan.solver`` names both.

        Returns
        -------
        Plan
            Never raises for an infeasible or failed solve: the plan reports it and carries the safe fallback.

        Raises
        ------
        NotFittedError
            Before :meth:`fit`.
        SessionError
            On malformed past windows, target or last input.
        """
        check_fitted(self, "problem_")
        u_past, y_past = self._check_past(u_past, y_past)
        last = self._check_last(last_input, u_past)
        target = self._check_target(target)
        lb, ub = self._step_bounds(last)
        t0 = time.perf_counter()
        # the safe fallback is needed up front only with an energy budget (guard, projection blend)
        fallback = self.limits_.safe_inputs(self.horizon_steps_, last) if self._energy is not None else None
        reason = self._guard(lb, ub, last, fallback)
        fast = self.fast_path if use_fast_path is None else bool(use_fast_path)
        fast = fast and self._fast is not None
        solver = "OSQP (reused)" if fast else ""
        aux, u, status = None, None, "infeasible"
        if not reason:
            offsets = self._offsets(u_past, y_past, target)
            if fast:
                u, aux, status, reason = self._solve_fast(offsets, lb, ub)
                if u is not None and self._energy is not None and np.sum(u**2) > self._energy * (1 - 1e-9):
                    # the budget binds: the budget-free QP's answer is not the optimum; solve the cone program
                    u, aux, status, reason = None, None, "budget", "energy budget binding"
            if not fast or status in ("failed", "budget"):  # the fast path is an accelerator only
                first = reason
                u, aux, status, reason = self._solve_cvxpy(offsets, lb, ub)
                if fast and not first.startswith("energy budget"):
                    note = "solved with the cvxpy problem instead" if u is not None else reason
                    reason = f"fast path: {first}; {note}"
                solver = (f"{solver} -> " if fast else "") + f"{self._cvx_solver()} (cvxpy)"
            if u is not None:
                u, why = self._project(u.reshape(lb.shape), lb, ub, last, fallback)
                if u is None:
                    status, reason = "failed", why
        elapsed = time.perf_counter() - t0
        is_fallback = u is None
        if is_fallback:
            u, aux = self.limits_.safe_inputs(self.horizon_steps_, last), None
        return self._package(u, aux, u_past, y_past, target, last, lb, ub, solver, status, reason, is_fallback,
                             elapsed)

    def _cvx_solver(self):
        return str(self.solver).upper()

    def _solve_cvxpy(self, offsets, lb, ub):
        self._assign(offsets)
        self._lb.value, self._ub.value = lb.reshape(-1), ub.reshape(-1)
        opts = dict(_CVX_DEFAULTS.get(self._cvx_solver(), {}))
        opts.update(self.solver_options or {})
        try:
            with warnings.catch_warnings():  # an inaccurate solve is reported in the plan's status instead
                warnings.simplefilter("ignore", UserWarning)
                # the compiled problem is reused (DPP cache) either way; no solver warm start, so that the same
                # data give the same plan whatever was solved before
                self.problem_.solve(solver=self._cvx_solver(), warm_start=False, **opts)
        except (cp.error.SolverError, ArithmeticError, ValueError) as exc:
            return None, None, "failed", f"{self._cvx_solver()} failed: {exc}"
        status = self.problem_.status
        if status not in _ACCEPT or self._u.value is None:
            kind = "infeasible" if status in (cp.INFEASIBLE, cp.INFEASIBLE_INACCURATE) else "failed"
            return None, None, kind, f"{self._cvx_solver()} returned status '{status}'"
        return np.array(self._u.value), self._aux_value(), _ACCEPT[status], ""

    def _project(self, u, lb, ub, last, fallback):
        """Verify a solver answer against the hard limits; clip tolerance-level excess onto the exact bounds."""
        tol = _ACCEPT_RTOL * self._scale
        excess = max(float(np.max(lb - u)), float(np.max(u - ub)), 0.0)
        if self._slew is not None:
            d = np.abs(np.diff(np.vstack([last, u]), axis=0)) - self._slew
            excess = max(excess, float(np.max(d[:, np.isfinite(self._slew)], initial=0.0)))
        if self._energy is not None:
            excess = max(excess, float(np.sum(u**2) - self._energy) / max(self._scale, 1.0))
        if not np.all(np.isfinite(u)) or excess > tol:
            return None, f"the solver's answer breaks a hard limit by {excess:.3g} (tolerance {tol:.3g})"
        u = np.clip(u, lb, ub)
        if self._slew is not None and np.any(np.abs(np.diff(u, axis=0)) > self._slew):
            prev = u[0]
            for k in range(1, u.shape[0]):  # clip onto each step's slew window around the clipped previous step
                u[k] = np.clip(u[k], np.maximum(lb[k], prev - self._slew), np.minimum(ub[k], prev + self._slew))
                prev = u[k]
        if self._energy is not None and np.sum(u**2) > self._energy:
            u = _blend_into_budget(u, fallback, self._energy)
        bad = {k: v for k, v in self.limits_.violations(u, last).items() if v}
        if bad:  # cannot happen after the clip above; never return such a plan
            return None, f"internal check failed after projection: {bad}"
        return u, ""

    def _package(self, u, aux, u_past, y_past, target, last, lb, ub, solver, status, reason, is_fallback, elapsed):
        y = self._predict_outputs(u, aux, u_past, y_past)
        slack = np.maximum(0.0, np.maximum(y.reshape(-1) - self._ymax, self._ymin - y.reshape(-1)))
        terms = self._cost_terms(u, aux, y, u_past, y_past, target)
        terms["output_penalty"] = float(self.output_penalty) * float(np.sum(slack))
        terms["total"] = float(sum(terms.values()))
        if status in _ACCEPT.values() and is_fallback:
            status = "failed"
        return Plan(
            inputs=_ro(u), predicted_outputs=_ro(y), target=_ro(self._target_rows(target)),
            target_kind=self._target_kind(), cost_terms=terms,
            active_limits=self._active(u, y, last, lb, ub), output_slack=_ro(slack.reshape(y.shape)),
            step_bounds=(_ro(lb), _ro(ub)), last_input=_ro(last), solver=solver, status=status,
            message=(f"{reason}; returning the safe fallback (towards zero stimulation within the slew limit)"
                     if is_fallback else reason), fallback=is_fallback, solve_time_s=float(elapsed),
            input_names=self.input_names_, output_names=self.output_names_,
            output_bounds=None if self.limits_.output_min is None else (_ro(self.limits_.output_min),
                                                                       _ro(self.limits_.output_max)),
        )

    def _active(self, u, y, last, lb, ub):
        tol = 1e-6 * self._scale
        at_lo = (u <= self._lo + tol) & (self._lo < 0)
        at_hi = (u >= self._hi - tol) & (self._hi > 0)
        charge_lo, charge_hi = self._charge_sides
        act = {"amplitude_min": at_lo & ~charge_lo, "amplitude_max": at_hi & ~charge_hi,
               "charge_density": (at_lo & charge_lo) | (at_hi & charge_hi)}
        if self._slew is not None:
            d = np.abs(np.diff(np.vstack([last, u]), axis=0))
            act["slew"] = np.isfinite(self._slew) & (d >= self._slew - tol)
        else:
            act["slew"] = np.zeros_like(u, dtype=bool)
        act["energy_budget"] = bool(self._energy is not None and np.sum(u**2) >= self._energy * (1 - 1e-6))
        yv = y.reshape(-1)
        ytol = 1e-6 * max(1.0, float(np.max(np.abs(yv), initial=0)))
        act["output_bounds"] = ((yv >= self._ymax - ytol) | (yv <= self._ymin + ytol)).reshape(y.shape)
        return act


def _blend_into_budget(u, safe, budget):
    """``α u + (1 − α) safe`` with the largest α in [0, 1] inside the energy budget (both meet box and slew)."""
    target = budget * (1.0 - 1e-10)
    d = (u - safe).reshape(-1)
    r = safe.reshape(-1)
    a, b, c = d @ d, 2.0 * r @ d, r @ r - target
    if a <= 0:
        return safe.copy()
    alpha = (-b + np.sqrt(max(b * b - 4 * a * c, 0.0))) / (2 * a)
    alpha = float(np.clip(alpha, 0.0, 1.0))
    return alpha * u + (1.0 - alpha) * safe


def _ro(a):
    a = np.array(a, dtype=np.float64, copy=True)
    a.setflags(write=False)
    return a


def _short(v):
    if isinstance(v, np.ndarray):
        return f"array{v.shape}"
    r = repr(v)
    return r if len(r) <= 60 else r[:57] + "..."


# ---------------------------------------------------------------------------------------------------- condensed core
class _CondensedCore(_PredictiveController):
    """Controllers whose prediction is ``ŷ = Gy u + f(past)`` and tracked signal ``z = Gz u + fz(past)``."""

    def _build_condensed(self, Gy, Gz, Lz, T=None, Lp=None):
        """cvxpy problem and fast QP for ``min ‖Lz(Gz u + ez)‖² + ‖Ru u‖² + ‖Lp(T u + t)‖² + ρ Σ s``."""
        N, m = self.horizon_steps_, self.n_inputs_
        self._Gy, self._LG = Gy, Lz @ Gz
        self._LpT = None if T is None else Lp @ T
        self._u = u = cp.Variable(N * m, name="inputs_ua")
        self._ew = cp.Parameter(self._LG.shape[0], name="tracking_offset")
        cost = cp.sum_squares(self._LG @ u + self._ew) + cp.sum_squares(self._Ru @ u)
        if self._LpT is not None:
            self._tw = cp.Parameter(self._LpT.shape[0], name="terminal_offset")
            cost = cost + cp.sum_squares(self._LpT @ u + self._tw)
        self._yhi_param = cp.Parameter(self._idx_hi.size, name="output_upper_offset") if self._idx_hi.size else None
        self._ylo_param = cp.Parameter(self._idx_lo.size, name="output_lower_offset") if self._idx_lo.size else None
        cons, self._slack_var = self._common_constraints(u, lambda idx: Gy[idx] @ u, self._yhi_param,
                                                         self._ylo_param)
        if self._slack_var is not None:
            cost = cost + float(self.output_penalty) * cp.sum(self._slack_var)
        self.problem_ = cp.Problem(cp.Minimize(cost), cons)
        self._fast_tpl = None
        # with an energy budget the fast QP leaves the budget out; plan() keeps its answer only where the budget
        # is not binding (then it is also the optimum with the budget: the problem is convex)
        self._fast = self._fast_condensed()

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
        return _FastQP(P, sp.vstack(rows, format="csc"), Nm + nb)

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

    def _solve_fast(self, offsets, lb, ub):
        ew, tw, fy = offsets
        if getattr(self, "_fast_tpl", None) is None:
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
        z, status, reason = self._fast.solve(q, lo, hi)
        if z is None:
            return None, None, status, reason
        return z[:Nm], None, status, ""

    def _assign(self, offsets):
        ew, tw, fy = offsets
        self._ew.value = ew
        if self._LpT is not None:
            self._tw.value = tw
        if self._yhi_param is not None:
            self._yhi_param.value = self._ymax[self._idx_hi] - fy[self._idx_hi]
        if self._ylo_param is not None:
            self._ylo_param.value = self._ymin[self._idx_lo] - fy[self._idx_lo]

    def _aux_value(self):
        return None

    def _condensed_terms(self, u, ew, tw):
        v = u.reshape(-1)
        terms = {"tracking": float(np.sum((self._LG @ v + ew) ** 2)),
                 "input_energy": float(np.sum((self._Ru @ v) ** 2))}
        if self._LpT is not None:
            terms["terminal"] = float(np.sum((self._LpT @ v + tw) ** 2))
        return terms


# ---------------------------------------------------------------------------------------------------- indirect
class ModelPredictiveController(_CondensedCore):
    """Predictive control of stimulation with a fitted state-space model (the indirect route).

    Parameters
    ----------
    model : StateSpaceModel
        In the physical input units of the limits (µA).
    limits : StimLimits
        Matched to the model's inputs by name when named (:meth:`StimLimits.aligned`).
    horizon_steps : int
        ``N``, samples.
    output_weight : float, ndarray (p,) or (p, p), default 1.0
        ``Q`` of the output tracking cost (output kind).
    input_weight : float, ndarray (m,) or (m, m), default 1e-3
        ``R`` of the input energy cost, per µA².
    state_weight : float, ndarray (n,) or (n, n), default 1.0
        ``Q`` of the state tracking cost (state kind), over ``x_1..x_N``.
    terminal_weight : None, "riccati" or ndarray (n, n), default None
        Terminal cost on ``x_N − x_T``: none, the solution ``P`` of the discrete algebraic Riccati equation of the
        stage cost (for the state kind ``P − Q``, since ``x_N`` is already in the stage cost), or a PSD matrix.
        ``x_T`` is the target state (state kind) or the minimum-norm state with ``C x = r_{N−1}`` (output kind).
    output_offset : ndarray, shape (n_outputs,), optional
        When the model describes ``y − output_offset`` (e.g. ``RidgeArx.model_.info["output_offset"]``, the
        resting output), give it here: past outputs, targets, output bounds and predictions then stay in the
        outputs' own units. Default none (the model describes ``y`` itself). :func:`controller_for` passes it.
    target_kind : {"output", "state"}, default "output"
    formulation : {"condensed", "sparse"}, default "condensed"
        The cvxpy problem with inputs only (``ŷ = G u + Φ x̂``) or with the states as variables and the dynamics
        as equality constraints (better conditioned for long horizons of slow models). The fast path is condensed.
    output_penalty : float, default 1e4
        ``ρ`` of the exact L1 penalty on soft output-bound slack; it must exceed the bounds' Lagrange
        multipliers for the bounds to hold whenever they can.
    solver : str, default "CLARABEL"
        cvxpy solver of the plain path.
    fast_path : bool, default True
        Plan with the reusable OSQP problem when the problem is a QP.
    solver_options : dict, optional
        Passed to ``cvxpy.Problem.solve``.

    Attributes
    ----------
    problem_ : cvxpy.Problem
        The compiled-once problem (DPP).
    limits_ : StimLimits
        The limits aligned to the model's inputs and outputs.
    past_steps_ : int
        Past window used for the Kalman state estimate (the model's ``past_steps``).
    horizon_steps_, n_inputs_, n_outputs_, n_states_ : int
    input_names_, output_names_ : tuple of str
    riccati_ : ndarray (n, n) or None
        The Riccati solution when ``terminal_weight="riccati"``.

    Notes
    -----
    With ``terminal_weight="riccati"`` and no binding limit, the first planned move equals the LQR law
    ``u_0 = −(R + BᵀPB)⁻¹ BᵀPA x̂`` for any horizon (dynamic programming; Rawlings, Mayne, Diehl 2017, ch. 1).

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import StateSpaceModel
    >>> from stimsteer.control.limits import StimLimits
    >>> model = StateSpaceModel(A=[[0.9]], B=[[1.0]], C=[[1.0]])
    >>> ctrl = ModelPredictiveController(model=model, limits=StimLimits(amplitude_min_ua=-1, amplitude_max_ua=1,
    ...                                  n_inputs=1), horizon_steps=5).fit()
    >>> plan = ctrl.plan(np.zeros((1, 1)), np.zeros((1, 1)), target=[3.0])
    >>> bool(plan.ok and np.all(np.abs(plan.inputs) <= 1.0))
    True
    """

    _param_names = ("model", "limits", "horizon_steps", "output_weight", "input_weight", "state_weight",
                    "terminal_weight", "output_offset", "target_kind", "formulation", "output_penalty", "solver",
                    "fast_path", "solver_options")

    def __init__(self, *, model, limits, horizon_steps, output_weight=1.0, input_weight=1e-3, state_weight=1.0,
                 terminal_weight=None, output_offset=None, target_kind="output", formulation="condensed",
                 output_penalty=1e4, solver="CLARABEL", fast_path=True, solver_options=None):
        self.model = model
        self.output_offset = output_offset
        self.limits = limits
        self.horizon_steps = horizon_steps
        self.output_weight = output_weight
        self.input_weight = input_weight
        self.state_weight = state_weight
        self.terminal_weight = terminal_weight
        self.target_kind = target_kind
        self.formulation = formulation
        self.output_penalty = output_penalty
        self.solver = solver
        self.fast_path = fast_path
        self.solver_options = solver_options

    def fit(self, session=None):
        """Validate the settings and build the control problem once.

        Parameters
        ----------
        session : Session, optional
            Not needed (the model is already fitted); when given, its channel counts are checked against the
            model's.

        Returns
        -------
        self

        Raises
        ------
        SessionError
            On a wrong model type, horizon, weights, target kind or formulation.
        LimitsError
            When the limits do not match the model's inputs or outputs.
        """
        model = self.model
        if not isinstance(model, StateSpaceModel):
            raise SessionError(f"model must be a StateSpaceModel; got {type(model).__name__}. Direct-route "
                               "predictors go to DataPredictiveController.")
        if session is not None and (session.n_inputs, session.n_outputs) != (model.n_inputs, model.n_outputs):
            raise SessionError(f"the session has {session.n_inputs} inputs and {session.n_outputs} outputs but the "
                               f"model {model.n_inputs} and {model.n_outputs}.")
        N = _horizon(self.horizon_steps, None)
        if self.target_kind not in ("output", "state"):
            raise SessionError(f"target_kind must be 'output' or 'state'; got {self.target_kind!r}.")
        if self.formulation not in ("condensed", "sparse"):
            raise SessionError(f"formulation must be 'condensed' or 'sparse'; got {self.formulation!r}.")
        self.problem_ = None
        self._setup_common(model.input_names, model.output_names, N)
        self.n_states_ = n = model.n_states
        self.past_steps_ = model.past_steps
        off = self.output_offset
        self._y_off = np.zeros(model.n_outputs) if off is None else np.asarray(off, np.float64).reshape(-1)
        if self._y_off.shape != (model.n_outputs,) or not np.all(np.isfinite(self._y_off)):
            raise SessionError(f"output_offset must be {model.n_outputs} finite values (one per output); got "
                               f"{off!r}.")
        self._y_off_N = np.tile(self._y_off, N)
        Gy, Phi_y, Gx, Phi_x = condensed_prediction(model, N)
        self._Phi_y, self._Phi_x, self._Gx = Phi_y, Phi_x, Gx
        self._AN = np.linalg.matrix_power(model.A, N)
        self._Cpinv = np.linalg.pinv(model.C)
        state = self.target_kind == "state"
        Lq = _sqrt_weight("state_weight" if state else "output_weight",
                          self.state_weight if state else self.output_weight, n if state else model.n_outputs)
        Lz = sla.block_diag(*[Lq] * N)
        self._Lz = Lz
        self.riccati_, Lp = self._terminal_factor(Lq)
        self._Lp = Lp
        T = None if Lp is None else Gx[(N - 1) * n:]
        self._build_condensed(Gy, Gx if state else Gy, Lz, T, Lp)
        if self.formulation == "sparse":
            self._build_sparse(Lq, Lp)
        return self

    def _terminal_factor(self, Lq):
        tw = self.terminal_weight
        if tw is None:
            return None, None
        model, n = self.model, self.model.n_states
        if isinstance(tw, str):
            if tw != "riccati":
                raise SessionError(f"terminal_weight must be None, 'riccati' or an (n, n) matrix; got {tw!r}.")
            Q = Lq.T @ Lq
            R = self._Ru[:self.n_inputs_, :self.n_inputs_].T @ self._Ru[:self.n_inputs_, :self.n_inputs_]
            if self.target_kind == "output":
                Qx, S, Rr = model.C.T @ Q @ model.C, model.C.T @ Q @ model.D, R + model.D.T @ Q @ model.D
            else:
                Qx, S, Rr = Q, np.zeros((n, self.n_inputs_)), R
            try:
                P = sla.solve_discrete_are(model.A, model.B, Qx, Rr, s=S)
            except (np.linalg.LinAlgError, ValueError) as exc:
                raise SessionError(f"the Riccati terminal cost has no stabilising solution ({exc}); use a positive "
                                   "definite input_weight, or terminal_weight=None.") from None
            P = 0.5 * (P + P.T)
            # the state cost already holds x_N, so the tail beyond it is P − Q (PSD up to rounding)
            W = P - Qx if self.target_kind == "state" else P
            return P, _sqrt_weight("terminal_weight", _clip_psd(W), n)
        return None, _sqrt_weight("terminal_weight", tw, n)

    def _build_sparse(self, Lq, Lp):
        """Replace the cvxpy problem by the sparse one (states as variables); the fast path stays condensed."""
        model, N, m, n = self.model, self.horizon_steps_, self.n_inputs_, self.n_states_
        u = self._u = cp.Variable(N * m, name="inputs_ua")
        X = cp.Variable((N + 1) * n, name="states")
        self._x0 = cp.Parameter(n, name="initial_state")
        self._rw = cp.Parameter(self._Lz.shape[0], name="weighted_target")
        IA = sp.kron(sp.eye(N), sp.csr_matrix(model.A))
        IB = sp.kron(sp.eye(N), sp.csr_matrix(model.B))
        Cb = sp.kron(sp.eye(N), sp.csr_matrix(model.C))
        Db = sp.kron(sp.eye(N), sp.csr_matrix(model.D))
        y = Cb @ X[:N * n] + Db @ u
        z = X[n:] if self.target_kind == "state" else y
        cost = cp.sum_squares(self._Lz @ z - self._rw) + cp.sum_squares(self._Ru @ u)
        cons = [X[:n] == self._x0, X[n:] == IA @ X[:N * n] + IB @ u]
        if Lp is not None:
            self._xtw = cp.Parameter(n, name="weighted_terminal_state")
            cost = cost + cp.sum_squares(Lp @ X[N * n:] - self._xtw)
        Cb, Db = Cb.tocsr(), Db.tocsr()
        off = np.tile(self._y_off, N)  # the model describes y − output_offset
        more, self._slack_var = self._common_constraints(
            u, lambda idx: Cb[idx] @ X[:N * n] + Db[idx] @ u, (self._ymax - off)[self._idx_hi],
            (self._ymin - off)[self._idx_lo])
        if self._slack_var is not None:
            cost = cost + float(self.output_penalty) * cp.sum(self._slack_var)
        self.problem_ = cp.Problem(cp.Minimize(cost), cons + more)

    # ------------------------------------------------------------------------------------ per plan
    def _target_kind(self):
        return self.target_kind

    def _check_target(self, target):
        t = np.asarray(target, dtype=np.float64)
        N = self.horizon_steps_
        if self.target_kind == "state":
            if t.shape != (self.n_states_,) or not np.all(np.isfinite(t)):
                raise SessionError(f"a state target must be {self.n_states_} finite values; got shape {t.shape}.")
            return t
        return _output_target(t, N, self.n_outputs_)

    def _target_rows(self, target):
        return np.tile(target, (self.horizon_steps_, 1)) if target.ndim == 1 else target

    def _x_terminal(self, target):
        return target if self.target_kind == "state" else self._Cpinv @ (target[-1] - self._y_off)

    def _free(self, u_past, y_past):
        """State estimate and free output response (in the outputs' units, offset included).

        Cached for the arrays of the plan being made (offsets, prediction and cost terms all need it).
        """
        cached = getattr(self, "_free_cache", None)
        if cached is not None and cached[0] is u_past and cached[1] is y_past:
            return cached[2]
        x0 = self.model.estimate_state(u_past, y_past - self._y_off)
        out = (x0, self._Phi_y @ x0 + self._y_off_N)
        self._free_cache = (u_past, y_past, out)
        return out

    def _tracked(self, x0, fy, target):
        """Free response and target of the tracked signal (outputs, or states x_1..x_N)."""
        if self.target_kind == "state":
            return self._Phi_x @ x0, np.tile(target, self.horizon_steps_)
        return fy, target.reshape(-1)

    def _offsets(self, u_past, y_past, target):
        x0, fy = self._free(u_past, y_past)
        fz, rz = self._tracked(x0, fy, target)
        ew = self._Lz @ (fz - rz)
        xt = self._x_terminal(target)
        tw = None if self._Lp is None else self._Lp @ (self._AN @ x0 - xt)
        if self.formulation == "sparse":  # the sparse cvxpy problem takes the state and the weighted target
            rz_model = rz if self.target_kind == "state" else rz - self._y_off_N
            self._sparse_values = (x0, self._Lz @ rz_model, None if self._Lp is None else self._Lp @ xt)
        self._offsets_cache = (u_past, y_past, target, ew, tw)
        return ew, tw, fy

    def _assign(self, offsets):
        if self.formulation == "condensed":
            return super()._assign(offsets)
        x0, rw, xtw = self._sparse_values
        self._x0.value, self._rw.value = x0, rw
        if xtw is not None:
            self._xtw.value = xtw

    def _predict_outputs(self, u, aux, u_past, y_past):
        _, fy = self._free(u_past, y_past)
        return (self._Gy @ u.reshape(-1) + fy).reshape(self.horizon_steps_, self.n_outputs_)

    def _cost_terms(self, u, aux, y, u_past, y_past, target):
        cached = getattr(self, "_offsets_cache", None)
        if cached is not None and cached[0] is u_past and cached[1] is y_past and cached[2] is target:
            return self._condensed_terms(u, cached[3], cached[4])  # the weighted offsets of this plan's solve
        x0, fy = self._free(u_past, y_past)
        fz, rz = self._tracked(x0, fy, target)
        tw = None if self._Lp is None else self._Lp @ (self._AN @ x0 - self._x_terminal(target))
        return self._condensed_terms(u, self._Lz @ (fz - rz), tw)


def _clip_psd(W):
    ev, V = np.linalg.eigh(0.5 * (W + W.T))
    return (V * np.clip(ev, 0, None)) @ V.T


def _horizon(h, max_h):
    try:
        N = int(h)
    except (TypeError, ValueError):
        raise SessionError(f"horizon_steps must be a positive integer; got {h!r}.") from None
    if N != h or N < 1:
        raise SessionError(f"horizon_steps must be a positive integer; got {h!r}.")
    if max_h is not None and N > max_h:
        raise SessionError(f"horizon_steps = {N} exceeds the predictor's horizon of {max_h} steps; plan over at "
                           f"most {max_h} steps or refit the predictor with a longer horizon.")
    return N


def _output_target(t, N, p):
    if t.ndim == 1:
        if t.shape != (p,):
            raise SessionError(f"a constant target must have one value per output ({p}); got shape {t.shape}.")
        t = np.tile(t, (N, 1))
    if t.ndim != 2 or t.shape[1] != p or t.shape[0] < N:
        raise SessionError(f"a target trajectory must have shape (>= {N}, {p}) (horizon, outputs); got {t.shape}.")
    t = t[:N]
    if not np.all(np.isfinite(t)):
        raise SessionError("the target holds NaN or infinite values; give a finite target for every output.")
    return t


# ---------------------------------------------------------------------------------------------------- direct
class DataPredictiveController(_CondensedCore):
    """Predictive control of stimulation straight from data (the direct route): DeePC or SPC.

    Parameters
    ----------
    predictor : HankelPredictor or LsqPredictor
        Fitted (or fitted here on the session given to :meth:`fit`). A Hankel predictor gives DeePC on its
        (compressed) blocks with its regulariser and strengths; a least-squares predictor gives SPC with its
        ``Kp_``, ``Kf_``.
    limits : StimLimits
    horizon_steps : int, optional
        ``N``; default the predictor's horizon. At most the predictor's horizon: the first blocks are used and,
        as in the predictor's ``predict``, the later future inputs are held at zero.
    past_slack_weight : float, optional
        DeePC only: ``λ_y`` of the slack on past outputs; default the predictor's ``lambda_y_``; ``inf`` keeps the
        past outputs as hard equalities (for noise-free data).
    output_weight, input_weight, output_penalty, solver, fast_path, solver_options
        As in :class:`ModelPredictiveController`.

    Attributes
    ----------
    problem_ : cvxpy.Problem
    predictor_ : the fitted predictor used
    method_ : str
        ``"deepc"`` or ``"spc"``.
    limits_, past_steps_, horizon_steps_, n_inputs_, n_outputs_, input_names_, output_names_

    Notes
    -----
    DeePC (Coulson, Lygeros, Dörfler 2019) with the predictor's strengths::

        min_{g,u}  ‖Yf g − r‖²_Q + ‖u‖²_R + λ_y ‖Yp g − y_past‖² + λ_g R(g) + ρ Σ s
        s.t.       Up g = u_past,  Uf g = u,  input limits,  soft output bounds on Yf g

    with ``R(g) = ‖M g‖²`` (projection), ``‖g‖²`` (l2) or ``‖g‖₁`` (l1). With ``past_slack_weight=inf`` the
    past outputs are hard equalities (no slack). SPC (Favoreel et al. 1999) replaces the
    prediction with ``Kp [u_past; y_past] + Kf u``.
    """

    _param_names = ("predictor", "limits", "horizon_steps", "output_weight", "input_weight", "past_slack_weight",
                    "output_penalty", "solver", "fast_path", "solver_options")

    def __init__(self, *, predictor, limits, horizon_steps=None, output_weight=1.0, input_weight=1e-3,
                 past_slack_weight=None, output_penalty=1e4, solver="CLARABEL", fast_path=True,
                 solver_options=None):
        self.predictor = predictor
        self.past_slack_weight = past_slack_weight
        self.limits = limits
        self.horizon_steps = horizon_steps
        self.output_weight = output_weight
        self.input_weight = input_weight
        self.output_penalty = output_penalty
        self.solver = solver
        self.fast_path = fast_path
        self.solver_options = solver_options

    def fit(self, session=None):
        """Fit the predictor when needed (on a copy) and build the control problem once.

        Parameters
        ----------
        session : Session, optional
            Used only when ``predictor`` is not fitted yet: a fresh copy of it is fitted on the session (the
            given object is not modified).

        Returns
        -------
        self

        Raises
        ------
        NotFittedError
            If the predictor is not fitted and no session is given.
        SessionError
            If the predictor is neither a Hankel nor a least-squares predictor, or on bad settings.
        """
        pred = self.predictor
        if getattr(pred, "past_steps_", None) is None:
            if session is None:
                raise NotFittedError(f"the {type(pred).__name__} is not fitted; fit it first or pass a session to "
                                     "DataPredictiveController.fit(session).")
            pred = type(pred)(**pred.get_params()).fit(session)
        if getattr(pred, "blocks_", None) is not None:
            method = "deepc"
        elif getattr(pred, "Kf_", None) is not None:
            method = "spc"
        else:
            raise SessionError(f"the direct controller needs a HankelPredictor (blocks_) or an LsqPredictor (Kp_, "
                               f"Kf_); got {type(pred).__name__}.")
        self.problem_ = None
        self.predictor_, self.method_ = pred, method
        max_h = getattr(pred, "max_horizon_steps_", None)
        N = _horizon(max_h if self.horizon_steps is None else self.horizon_steps, max_h)
        m, p = int(pred.n_inputs_), int(pred.n_outputs_)
        names_in = tuple(getattr(pred, "input_names_", None) or [f"u{i}" for i in range(m)])
        names_out = tuple(getattr(pred, "output_names_", None) or [f"y{i}" for i in range(p)])
        self._setup_common(names_in, names_out, N)
        raw = getattr(pred, "output_offset_", None)
        off = np.zeros(p) if raw is None else np.asarray(raw, np.float64).reshape(-1)
        self._y_off = off if off.shape == (p,) and np.any(off) else None
        if self._y_off is not None:  # a centred predictor: plans are made in its coordinates (see plan)
            self._ymin, self._ymax = self._ymin - np.tile(off, N), self._ymax - np.tile(off, N)
        self.past_steps_ = int(pred.past_steps_)
        Lq = _sqrt_weight("output_weight", self.output_weight, p)
        self._Lz = sla.block_diag(*[Lq] * N)
        if method == "spc":
            self._Kp = np.asarray(pred.Kp_, np.float64)[:p * N]
            Kf = np.asarray(pred.Kf_, np.float64)[:p * N, :m * N]
            self._build_condensed(Kf, Kf, self._Lz)
        else:
            self._build_deepc(pred, N, m, p)
        return self

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None) -> Plan:
        """As :meth:`ModelPredictiveController.plan`; outputs, targets and bounds in the recorded units.

        For a predictor built with ``centre_outputs`` the plan is made in its centred coordinates (past outputs and
        target less its ``output_offset_``, output bounds shifted at fit) and reported back in recorded units.
        """
        off = getattr(self, "_y_off", None)
        if off is None:
            return super().plan(u_past, y_past, target=target, last_input=last_input, use_fast_path=use_fast_path)
        u_c, y_c = self._check_past(u_past, y_past)
        tgt = self._check_target(target)
        plan = super().plan(u_c, y_c - off, target=tgt - off, last_input=last_input, use_fast_path=use_fast_path)
        return _replace(plan, predicted_outputs=_ro(plan.predicted_outputs + off), target=_ro(plan.target + off))

    # ------------------------------------------------------------------------------------ DeePC
    def _build_deepc(self, pred, N, m, p):
        b = pred.blocks_
        self._Up, self._Yp = np.asarray(b.Up, np.float64), np.asarray(b.Yp, np.float64)
        Uf = np.asarray(b.Uf, np.float64)
        self._Uf, self._Yf = Uf[:m * N], np.asarray(b.Yf, np.float64)[:p * N]
        # a plan shorter than the predictor's horizon sets the later future inputs to zero, as predict() does
        self._E = np.vstack([self._Up, Uf[m * N:]])
        self._Gy = None
        r = self._Up.shape[1]
        self._lam_y = self._past_weight(pred)
        self._reg = str(pred.regularizer_)
        self._lam_g = float(pred.lambda_g_)
        M = getattr(pred, "reg_matrix_", None)
        self._M = None if self._reg == "l1" else (np.eye(r) if M is None else np.asarray(M, np.float64))
        g = self._g = cp.Variable(r, name="hankel_weights")
        u = self._u = cp.Variable(N * m, name="inputs_ua")
        self._up = cp.Parameter(self._E.shape[0], name="past_inputs_and_zero_tail")
        self._yp = cp.Parameter(self._Yp.shape[0], name="past_outputs")
        self._rw = cp.Parameter(p * N, name="weighted_target")
        cost = cp.sum_squares((self._Lz @ self._Yf) @ g - self._rw) + cp.sum_squares(self._Ru @ u)
        cons = [self._E @ g == self._up, self._Uf @ g == u]
        if self._lam_y is None:
            cons.append(self._Yp @ g == self._yp)
        else:
            cost = cost + self._lam_y * cp.sum_squares(self._Yp @ g - self._yp)
        if self._lam_g > 0:
            cost = cost + self._lam_g * (cp.norm1(g) if self._reg == "l1" else cp.sum_squares(self._M @ g))
        more, self._slack_var = self._common_constraints(u, lambda idx: self._Yf[idx] @ g,
                                                         self._ymax[self._idx_hi], self._ymin[self._idx_lo])
        if self._slack_var is not None:
            cost = cost + float(self.output_penalty) * cp.sum(self._slack_var)
        self.problem_ = cp.Problem(cp.Minimize(cost), cons + more)
        quadratic = self._reg != "l1" or self._lam_g == 0
        self._elim, self._fast = None, None
        if quadratic:  # an energy budget is handled as in the model controller (kept only where not binding)
            if self._idx_b.size == 0:
                self._fast = self._fast_deepc_eliminated(N, m)
            if self._fast is None:
                self._fast = self._fast_deepc(N, m)

    def _past_weight(self, pred):
        w = pred.lambda_y_ if self.past_slack_weight is None else self.past_slack_weight
        try:
            w = float(w)
        except (TypeError, ValueError):
            w = np.nan
        if np.isnan(w) or w <= 0:
            raise SessionError(f"past_slack_weight must be > 0 (inf for hard past-output equality) or None for the "
                               f"predictor's lambda_y_; got {self.past_slack_weight!r}.")
        return None if np.isinf(w) else w

    def _deepc_hessian(self):
        LY, RU = self._Lz @ self._Yf, self._Ru @ self._Uf
        H = LY.T @ LY + RU.T @ RU
        if self._lam_y is not None:
            H = H + self._lam_y * self._Yp.T @ self._Yp
        if self._lam_g > 0:
            H = H + self._lam_g * self._M.T @ self._M
        return 0.5 * (H + H.T), LY

    def _fast_deepc_eliminated(self, N, m):
        """OSQP over the inputs alone, with ``g`` minimised out in closed form (no output bounds).

        For fixed ``u`` the DeePC cost is a quadratic in ``g`` under the equalities ``E g = [u_past; 0]``,
        (``Yp g = y_past`` when hard) and ``Uf g = u``; its minimiser ``g*(u)`` is affine in ``u`` and the data
        (null-space solution, computed once here), so the problem becomes an exactly equivalent QP in ``u`` of the
        size of the indirect one. Returns None when the equalities are dependent or the reduced Hessian is not
        positive definite (then the g-space fast path is used).
        """
        H, LY = self._deepc_hessian()
        r, Nm = H.shape[0], N * m
        hard = self._lam_y is None
        fixed = np.vstack([self._E, self._Yp]) if hard else self._E
        A = np.vstack([fixed, self._Uf])
        # null-space method: g = A⁺b + Z w, w = (ZᵀHZ)⁻¹ Zᵀ(h − H A⁺ b); better conditioned than the KKT inverse
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
        self._elim = {
            "G_h": G_h, "G_f": G_f, "G_u": G_u, "Q_r": Q_h @ LY.T, "Q_f": 2.0 * G_u.T @ H @ G_f,
            "Q_y": None if hard else Q_h @ (self._lam_y * self._Yp.T), "LY": LY, "hard": hard,
        }
        P = 2.0 * G_u.T @ H @ G_u
        rows = self._box_rows(sp.eye(Nm, format="csr"))
        return _FastQP(sp.csc_matrix(0.5 * (P + P.T)), sp.vstack(rows, format="csc"), Nm)

    def _solve_fast_eliminated(self, offsets, lb, ub):
        eq, yp, rw = offsets
        e = self._elim
        bf = np.concatenate([eq, yp]) if e["hard"] else eq
        q = e["Q_r"] @ rw + e["Q_f"] @ bf
        h = e["LY"].T @ rw
        if not e["hard"]:
            q = q + e["Q_y"] @ yp
            h = h + self._lam_y * self._Yp.T @ yp
        lo, hi = [lb.reshape(-1)], [ub.reshape(-1)]
        if self._slew_rows is not None:
            lo.append(-self._slew_rows[1])
            hi.append(self._slew_rows[1])
        u, status, reason = self._fast.solve(q, np.concatenate(lo), np.concatenate(hi))
        if u is None:
            return None, None, status, reason
        g = e["G_h"] @ h + e["G_f"] @ bf + e["G_u"] @ u
        return u, g, status, ""

    def _fast_deepc(self, N, m):
        """OSQP over ``z = [g; s]`` with ``u = Uf g`` substituted."""
        r, nb = self._Up.shape[1], self._idx_b.size
        H, LY = self._deepc_hessian()
        self._LY = LY
        P = sp.block_diag([sp.csc_matrix(2.0 * H), sp.csc_matrix((nb, nb))], format="csc")
        rows = [sp.hstack([sp.csr_matrix(self._E), sp.csr_matrix((self._E.shape[0], nb))])]
        if self._lam_y is None:
            rows.append(sp.hstack([sp.csr_matrix(self._Yp), sp.csr_matrix((self._Yp.shape[0], nb))]))
        rows += self._box_rows(sp.hstack([sp.csr_matrix(self._Uf), sp.csr_matrix((N * m, nb))]))
        if self._idx_hi.size:
            rows.append(sp.hstack([sp.csr_matrix(self._Yf[self._idx_hi]), -self._S_hi / self._kappa]))
        if self._idx_lo.size:
            rows.append(sp.hstack([sp.csr_matrix(self._Yf[self._idx_lo]), self._S_lo / self._kappa]))
        if nb:
            rows.append(sp.hstack([sp.csr_matrix((nb, r)), sp.eye(nb)]))
        return _FastQP(P, sp.vstack(rows, format="csc"), r + nb)

    # ------------------------------------------------------------------------------------ per plan
    def _target_kind(self):
        return "output"

    def _check_target(self, target):
        return _output_target(np.asarray(target, dtype=np.float64), self.horizon_steps_, self.n_outputs_)

    def _target_rows(self, target):
        return target

    def _past_vector(self, u_past, y_past):
        return np.concatenate([u_past.reshape(-1), y_past.reshape(-1)])

    def _offsets(self, u_past, y_past, target):
        r = target.reshape(-1)
        if self.method_ == "spc":
            fy = self._Kp @ self._past_vector(u_past, y_past)
            return self._Lz @ (fy - r), None, fy
        eq = np.concatenate([u_past.reshape(-1), np.zeros(self._E.shape[0] - self._Up.shape[0])])
        return eq, y_past.reshape(-1), self._Lz @ r

    def _assign(self, offsets):
        if self.method_ == "spc":
            return super()._assign(offsets)
        self._up.value, self._yp.value, self._rw.value = offsets

    def _aux_value(self):
        return None if self.method_ == "spc" else np.array(self._g.value)

    def _solve_fast(self, offsets, lb, ub):
        if self.method_ == "spc":
            return super()._solve_fast(offsets, lb, ub)
        if self._elim is not None:
            return self._solve_fast_eliminated(offsets, lb, ub)
        up, yp, rw = offsets
        r, nb = self._Up.shape[1], self._idx_b.size
        q = -2.0 * self._LY.T @ rw
        if self._lam_y is not None:
            q = q - 2.0 * self._lam_y * self._Yp.T @ yp
        q = np.concatenate([q, np.full(nb, float(self.output_penalty) / self._kappa)])  # t = κ·s (_setup_common)
        lo, hi = [up], [up]
        if self._lam_y is None:
            lo.append(yp)
            hi.append(yp)
        lo.append(lb.reshape(-1))
        hi.append(ub.reshape(-1))
        if self._slew_rows is not None:
            lo.append(-self._slew_rows[1])
            hi.append(self._slew_rows[1])
        if self._idx_hi.size:
            lo.append(np.full(self._idx_hi.size, -np.inf))
            hi.append(self._ymax[self._idx_hi])
        if self._idx_lo.size:
            lo.append(self._ymin[self._idx_lo])
            hi.append(np.full(self._idx_lo.size, np.inf))
        if nb:
            lo.append(np.zeros(nb))
            hi.append(np.full(nb, np.inf))
        z, status, reason = self._fast.solve(q, np.concatenate(lo), np.concatenate(hi))
        if z is None:
            return None, None, status, reason
        g = z[:r]
        return self._Uf @ g, g, status, ""

    def _predict_outputs(self, u, aux, u_past, y_past):
        N, p = self.horizon_steps_, self.n_outputs_
        if self.method_ == "spc":
            y = self._Kp @ self._past_vector(u_past, y_past) + self._Gy @ u.reshape(-1)
        elif aux is not None:
            y = self._Yf @ aux
        else:  # the predictor takes recorded units; the plan's y_past is centred when it has an offset
            off = 0.0 if getattr(self, "_y_off", None) is None else self._y_off
            return np.asarray(self.predictor_.predict(u_past, y_past + off, u), np.float64).reshape(N, p) - off
        return y.reshape(N, p)

    def _cost_terms(self, u, aux, y, u_past, y_past, target):
        r = target.reshape(-1)
        if self.method_ == "spc":
            fy = self._Kp @ self._past_vector(u_past, y_past)
            return self._condensed_terms(u, self._Lz @ (fy - r), None)
        terms = {"tracking": float(np.sum((self._Lz @ (y.reshape(-1) - r)) ** 2)),
                 "input_energy": float(np.sum((self._Ru @ u.reshape(-1)) ** 2))}
        if aux is not None:
            g = aux
            if self._lam_y is not None:
                terms["past_consistency"] = self._lam_y * float(np.sum((self._Yp @ g - y_past.reshape(-1)) ** 2))
            if self._lam_g > 0:
                reg = np.sum(np.abs(g)) if self._reg == "l1" else np.sum((self._M @ g) ** 2)
                terms["regularizer"] = self._lam_g * float(reg)
        return terms


# ---------------------------------------------------------------------------------------------------- plan files
def controller_for(predictor, limits, *, horizon_steps=None, output_weight=1.0, input_weight=1e-3, **settings):
    """The right fitted controller for a fitted predictor of either route.

    Parameters
    ----------
    predictor : StateSpaceModel, a fitted indirect estimator (with ``model_``), LsqPredictor or HankelPredictor
    limits : StimLimits
    horizon_steps : int, optional
        Required for state-space models; default the predictor's horizon for direct predictors.
    output_weight, input_weight
        As in :class:`ModelPredictiveController`.
    **settings
        Further keyword settings of the controller class (documented there).

    Returns
    -------
    ModelPredictiveController or DataPredictiveController
        Fitted (its problem built).

    Raises
    ------
    SessionError
        For a state-space model without ``horizon_steps``, or an object that is no predictor.
    """
    model = predictor if isinstance(predictor, StateSpaceModel) else getattr(predictor, "model_", None)
    if isinstance(model, StateSpaceModel):
        past = getattr(predictor, "past_steps_", None)
        if past is not None:
            model = model.replace(past_steps=int(past))
        if horizon_steps is None:
            raise SessionError("a state-space model has no horizon of its own; give horizon_steps (--horizon).")
        settings.setdefault("output_offset", model.info.get("output_offset"))  # e.g. RidgeArx's resting output
        return ModelPredictiveController(model=model, limits=limits, horizon_steps=horizon_steps,
                                         output_weight=output_weight, input_weight=input_weight, **settings).fit()
    return DataPredictiveController(predictor=predictor, limits=limits, horizon_steps=horizon_steps,
                                    output_weight=output_weight, input_weight=input_weight, **settings).fit()


def _target_column(col, output_names):
    """Output name of a target-table column (``<name>``, ``target:<name>`` or either with `` [unit]``)."""
    name = str(col).strip()
    if name.startswith("target:"):
        name = name[len("target:"):]
    name = name.split("[")[0].strip()
    return name if name in output_names else None


def parse_target(spec, output_names, horizon_steps=None):
    """Read a target: a CSV table over the horizon, or a constant ``name=value,...``.

    Parameters
    ----------
    spec : str or Path
        Either a CSV file with one column per tracked output (header ``<name>``, ``target:<name>`` or either
        followed by `` [unit]``; an optional ``step`` or ``time [s]`` column is ignored) and one row per horizon
        step, or a text ``name=value,name=value`` for a constant target of some outputs, or ``v1,v2,...`` (one
        value per output, in the predictor's order) for a constant target of all of them.
    output_names : sequence of str
        The predictor's outputs. Outputs not named in the target are not tracked.
    horizon_steps : int, optional
        Rows needed (a longer table is cut); default all rows of the table.

    Returns
    -------
    target : ndarray, shape (n_steps, n_outputs)
        Untracked outputs hold 0 (their weight is 0).
    tracked : ndarray of bool, shape (n_outputs,)

    Raises
    ------
    SessionError
        Unknown output names, duplicate or non-numeric values, too few rows, nothing tracked.
    FileNotFoundError
        When ``spec`` names no existing file and is not a ``name=value`` list.
    """
    from pathlib import Path

    output_names = tuple(output_names)
    text = str(spec)
    if _is_constant_target(text):
        values = {}
        for part in (s for s in text.split(",") if s.strip()):
            name, sep, val = part.partition("=")
            name = name.strip()
            if not sep or name not in output_names:
                raise SessionError(f"target part {part!r} must be <output>=<value> with an output of "
                                   f"{list(output_names)}.")
            if name in values:
                raise SessionError(f"target names output {name!r} twice; give each output once.")
            try:
                values[name] = float(val)
            except ValueError:
                raise SessionError(f"target value {val!r} for {name!r} is not a number.") from None
            if not np.isfinite(values[name]):
                raise SessionError(f"target value for {name!r} must be finite; got {val!r}.")
        if horizon_steps is None:
            raise SessionError("a constant target has no length; give the horizon (--horizon-steps).")
        row = np.array([values.get(n, 0.0) for n in output_names])
        return np.tile(row, (int(horizon_steps), 1)), np.array([n in values for n in output_names])
    values = _number_list(text)
    if values is not None and not Path(text).is_file():
        if len(values) != len(output_names):
            raise SessionError(f"target {text!r} gives {len(values)} value(s); a constant target as a plain list needs "
                               f"one per output ({len(output_names)}: {list(output_names)}), or use "
                               "<output>=<value> pairs to track only some.")
        if not np.all(np.isfinite(values)):
            raise SessionError(f"target values must be finite; got {text!r}.")
        if horizon_steps is None:
            raise SessionError("a constant target has no length; give the horizon (--horizon-steps).")
        return np.tile(values, (int(horizon_steps), 1)), np.ones(len(output_names), dtype=bool)
    if not Path(text).is_file():
        raise FileNotFoundError(2, "no such target file (nor name=value pairs, nor one number per output)", text)
    return _target_table(Path(text), output_names, horizon_steps)


def _number_list(text: str):
    """The numbers of a comma-separated list such as ``"0.5,0,1.2"``, or None when it is not one."""
    parts = [p.strip() for p in text.split(",")]
    try:
        return np.array([float(p) for p in parts]) if parts and all(parts) else None
    except ValueError:
        return None


def _is_constant_target(spec) -> bool:
    from pathlib import Path

    return "=" in str(spec) and not Path(str(spec)).is_file()


def _target_table(path, output_names, horizon_steps):
    import pandas as pd

    if not path.is_file():
        raise FileNotFoundError(2, "no such target file", str(path))
    try:
        frame = pd.read_csv(path)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise SessionError(f"{path} is not a readable CSV table ({exc}).") from None
    cols, ignored, unknown = {}, [], []
    for col in frame.columns:
        name = _target_column(col, output_names)
        if name is not None:
            if name in cols:
                raise SessionError(f"{path} has two columns for output {name!r}.")
            cols[name] = col
        elif str(col).strip() == "step" or str(col).strip().startswith("time [s]"):
            ignored.append(col)
        else:
            unknown.append(str(col))
    if unknown or not cols:
        raise SessionError(f"{path}: columns {unknown or list(frame.columns)} are no outputs of the predictor "
                           f"{list(output_names)}; name target columns after outputs (optionally 'target:<name> "
                           "[unit]'), plus an optional 'step' or 'time [s]' column.")
    n = frame.shape[0] if horizon_steps is None else int(horizon_steps)
    if frame.shape[0] < n or n < 1:
        raise SessionError(f"{path} holds {frame.shape[0]} target rows; the horizon needs {n}.")
    target = np.zeros((n, len(output_names)))
    for j, name in enumerate(output_names):
        if name in cols:
            v = pd.to_numeric(frame[cols[name]].iloc[:n], errors="coerce").to_numpy(float)
            if not np.all(np.isfinite(v)):
                raise SessionError(f"{path}: column {cols[name]!r} holds empty or non-numeric cells in the first "
                                   f"{n} rows.")
            target[:, j] = v
    return target, np.array([n in cols for n in output_names])


def write_plan(plan: Plan, out_dir, *, sample_rate_hz, output_units=None, tracked=None, extra=None,
               force=False) -> dict:
    """Write a plan to a folder: table, stimulation pattern, figure and summary, atomically.

    Files: ``plan.csv`` (``time [s] @ <rate> Hz``, ``in:<name> [uA]``, ``out:<name> [<unit>]`` predicted,
    ``target:<name> [<unit>]`` for tracked outputs, ``lower:<name> [uA]`` / ``upper:<name> [uA]`` step bounds),
    ``plan_pattern.csv`` (the inputs alone, in the pattern layout of ``stimsteer predict --pattern``),
    ``plan.png`` and ``plan.json`` (status, cost terms, active limits, caution, and ``extra``).

    Returns
    -------
    dict of str to Path
        ``csv``, ``pattern``, ``png``, ``json``.
    """
    import json
    from pathlib import Path

    import pandas as pd

    from ..sysid._files import atomic_dir

    out_dir = Path(out_dir)
    p = len(plan.output_names)
    units = tuple(output_units) if output_units else ("a.u.",) * p
    tracked = np.ones(p, bool) if tracked is None else np.asarray(tracked, bool)
    rate = float(sample_rate_hz)
    t = np.arange(plan.horizon_steps) / rate
    time_col = f"time [s] @ {rate:.12g} Hz"
    ins = {f"in:{n} [uA]": plan.inputs[:, i] for i, n in enumerate(plan.input_names)}
    table = {time_col: t, **ins}
    table.update({f"out:{n} [{u}]": plan.predicted_outputs[:, j] for j, (n, u) in enumerate(zip(plan.output_names,
                                                                                                   units))})
    if plan.target_kind == "output":
        table.update({f"target:{n} [{units[j]}]": plan.target[:, j] for j, n in enumerate(plan.output_names)
                      if tracked[j]})
    lb, ub = plan.step_bounds
    table.update({f"lower:{n} [uA]": lb[:, i] for i, n in enumerate(plan.input_names)})
    table.update({f"upper:{n} [uA]": ub[:, i] for i, n in enumerate(plan.input_names)})
    summary = {**plan.to_dict(), **(extra or {})}
    with atomic_dir(out_dir, force=force) as tmp:
        pd.DataFrame(table).to_csv(tmp / "plan.csv", index=False, float_format="%.10g")
        pd.DataFrame({time_col: t, **ins}).to_csv(tmp / "plan_pattern.csv", index=False, float_format="%.10g")
        _plot_plan(plan, t, units, tracked, tmp / "plan.png")
        (tmp / "plan.json").write_text(json.dumps(summary, indent=2, allow_nan=False, default=_json_default))
    return {k: out_dir / f for k, f in (("csv", "plan.csv"), ("pattern", "plan_pattern.csv"), ("png", "plan.png"),
                                        ("json", "plan.json"))}


def _json_default(v):
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        return v.tolist()
    raise TypeError(f"not JSON-serialisable: {type(v).__name__}")


_PLAN_LINES = 6


def _plot_plan(plan, t, units, tracked, path):
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    p = len(plan.output_names)
    bounded = plan.active_limits["output_bounds"]
    order = [j for j in range(p) if tracked[j]] + [j for j in range(p) if not tracked[j] and bounded[:, j].any()]
    order = order[:_PLAN_LINES] or [0]
    fig, axes = plt.subplots(2, 1, figsize=(8.0, 6.0), sharex=True, constrained_layout=True)
    ax = axes[0]
    lb, ub = plan.step_bounds
    for i, name in enumerate(plan.input_names):
        line, = ax.step(t, plan.inputs[:, i], where="post", lw=1.8, label=name)
        for bound in (lb[:, i], ub[:, i]):
            ax.step(t, bound, where="post", lw=0.9, ls=":", color=line.get_color())
    ax.set_ylabel("stimulation [µA]")
    ax.set_title("planned inputs (dotted: hard limits per step)", loc="left", fontsize=10)
    ax.legend(loc="upper right", fontsize=8, frameon=False, ncol=min(4, len(plan.input_names)))
    ax = axes[1]
    for j in order:
        line, = ax.plot(t, plan.predicted_outputs[:, j], lw=1.6, label=f"{plan.output_names[j]} [{units[j]}]")
        if plan.target_kind == "output" and tracked[j]:
            ax.plot(t, plan.target[:, j], ls="--", lw=1.0, color=line.get_color())
        if plan.output_bounds is not None:
            for bound in (plan.output_bounds[0][j], plan.output_bounds[1][j]):
                if np.isfinite(bound):
                    ax.axhline(bound, ls=":", lw=0.9, color=line.get_color())
    ax.set_xlabel("time from plan start [s]")
    ax.set_ylabel("predicted output")
    ax.set_title("predicted outputs (dashed: target; dotted: soft bound)", loc="left", fontsize=10)
    ax.legend(loc="upper right", fontsize=8, frameon=False, ncol=2)
    for a in axes:
        a.spines[["top", "right"]].set_visible(False)
        a.grid(alpha=0.25, lw=0.5)
    fig.suptitle(f"stimsteer plan: {plan.status}" + (" (safe fallback)" if plan.fallback else ""), fontsize=11,
                 x=0.01, ha="left")
    # the figure travels alone (slides, lab notes), so it carries the caution itself
    fig.supxlabel(textwrap.fill(plan.caution, 120), fontsize=7, color="#7a4a00", x=0.01, ha="left")
    fig.savefig(path, dpi=110)
    plt.close(fig)


@dataclass(frozen=True)
class PlanRun:
    """What :func:`plan_to_folder` did: the plan, the files written and readable summary lines."""

    plan: Plan
    files: dict
    lines: tuple


def plan_to_folder(model_path, *, target, limits_path, out_dir, horizon_steps=None, from_trial=None,
                   output_weight=1.0, input_weight=1e-3, force=False) -> PlanRun:
    """Load a saved predictor and a limits file, plan towards a target, and write the plan folder.

    Parameters
    ----------
    model_path : str or Path
        A model file of ``stimsteer fit`` (:func:`stimsteer.sysid.storage.load_predictor`).
    target : str
        See :func:`parse_target`.
    limits_path : str or Path
        A limits file (:func:`stimsteer.control.limits.load_limits`), matched to the model's inputs by name.
    out_dir : str or Path
        New or empty folder (or ``force``).
    horizon_steps : int, optional
        Default: the target table's rows, else the predictor's horizon.
    from_trial : (str, int), optional
        ``(session path, trial index)``: plan from the end of that recorded trial; default from rest.
    output_weight, input_weight : float
        Scalar weights; outputs not named in the target get weight 0.
    force : bool
        Replace an existing output folder.

    Returns
    -------
    PlanRun
    """
    from ..sysid.routes import open_session_source, rest_window, trial_end_window
    from ..sysid.storage import load_predictor
    from .limits import load_limits

    predictor, provenance = load_predictor(model_path)
    limits = load_limits(limits_path)
    names_in, names_out, units, rate = _channels(predictor, provenance)
    N = horizon_steps
    if N is None and _is_constant_target(target):  # a table gives its own length
        N = getattr(predictor, "max_horizon_steps_", None)
    tgt, tracked = parse_target(target, names_out, N)
    N = tgt.shape[0]
    weight = float(output_weight) * tracked.astype(float)
    ctrl = controller_for(predictor, limits, horizon_steps=N, output_weight=weight, input_weight=input_weight)
    window_of = predictor if hasattr(predictor, "past_steps_") else ctrl  # a bare model: the controller's window
    if from_trial is None:
        u_past, y_past = rest_window(window_of, len(names_in), len(names_out))
        start = "rest"
    else:
        path, index = from_trial
        with open_session_source(path) as session:  # our HDF5 layout: only the trial's last window is read
            u_past, y_past = trial_end_window(session, index, window_of, provenance)
        start = f"the end of trial {index} of {path}"
    plan = ctrl.plan(u_past, y_past, target=tgt)
    extra = {"model_file": str(model_path), "limits_file": str(limits_path), "start": start,
             "tracked_outputs": [n for n, t in zip(names_out, tracked) if t], "sample_rate_hz": rate,
             "limits": ctrl.limits_.to_dict(), "controller": type(ctrl).__name__,
             "method": getattr(ctrl, "method_", "model")}
    files = write_plan(plan, out_dir, sample_rate_hz=rate, output_units=units, tracked=tracked, extra=extra,
                       force=force)
    lines = [f"planned {N} steps ({N / rate:.4g} s) of {len(names_in)} input(s) from {start} with "
             f"{type(ctrl).__name__} ({extra['method']}): status {plan.status}, {plan.solver}, "
             f"{1e3 * plan.solve_time_s:.1f} ms"]
    if plan.message:
        lines.append(f"note: {plan.message}")
    recorded = provenance.get("session", {}).get("input_units") if isinstance(provenance, dict) else None
    other = sorted({str(u) for u in (recorded or ()) if str(u).strip() not in _MICROAMPERE})
    if other:
        lines.append(f"note: the model's inputs were recorded in {', '.join(other)}, while the limits file declares "
                     "µA; the limits were applied to the recorded numbers as they are. Check that they match.")
    lines.append("cost: " + ", ".join(f"{k} {v:.4g}" for k, v in plan.cost_terms.items()))
    lines += [f"active: {s}" for s in plan.active_summary()] or ["active: no limit is binding"]
    if plan.slack_total > 0:
        lines.append(f"output bounds exceeded by up to {float(np.max(plan.output_slack)):.4g} (soft bounds)")
    return PlanRun(plan=plan, files=files, lines=tuple(lines))


_MICROAMPERE = {"uA", "µA", "μA", "microampere", "microamperes"}  # spellings of the limits file's unit


def _channels(predictor, provenance):
    """Input and output names, output units and the sample rate of a saved predictor."""
    s = provenance.get("session", {}) if isinstance(provenance, dict) else {}
    model = predictor if isinstance(predictor, StateSpaceModel) else getattr(predictor, "model_", None)
    src = model if isinstance(model, StateSpaceModel) else None
    names_in = tuple(s.get("input_names") or (src.input_names if src else predictor.input_names_))
    names_out = tuple(s.get("output_names") or (src.output_names if src else predictor.output_names_))
    units = tuple(s.get("output_units") or ("a.u.",) * len(names_out))
    rate = float(s.get("sample_rate_hz") or (src.sample_rate_hz if src else
                                             getattr(predictor, "sample_rate_hz_", 1.0)))
    return names_in, names_out, units, rate
