"""The machinery every predictive controller shares: settings checks, limits, step bounds, guard, solve, projection
and packaging of the :class:`~stimsteer.control.mpc.Plan`.

A controller subclass supplies the prediction (``_offsets``, ``_assign``, ``_solve_fast``, ``_aux_value``,
``_predict_outputs``, ``_cost_terms``, ``_check_target``, ``_target_rows``); :meth:`_PredictiveController.plan`
does the rest, the same way for every formulation.

Safety. Every returned input sequence respects the hard limits. Before a solve the step bounds are checked (the slew
window of the first step against the amplitude window, and the energy of the safe sequence in every budget window
that ends inside the plan, counting the applied past; see :mod:`~stimsteer.control.mpc._budget`); after a solve the
answer is verified, clipped onto the exact bounds when it exceeds them by solver tolerance only, and re-checked.
A plan that cannot be solved carries the safe fallback of :meth:`StimLimits.safe_inputs`.

Scaling. Targets far from what the inputs can reach (1e6 against ±30 µA) make the cost's linear term huge next to
its curvature, and an interior-point solver may then call a feasible problem infeasible. The cvxpy problems divide
their cost by ``σ`` (a Parameter, so they stay DPP) chosen per plan so that the cost's slope over the input box is
of order one; the minimiser is the same.

Units. The solver's tolerances are absolute, so the cvxpy problem's hard input rows (amplitude, slew, energy budget)
are written in units of the largest amplitude bound (budget rows in their own unit, :mod:`.._budget`): a session in
mA and in µA gives the same cone problem up to the cost's scaling, and the solver stops equally close to a bound in
physical terms. The answer is checked and projected in the controller's units.
"""

from __future__ import annotations

import time
from functools import partial

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

from ...sysid import BaseEstimator, InvalidParameterError, SessionError, check_fitted
from ..limits import StimLimits
from ..sequence_limits import history_breaks, on_mask
from ._budget import _RollingBudget
from ._budget_sqp import fast_budgeted
from ._cone_solve import ready, solve_compiled
from .plan import Plan, _Deferred, _made, _ro
from ._verify import _ACCEPT_RTOL, _ZERO_RTOL, _PlanLimits  # noqa: F401 (the tolerances, named here before)
from ._settings import _clip_psd, _horizon, _output_target, _sqrt_weight  # noqa: F401 (robust.py, lifted.py)
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__: list = []

_ACCEPT = {"optimal": "optimal", "optimal_inaccurate": "optimal_inaccurate"}  # cvxpy.OPTIMAL, OPTIMAL_INACCURATE


