"""Plans robust over an ensemble of predictors: the worst member's tracking cost, or the members' average.

For an ensemble whose members have linear prediction maps (``member_maps`` of
:class:`~stimsteer.sysid.ensemble.BootstrapEnsemble`), member ``b`` predicts ``ŷ_b = F_b u + f_b(past)`` and::

    worst case:  minimise  max_b ‖Lz(F_b u + f_b − r)‖² + ‖Ru u‖²     (epigraph: t >= each member's cost)
    average:     minimise  (1/B) Σ_b ‖Lz(F_b u + f_b − r)‖² + ‖Ru u‖²
    subject to   lo <= u_k <= hi (amplitude ∩ charge-density bound), |u_k − u_{k−1}| <= slew (u_{−1} the last input)

Both are convex (a second-order cone program and a QP), built once with Parameters (DPP). The average is the
expected cost under the ensemble (it penalises the members' spread as well as the mean error); the worst case
is the minimax plan (Bemporad & Morari 1999). The answer is checked against the declared limits after the solve;
a failed solve or a broken limit gives the safe fallback of :meth:`StimLimits.safe_inputs`. Energy budgets over
rolling windows and output bounds are not part of this problem, so limits that declare them are refused (use the
nominal plan of :func:`~stimsteer.control.mpc.controller_for` for them).

References
----------
Bemporad A., Morari M. (1999), Robust model predictive control: a survey, in Robustness in Identification and
Control, LNCIS 245, Springer.
"""

from __future__ import annotations

import time

import cvxpy as cp
import numpy as np
import scipy.linalg as sla

from ...sysid import InvalidParameterError
from ...sysid.protocols import past_vector
from ..limits import StimLimits
from ._core import _output_target, _sqrt_weight
from .plan import Plan, _ro

__all__ = ["RobustPlanner"]

MODES = ("worst", "average")


