"""Plans robust over an ensemble of predictors: the worst member's tracking cost, or the members' average.

For an ensemble whose members have linear prediction maps (``member_maps`` of
:class:`~stimsteer.sysid.ensemble.BootstrapEnsemble`), member ``b`` predicts ``ŷ_b = F_b u + f_b(past)`` and::

    worst case:  minimise  max_b ‖Lz(F_b u + f_b − r)‖² + ‖Ru u‖² + ρ Σ s     (epigraph: t >= each member's cost)
    average:     minimise  (1/B) Σ_b ‖Lz(F_b u + f_b − r)‖² + ‖Ru u‖² + ρ Σ s
    subject to   the hard input limits of every controller: amplitude ∩ charge-density bound, slew (from the last
                 applied input), and the energy budget over rolling windows that start in the applied past
                 (:mod:`~stimsteer.control.mpc._budget`);
                 soft output bounds  ymin − s <= ŷ <= ymax + s  on every member's prediction (worst case) or on
                 the members' mean prediction (average), with one slack ``s >= 0`` per bounded output and step.

Both are convex (a second-order cone program), built once with Parameters (DPP). The average is the expected cost
under the ensemble (it penalises the members' spread as well as the mean error); the worst case is the minimax plan
(Bemporad & Morari 1999), and with output bounds it keeps every member's prediction inside them when it can (the
slack, reported in ``Plan.output_slack``, is then the largest excess over the members).

The limits, their checks before and after the solve, the projection onto the exact bounds and the safe fallback are
those of every controller (:class:`~stimsteer.control.mpc._core._PredictiveController`), so the recursive
feasibility of the energy budget holds here too: a closed loop that starts inside the budget stays inside it in
every window of applied inputs, whatever the members predict.

References
----------
Bemporad A., Morari M. (1999), Robust model predictive control: a survey, in Robustness in Identification and
Control, LNCIS 245, Springer.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import scipy.linalg as sla

from ...sysid import InvalidParameterError
from ...sysid.protocols import past_vector
from ._core import _horizon, _output_target, _PredictiveController, _sqrt_weight
from .condensed import _COST_SCALE_FREE
from .plan import _ro
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__ = ["RobustPlanner"]

MODES = ("worst", "average")


class RobustPlanner(_PredictiveController):
    """Plans of stimulation robust over the members of an ensemble, under the declared hard limits.

    Parameters
    ----------
    ensemble : object with ``member_maps(past_steps, horizon_steps)`` and the predictor attributes
        E.g. a fitted :class:`~stimsteer.sysid.ensemble.BootstrapEnsemble` of a linear method.
    limits : StimLimits
        Every limit a :class:`StimLimits` declares: amplitude, charge density, slew, an energy budget over rolling
        windows (hard) and output bounds (soft: every member's prediction in worst-case mode, the mean prediction
        in average mode).
    horizon_steps : int
    mode : {"worst", "average"}, default "worst"
    output_weight, input_weight, output_penalty, solver, solver_options
        As in :class:`ModelPredictiveController`. There is no fast path (the problem is a cone program).

    Attributes
    ----------
    problem_ : cvxpy.Problem
    limits_, past_steps_, horizon_steps_, n_inputs_, n_outputs_, input_names_, output_names_, n_members_, method_,
    energy_window_steps_, target_kind_

    Notes
    -----
    ``Plan.cost_terms`` holds ``tracking`` (the criterion of the mode: the worst member's or the members' mean
    tracking cost), ``input_energy``, ``output_penalty`` and their ``total``, and for information
    ``worst_member_tracking``, ``mean_member_tracking`` and ``member_spread_rms`` (the rms spread of the members'
    predicted outputs). ``Plan.predicted_outputs`` is the members' mean prediction.
    """

    # no reusable QP for this problem; plan() solves the cone program
    fast_path = False

    def __init__(self, *, ensemble, limits, horizon_steps, mode="worst", output_weight=1.0, input_weight=1e-3,
                 output_penalty=1e4, solver="CLARABEL", solver_options=None):
        self.ensemble = ensemble
        self.limits = limits
        self.horizon_steps = horizon_steps
        self.mode = mode
        self.output_weight = output_weight
        self.input_weight = input_weight
        self.output_penalty = output_penalty
        self.solver = solver
        self.solver_options = solver_options

    def fit(self):
        """Build the convex problem once from the members' maps (Parameters: free responses, target, step bounds,
        the energy budget left by the applied past, output bounds)."""
        if self.mode not in MODES:
            raise InvalidParameterError(f"mode must be one of {MODES} (worst case or average over the members); got "
                                        f"{self.mode!r}.")
        ens = self.ensemble
        self.problem_ = None
        N = _horizon(self.horizon_steps, ens.max_horizon_steps_)
        self._setup_common(tuple(ens.input_names_), tuple(ens.output_names_), N)
        T, m, p = int(ens.past_steps_), self.n_inputs_, self.n_outputs_
        maps = ens.member_maps(T, N)
        self._P = [np.asarray(mp.P, np.float64) for mp in maps]
        self._F = [np.asarray(mp.F, np.float64) for mp in maps]
        self._c = [np.asarray(mp.c, np.float64) for mp in maps]
        self._Lz = sla.block_diag(*[_sqrt_weight("output_weight", self.output_weight, p)] * N)
        self._LF = [self._Lz @ F for F in self._F]
        self.past_steps_, self.n_members_, self._fast = T, len(maps), None
        self.method_, self.target_kind_ = f"robust-{self.mode}", "output"
        self._build()
        return self

    def _build(self):
        N, m, p = self.horizon_steps_, self.n_inputs_, self.n_outputs_
        self._u = u = cp.Variable(N * m, name="inputs_ua")
        self._sw = cp.Parameter(nonneg=True, name="cost_scale_sqrt", value=1.0)
        self._sw2 = cp.Parameter(nonneg=True, name="cost_scale", value=1.0)
        self._cost_sw = 1.0
        self._ew = [cp.Parameter(N * p, name=f"member_{b}_tracking_offset") for b in range(self.n_members_)]
        residuals = [self._sw * (LF @ u) + ew for LF, ew in zip(self._LF, self._ew)]
        effort = cp.sum_squares(self._sw * (self._Ru @ u))
        if self.mode == "worst":
            # max_b ‖e_b‖² = (max_b ‖e_b‖)²: an epigraph on the norms (cones of the residuals' own scale) rather
            # than on the squares, which Clarabel called infeasible for targets far beyond reach
            t = cp.Variable(nonneg=True, name="worst_member_residual")
            objective, cons = cp.square(t) + effort, [cp.norm(e, 2) <= t for e in residuals]
        else:
            objective, cons = sum(cp.sum_squares(e) for e in residuals) / len(residuals) + effort, []
        # the rows that carry the soft output bounds: every member (worst case) or the mean prediction (average)
        self._bounded = self._F if self.mode == "worst" else [np.mean(self._F, axis=0)]
        n_hi, n_lo = self._idx_hi.size, self._idx_lo.size
        self._yhi = [cp.Parameter(n_hi, name=f"output_upper_offset_{j}") if n_hi else None
                     for j in range(len(self._bounded))]
        self._ylo = [cp.Parameter(n_lo, name=f"output_lower_offset_{j}") if n_lo else None
                     for j in range(len(self._bounded))]
        F0 = self._bounded[0]
        common, slack = self._common_constraints(u, lambda idx: F0[idx] @ u, self._yhi[0], self._ylo[0])
        cons += common
        for F, hi, lo in zip(self._bounded[1:], self._yhi[1:], self._ylo[1:]):
            if hi is not None:
                cons.append(F[self._idx_hi] @ u - self._S_hi @ slack <= hi)
            if lo is not None:
                cons.append(F[self._idx_lo] @ u + self._S_lo @ slack >= lo)
        if slack is not None:
            objective = objective + self._sw2 * (float(self.output_penalty) * cp.sum(slack))
        self.problem_ = cp.Problem(cp.Minimize(objective), cons)

    # ------------------------------------------------------------------------------------ per plan
    def _check_target(self, target):
        return _output_target(np.asarray(target, dtype=np.float64), self.horizon_steps_, self.n_outputs_)

    def _target_rows(self, target):
        return target

    def _free(self, u_past, y_past):
        """Each member's response to zero future inputs, stacked time-major, shape (n_members, N·p)."""
        past = past_vector(u_past, y_past)
        return np.stack([P @ past + c for P, c in zip(self._P, self._c)])

    def _offsets(self, u_past, y_past, target):
        free = self._free(u_past, y_past)
        ew = (free - target.reshape(-1)) @ self._Lz.T
        fy = free if self.mode == "worst" else free.mean(axis=0, keepdims=True)
        return ew, fy

    def _set_cost_scale(self, offsets):
        """σ from the steepest member cost over the input box (see :mod:`~stimsteer.control.mpc._core`, "Scaling")."""
        ew, _ = offsets
        slope = max(float(np.linalg.norm(LF.T @ e)) for LF, e in zip(self._LF, ew))
        sigma = max(1.0, 2.0 * self._scale * slope / _COST_SCALE_FREE)
        self._cost_sw = 1.0 / np.sqrt(sigma)
        self._sw.value, self._sw2.value = self._cost_sw, 1.0 / sigma

    def _assign(self, offsets):
        ew, fy = offsets
        for par, e in zip(self._ew, ew):
            par.value = self._cost_sw * e
        for hi, lo, f in zip(self._yhi, self._ylo, fy):
            if hi is not None:
                hi.value = self._ymax[self._idx_hi] - f[self._idx_hi]
            if lo is not None:
                lo.value = self._ymin[self._idx_lo] - f[self._idx_lo]

    def _aux_value(self):
        return None

    def _members(self, u, u_past, y_past):
        """Each member's predicted outputs for the inputs ``u``, shape (n_members, N, p)."""
        v = np.asarray(u, np.float64).reshape(-1)
        free = self._free(u_past, y_past)
        return np.stack([(f + F @ v).reshape(self.horizon_steps_, self.n_outputs_) for f, F in zip(free, self._F)])

    def _predict_outputs(self, u, aux, u_past, y_past):
        return self._members(u, u_past, y_past).mean(axis=0)

    def _cost_terms(self, u, aux, y, u_past, y_past, target):
        preds = self._members(u, u_past, y_past)
        r = target.reshape(-1)
        tracking = [float(np.sum((self._Lz @ (yb.reshape(-1) - r)) ** 2)) for yb in preds]
        return {"tracking": max(tracking) if self.mode == "worst" else float(np.mean(tracking)),
                "input_energy": float(np.sum((self._Ru @ u.reshape(-1)) ** 2))}

    def _package(self, u, aux, u_past, y_past, target, last, bounds, solver, status, reason, is_fallback,
                 elapsed):
        plan = super()._package(u, aux, u_past, y_past, target, last, bounds, solver, status, reason, is_fallback,
                                elapsed)
        preds = self._members(plan.inputs, u_past, y_past)
        r = plan.target.reshape(-1)
        tracking = [float(np.sum((self._Lz @ (yb.reshape(-1) - r)) ** 2)) for yb in preds]
        terms = dict(plan.cost_terms)
        slack, active = plan.output_slack, dict(plan.active_limits)
        if self.mode == "worst" and self._idx_b.size:  # the bounds hold for every member: the largest excess
            ymax, ymin = self._ymax.reshape(preds.shape[1:]), self._ymin.reshape(preds.shape[1:])
            slack = np.max(np.maximum(0.0, np.maximum(preds - ymax, ymin - preds)), axis=0)
            tol = 1e-6 * max(1.0, float(np.max(np.abs(preds), initial=0.0)))
            active["output_bounds"] = np.any((preds >= ymax - tol) | (preds <= ymin + tol), axis=0)
            terms["output_penalty"] = float(self.output_penalty) * float(np.sum(slack))
            terms["total"] = terms["tracking"] + terms["input_energy"] + terms["output_penalty"]
        terms.update(worst_member_tracking=max(tracking), mean_member_tracking=float(np.mean(tracking)),
                     member_spread_rms=float(np.sqrt(np.mean(preds.var(axis=0)))))
        message = f"robust over {self.n_members_} members ({self.mode})" + (f"; {plan.message}" if plan.message
                                                                             else "")
        return replace(plan, cost_terms=terms, output_slack=_ro(slack), active_limits=active, message=message)