# ---------------------------------------------------------------------------------------------------- base
class _PredictiveController(BaseEstimator):
    """Shared machinery: limits, step bounds, guards, solve, projection, plan packaging.

    Settings come from the subclass's constructor (``get_params``/``set_params`` from its signature, see
    :class:`~stimsteer.sysid.BaseEstimator`); ``fit`` sets ``problem_`` last, and every fitted attribute ends in ``_``.
    """

    # ------------------------------------------------------------------------------------ construction
    def _setup_common(self, input_names, output_names, N):
        if not isinstance(self.limits, StimLimits):
            raise InvalidParameterError(f"limits must be a StimLimits (see stimsteer.control.limits); got "
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
        self.energy_window_steps_ = None if self._energy is None else (self.limits_.energy_window_steps or N)
        self._budget = None if self._energy is None else _RollingBudget(self._energy, self.energy_window_steps_, N,
                                                                           self._slew)
        # every budget over rolling windows: the per-sample layout's Σ u², then those in physical units
        self._budgets = ([] if self._budget is None else [self._budget]) + [_RollingBudget(
            b.budget, b.window_steps, N, self._slew, linear=b.linear, quadratic=b.quadratic, name=b.name, unit=b.unit)
            for b in self.limits_.window_budgets]
        self._train = self.limits_.train_limits
        # applied inputs a plan must see: every budget window and train limit reaches this far back
        self.history_steps_ = max([b.window - 1 for b in self._budgets] +
                                  [0 if self._train is None else self._train.keep()])
        self._set_history(None)
        # the cone problem's input rows are written in units of the largest amplitude bound (see "Units"); the
        # acceptance tolerance of a solver's answer is relative to it too, so it means the same in any unit
        bounds = np.abs(np.concatenate([self._lo, self._hi]))
        bounds = bounds[np.isfinite(bounds) & (bounds > 0)]
        self._row_scale = float(np.max(bounds)) if bounds.size else 1.0
        self._scale = self._row_scale
        self._Ru = sla.block_diag(*[_sqrt_weight("input_weight", self.input_weight, m)] * N)
        try:
            penalty = float(self.output_penalty)
        except (TypeError, ValueError):
            penalty = np.nan
        if not np.isfinite(penalty) or penalty <= 0:
            raise InvalidParameterError(f"output_penalty must be positive and finite; got "
                                        f"{self.output_penalty!r}.")
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
        self._checks = _PlanLimits(self)  # the limit constants of every plan, computed once (_verify.py)

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
        rs = self._row_scale
        self._lb = cp.Parameter(N * m, name="step_lower_scaled")
        self._ub = cp.Parameter(N * m, name="step_upper_scaled")
        cons = [u / rs >= self._lb, u / rs <= self._ub]
        if self._slew_rows is not None:
            Dm, lim = self._slew_rows
            cons += [Dm @ u / rs <= lim / rs, Dm @ u / rs >= -lim / rs]
        for b in self._budgets:
            cons += b.constraints(u, m, self._row_scale if b.weighted else b.unit_scale())
        slack = None
        if self._idx_b.size:
            slack = cp.Variable(self._idx_b.size, nonneg=True, name="output_slack")
            if self._idx_hi.size:
                cons.append(y_expr(self._idx_hi) - self._S_hi @ slack <= yhi)
            if self._idx_lo.size:
                cons.append(y_expr(self._idx_lo) + self._S_lo @ slack >= ylo)
        return cons, slack

    def _row_bounds(self, lb, ub, free=None):
        """Lower and upper bounds of the fast QPs' rows after any equalities: the inputs' box, the slew rows, the
        soft output rows (upper, then lower; less the free response ``free`` where the rows hold only the part that
        moves with the variables) and the slack's ``t >= 0``, in the order :meth:`_box_rows` and the output rows
        are stacked."""
        lo, hi = [lb.reshape(-1)], [ub.reshape(-1)]
        if self._slew_rows is not None:
            lo.append(-self._slew_rows[1])
            hi.append(self._slew_rows[1])
        ih, il, nb = self._idx_hi, self._idx_lo, self._idx_b.size
        if ih.size:
            lo.append(np.full(ih.size, -np.inf))
            hi.append(self._ymax[ih] - (0.0 if free is None else free[ih]))
        if il.size:
            lo.append(self._ymin[il] - (0.0 if free is None else free[il]))
            hi.append(np.full(il.size, np.inf))
        if nb:
            lo.append(np.zeros(nb))
            hi.append(np.full(nb, np.inf))
        return lo, hi

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
        for qp in {id(q): q for q in (self._fast, getattr(self, "_fast_u", None)) if q is not None}.values():
            qp.reset()  # (DeePC's input-only QP beside its g-space one)
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
            if not np.isfinite(a[-T:]).all():
                raise SessionError(f"{name} holds NaN or infinite values in its last {T} samples; plan from a "
                                   "clean stretch of data.")
        return u_past[-T:], y_past[-T:]

    def _check_last(self, last_input, u_past):
        if last_input is None:
            return u_past[-1].copy()
        last = np.asarray(last_input, dtype=np.float64).reshape(-1)
        if last.shape != (self.n_inputs_,) or not np.isfinite(last).all():
            raise SessionError(f"last_input must be {self.n_inputs_} finite values (µA); got {last_input!r}.")
        return last

    def _step_bounds(self, last):
        """The window each step obeys, and the inputs whose slew window at step 0 misses the amplitude window.

        There the amplitude window takes precedence (it is the one the plan obeys, and the one written), and the
        slew limit is broken at step 0.
        """
        return self._checks.step_bounds(last)

    def _guard(self, broken, last, fallback):
        """Reason why no input sequence can meet the limits from ``last``, or '' when one can."""
        if broken.any():
            i = int(np.flatnonzero(broken)[0])
            return (f"the slew window of input {self.input_names_[i]!r} around the last applied input "
                    f"{last[i]:g} µA does not meet its amplitude window [{self._lo[i]:g}, {self._hi[i]:g}] µA; "
                    "the amplitude bound takes precedence and the slew limit is broken at step 0")
        if self._budget is not None and self._budget.excess(fallback, self._hist) > 1e-9 * self._energy:
            worst = self._budget.excess(fallback, self._hist) + self._energy
            return (f"even the least-energy sequence allowed by the slew limit puts {worst:.4g} µA² in a window of "
                    f"{self.energy_window_steps_} samples (counting the inputs applied before the plan) > the energy "
                    f"budget {self._energy:g} µA²; raise the budget or the slew limit")
        for b, h in zip(self._budgets, self._hists):
            if b.weighted and b.relative_excess(fallback, h) > 1e-9:
                return (f"{b.name}: the inputs applied before the plan already put {b.excess(fallback, h) + b.budget:.4g} "
                        f"{b.unit} in a window of {b.window} samples > the budget {b.budget:.4g} {b.unit}, even with "
                        "the least stimulation from now on; the plan cannot meet it")
        return history_breaks(self._train, self._u_all, self.horizon_steps_) if self._train is not None else ""

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None) -> Plan:
        """Plan the stimulation over the horizon from the measured past.

        Parameters
        ----------
        u_past : ndarray, shape (n_past, n_inputs)
            Applied inputs, µA, ending just before the plan; the last ``past_steps_`` samples are used for the
            prediction and the last ``energy_window_steps_ − 1`` for the energy budget's windows (samples before a
            shorter past count as rest: pass what was applied).
        y_past : ndarray, shape (n_past_y, n_outputs)
            Measured outputs ending at the same sample (at least ``past_steps_`` of them).
        target : ndarray
            Output kind: shape (horizon_steps, n_outputs) (a trajectory; longer ones are cut) or (n_outputs,)
            (constant). State kind: shape (n_states,).
        last_input : ndarray, shape (n_inputs,), optional
            The input applied just before the plan (for the slew limit); default ``u_past[-1]``.
        use_fast_path : bool, optional
            Solve with the reusable fast QP (True: dense and warm started where it applies, else OSQP;
            :mod:`~stimsteer.control.mpc.fastqp`) or the cvxpy problem (False); default the controller's
            ``fast_path`` setting. The fast path is used only where it exists (see :mod:`stimsteer.control.mpc`); when
            it fails (e.g. its iteration limit on a badly scaled penalty), the cvxpy problem is solved instead
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
        u_all = np.asarray(u_past, np.float64)
        u_past, y_past = self._check_past(u_all, y_past)
        self._set_history(u_all)
        last = self._check_last(last_input, u_past)
        target = self._check_target(target)
        lb, ub, broken = self._step_bounds(last)
        if self._train is not None:  # the on/off mask of the train limits, from the applied history
            mask = on_mask(self._train, self._u_all, self.horizon_steps_)
            lb, ub = np.where(mask, lb, 0.0), np.where(mask, ub, 0.0)
        t0 = time.perf_counter()
        # the safe fallback is needed up front only with an energy budget (guard, projection blend)
        fallback = self._checks.fallback(last) if self._budgets else None
        reason = self._guard(broken, last, fallback)
        fast = self.fast_path if use_fast_path is None else bool(use_fast_path)
        fast = fast and self._fast is not None
        solver, aux, u, status = getattr(self._fast, "label", "OSQP (reused)") if fast else "", None, None, "infeasible"
        if not reason:
            u, aux, status, reason, solver = self._solve(self._offsets(u_past, y_past, target), lb, ub, fast, solver)
            if u is not None:
                u, why = self._project(u.reshape(lb.shape), lb, ub, last, fallback)
                if u is None:
                    status, reason = "failed", why
        elapsed = time.perf_counter() - t0
        is_fallback = u is None
        if is_fallback:
            u, aux = (self._checks.fallback(last) if fallback is None else fallback), None
        return self._package(u, aux, u_past, y_past, target, last, (lb, ub, broken), solver, status, reason,
                             is_fallback, elapsed)

    def _solve(self, offsets, lb, ub, fast, solver):
        """The fast path (when asked), handing over to the cvxpy problem when it fails or the budget binds."""
        u = aux = None
        status = reason = ""
        if fast:
            u, aux, status, reason = self._solve_fast(offsets, lb, ub)
            if u is not None and self._budget_excess(u) > -1e-9:
                # a budget window binds (or breaks): the budget-free QP's answer is not the optimum; the dense
                # budget iteration (_budget_sqp) where it applies, else the cvxpy problem below
                u, aux, status, reason = fast_budgeted(self, offsets, lb, ub)
                if u is not None:
                    solver = f"{solver} + budget SQP"
        if not fast or status in ("failed", "budget"):  # the fast path is an accelerator only
            first = reason
            u, aux, status, reason = self._solve_cvxpy(offsets, lb, ub)
            if fast and not first.startswith("energy budget"):
                note = "solved with the cvxpy problem instead" if u is not None else reason
                reason = f"fast path: {first}; {note}"
            solver = (f"{solver} -> " if fast else "") + f"{self._cvx_solver()} (cvxpy)"
        return u, aux, status, reason, solver

    def _cvx_solver(self):
        return str(self.solver).upper()

    def _solve_cvxpy(self, offsets, lb, ub):
        problem = ready(self.problem_)  # built at its first use (its Parameters are set on the controller)
        self._set_cost_scale(offsets)
        self._assign(offsets)
        self._lb.value, self._ub.value = lb.reshape(-1) / self._row_scale, ub.reshape(-1) / self._row_scale
        for b, h in zip(self._budgets, self._hists):
            b.assign(h)
        failure = solve_compiled(problem, self._cvx_solver(), self.solver_options)
        if failure:
            return None, None, "failed", failure
        status = problem.status
        if status not in _ACCEPT or self._u.value is None:
            kind = "infeasible" if status in (cp.INFEASIBLE, cp.INFEASIBLE_INACCURATE) else "failed"
            return None, None, kind, f"{self._cvx_solver()} returned status '{status}'"
        return np.array(self._u.value), self._aux_value(), _ACCEPT[status], ""

    def _project(self, u, lb, ub, last, fallback):
        """Verify a solver answer against the hard limits; clip tolerance-level excess onto the exact bounds.

        Returns ``(u, "")``, or ``(None, why)`` when the answer breaks a limit beyond tolerance or any check fails
        after the projection (:meth:`._verify._PlanLimits.project`).
        """
        return self._checks.project(self, u, lb, ub, last, fallback)

    def _package(self, u, aux, u_past, y_past, target, last, bounds, solver, status, reason, is_fallback, elapsed):
        """The :class:`Plan`; the reports a loop does not read are computed at their first read, from values
        captured here (:mod:`.plan`): the prediction's copy, the cost terms, the output slack, the largest window
        load and the broken limits."""
        lb, ub, broken = bounds
        y = self._predict_outputs(u, aux, u_past, y_past)
        if status in _ACCEPT.values() and is_fallback:
            status = "failed"
        loads = self._checks.energies_of(self, u) if self._budgets else None
        reports = _Reports(y, self._ymax, self._ymin, float(self.output_penalty),
                           self._cost_terms_later(u, aux, y, u_past, y_past, target))
        last_ro = _ro(last)
        return _made(
            inputs=_ro(u), predicted_outputs=_Deferred(partial(_ro, y)), target=_ro(self._target_rows(target)),
            target_kind=self.target_kind_, cost_terms=_Deferred(reports.terms),
            active_limits=self._checks.active(self, u, y, last, loads), output_slack=_Deferred(reports.slack_rows),
            step_bounds=(_ro(lb), _ro(ub)), last_input=last_ro, solver=solver, status=status,
            message=(f"{reason}; returning the safe fallback (towards zero stimulation within the slew limit)"
                     if is_fallback else reason), fallback=is_fallback, solve_time_s=float(elapsed),
            input_names=self.input_names_, output_names=self.output_names_,
            output_bounds=self._checks.output_bounds,
            energy_window_steps=self.energy_window_steps_,
            energy_window_max_ua2=None if self._budget is None else _Deferred(partial(_largest, loads[0])),
            broken_limits=_Deferred(self._checks.broken_later(self, last_ro, broken, loads)),
        )

    def _cost_terms_later(self, u, aux, y, u_past, y_past, target):
        """A function giving the plan's cost terms (without the output penalty and total), of values captured now.

        Here they are computed now (a controller's ``_cost_terms`` may read state a later plan changes); a
        controller whose terms are a function of this plan's own arrays returns that function instead."""
        terms = self._cost_terms(u, aux, y, u_past, y_past, target)
        return lambda: dict(terms)

    def _set_history(self, u_all):
        """The applied past a plan sees (every budget window and train limit reaches into it) and its loads."""
        self._u_all = u_all
        self._hist = None if self._budget is None or u_all is None else self._budget.history(u_all)
        self._whists = [] if u_all is None else [b.history(u_all) for b in self._budgets if b.weighted]

    @property
    def _hists(self) -> list:  # the applied past's load per window step, one array per budget of ``_budgets``
        return ([self._hist] if self._budget is not None else []) + self._whists

    def _budget_excess(self, u) -> float:
        """The largest window load over its budget, as a fraction of the budget, over every budget (-inf: none)."""
        return max((b.relative_excess(u, h) for b, h in zip(self._budgets, self._hists)), default=-np.inf)



class _Reports:
    """A plan's output slack and cost terms, computed at the first read of either (from the plan's own arrays)."""

    def __init__(self, y, ymax, ymin, penalty, terms):
        self._y, self._ymax, self._ymin, self._penalty, self._terms = y, ymax, ymin, penalty, terms
        self._slack = None

    def _flat_slack(self):
        if self._slack is None:
            yv = self._y.reshape(-1)
            self._slack = np.maximum(0.0, np.maximum(yv - self._ymax, self._ymin - yv))
        return self._slack

    def slack_rows(self):
        return _ro(self._flat_slack().reshape(self._y.shape))

    def terms(self):
        terms = self._terms()
        terms["output_penalty"] = self._penalty * float(np.sum(self._flat_slack()))
        terms["total"] = float(sum(terms.values()))
        return terms


def _largest(loads) -> float:
    """``Plan.energy_window_max_ua2``: the largest load of the energy budget's windows."""
    return float(np.max(loads))