class RobustPlanner:
    """Plans of stimulation robust over the members of an ensemble, under the declared hard limits.

    Parameters
    ----------
    ensemble : object with ``member_maps(past_steps, horizon_steps)`` and the predictor attributes
        E.g. a fitted :class:`~stimsteer.sysid.ensemble.BootstrapEnsemble` of a linear method.
    limits : StimLimits
        Amplitude, charge-density and slew limits (no energy budget, no output bounds).
    horizon_steps : int
    mode : {"worst", "average"}, default "worst"
    output_weight, input_weight : float or ndarray
        As in :class:`ModelPredictiveController`.
    solver : str, default "CLARABEL"

    Attributes
    ----------
    problem_ : cvxpy.Problem
    limits_, past_steps_, horizon_steps_, n_inputs_, n_outputs_, input_names_, output_names_, n_members_, method_
    """

    def __init__(self, *, ensemble, limits, horizon_steps, mode="worst", output_weight=1.0, input_weight=1e-3,
                 solver="CLARABEL"):
        self.ensemble = ensemble
        self.limits = limits
        self.horizon_steps = horizon_steps
        self.mode = mode
        self.output_weight = output_weight
        self.input_weight = input_weight
        self.solver = solver

    def _check(self):
        if self.mode not in MODES:
            raise InvalidParameterError(f"mode must be one of {MODES} (worst case or average over the members); got "
                                        f"{self.mode!r}.")
        if not isinstance(self.limits, StimLimits):
            raise InvalidParameterError(f"limits must be a StimLimits; got {type(self.limits).__name__}.")
        ens = self.ensemble
        lim = self.limits.aligned(tuple(ens.input_names_), tuple(ens.output_names_))
        if lim.energy_budget_ua2 is not None or lim.has_output_bounds or lim.has_sequence_limits:
            raise InvalidParameterError("a plan robust over the ensemble keeps amplitude, charge-density and slew "
                                        "limits; these limits also declare an energy budget or output bounds. Plan "
                                        "with the ensemble's mean (controller_for) for them, or remove them.")
        N = int(self.horizon_steps)
        if N < 1:
            raise InvalidParameterError(f"horizon_steps must be >= 1; got {self.horizon_steps!r}.")
        return lim, N

    def fit(self):
        """Build the convex problem once from the members' maps (Parameters: free responses, target, last input)."""
        lim, N = self._check()
        ens = self.ensemble
        T, m, p = int(ens.past_steps_), int(ens.n_inputs_), int(ens.n_outputs_)
        maps = ens.member_maps(T, N)
        Lz = sla.block_diag(*[_sqrt_weight("output_weight", self.output_weight, p)] * N)
        Ru = sla.block_diag(*[_sqrt_weight("input_weight", self.input_weight, m)] * N)
        u = cp.Variable(N * m, name="inputs_ua")
        self._free = [cp.Parameter(N * p, name=f"member_{b}_free_minus_target") for b in range(len(maps))]
        costs = [cp.sum_squares((Lz @ mp.F) @ u + Lz @ f) for mp, f in zip(maps, self._free)]
        effort = cp.sum_squares(Ru @ u)
        if self.mode == "worst":
            t = cp.Variable(name="worst_member_cost")
            objective, cons = t + effort, [c <= t for c in costs]
        else:
            objective, cons = sum(costs) / len(costs) + effort, []
        lo, hi = lim.input_bounds()
        cons += [u >= np.tile(lo, N), u <= np.tile(hi, N)]
        self._last = cp.Parameter(m, name="last_input")
        if lim.slew_max_ua is not None and np.any(np.isfinite(lim.slew_max_ua)):
            U = cp.reshape(u, (N, m), order="C")
            prev = cp.vstack([cp.reshape(self._last, (1, m), order="C"), U[:-1]])
            s = np.where(np.isfinite(lim.slew_max_ua), lim.slew_max_ua, 1e12)
            cons += [cp.abs(U - prev) <= np.tile(s, (N, 1))]
        self.problem_ = cp.Problem(cp.Minimize(objective), cons)
        self._u, self._maps, self._Lz, self._costs = u, maps, Lz, costs
        self.limits_, self.past_steps_, self.horizon_steps_ = lim, T, N
        self.n_inputs_, self.n_outputs_, self.n_members_ = m, p, len(maps)
        self.input_names_, self.output_names_ = tuple(ens.input_names_), tuple(ens.output_names_)
        self.method_, self.energy_window_steps_, self.target_kind_ = f"robust-{self.mode}", None, "output"
        return self

    def plan(self, u_past, y_past, *, target, last_input=None) -> Plan:
        """A plan robust over the members from the measured past; inputs inside the declared limits.

        Parameters
        ----------
        u_past, y_past : ndarray
            At least ``past_steps_`` samples, (n_past, m) and (n_past, p).
        target : ndarray, shape (horizon_steps, p) or (p,)
        last_input : ndarray, shape (n_inputs,), optional
            The input applied before the plan (default zero), for the slew limit.
        """
        N, m, p, T = self.horizon_steps_, self.n_inputs_, self.n_outputs_, self.past_steps_
        r = _output_target(np.asarray(target, np.float64), N, p)
        past = past_vector(np.asarray(u_past, np.float64)[-T:], np.asarray(y_past, np.float64)[-T:])
        last = np.zeros(m) if last_input is None else np.asarray(last_input, np.float64).reshape(m)
        free = [mp.P @ past + mp.c for mp in self._maps]
        for par, f in zip(self._free, free):
            par.value = f - r.reshape(-1)
        self._last.value = last
        start = time.perf_counter()
        try:
            self.problem_.solve(solver=self.solver)
            status = str(self.problem_.status)
        except cp.error.SolverError as exc:
            status = f"solver_error: {exc}"
        elapsed = time.perf_counter() - start
        u = None if self._u.value is None else np.asarray(self._u.value).reshape(N, m)
        return self._package(u, status, free, r, last, elapsed)

    def _package(self, u, status, free, r, last, elapsed) -> Plan:
        lim, N, m, p = self.limits_, self.horizon_steps_, self.n_inputs_, self.n_outputs_
        lo, hi = lim.input_bounds()
        fallback = u is None or status not in ("optimal", "optimal_inaccurate")
        if not fallback:
            u = np.clip(u, lo, hi)  # solver tolerance only: the bounds are constraints of the problem
            fallback = any(lim.violations(u, last).values())
        message = f"robust over {self.n_members_} members ({self.mode})"
        if fallback:
            u = lim.safe_inputs(N, last)
            message += f"; no robust plan ({status}): the safe fallback towards zero stimulation"
        v = u.reshape(-1)
        preds = np.stack([(mp.F @ v + f).reshape(N, p) for mp, f in zip(self._maps, free)])
        tracking = [float(np.sum((self._Lz @ (y.reshape(-1) - r.reshape(-1))) ** 2)) for y in preds]
        tol = 1e-7 * np.maximum(1.0, np.abs(np.stack([lo, hi])))
        active = {"amplitude_min": u <= lo + tol[0], "amplitude_max": u >= hi - tol[1],
                  "charge_density": np.zeros((N, m), bool), "slew": np.zeros((N, m), bool),
                  "energy_budget": False, "output_bounds": np.zeros((N, p), bool)}
        return Plan(inputs=_ro(u), predicted_outputs=_ro(preds.mean(axis=0)), target=_ro(r), target_kind="output",
                    cost_terms={"worst_member_tracking": max(tracking), "mean_member_tracking": float(np.mean(tracking)),
                                "member_spread_rms": float(np.sqrt(np.mean(preds.var(axis=0))))},
                    active_limits=active, output_slack=_ro(np.zeros((N, p))),
                    step_bounds=(_ro(np.tile(lo, (N, 1))), _ro(np.tile(hi, (N, 1)))), last_input=_ro(last),
                    solver=str(self.solver), status=status, message=message, fallback=bool(fallback),
                    solve_time_s=float(elapsed), input_names=self.input_names_, output_names=self.output_names_)
