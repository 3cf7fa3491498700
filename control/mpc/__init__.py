"""Finite-horizon predictive control of stimulation under declared limits, for both routes.

Each controller builds its cvxpy problem **once** (in ``fit``) with Parameters for everything that changes from one
plan to the next (the measured past through the predicted free response, the target, the step bounds), so the
problem is DPP and a plan only assigns ``.value`` and re-solves. A second, faster path for closed loops sets up one
OSQP problem from the same matrices and only updates its vectors (:mod:`~stimsteer.control.mpc.fastqp`); both paths
give the same plan (tested). The fast path exists for quadratic programs (no L1 regulariser); otherwise plans use
the cvxpy problem, and so does a plan whose OSQP solve fails. With an energy budget the fast QP leaves the budget out
and its answer is kept only when every budget window holds with room to spare (then it is the optimum of the
budgeted convex problem as well); when a window binds, the plan solves the cvxpy cone program. For DeePC without
output bounds the fast path minimises the Hankel weights out in closed form once, so its QP is in the inputs alone.

Problem solved over the horizon ``k = 0 … N−1`` (inputs ``u_k``, predicted outputs ``ŷ_k``)::

    minimise    Σ_k ‖ŷ_k − r_k‖²_Q  +  Σ_k ‖u_k‖²_R  [+ ‖x_N − x_T‖²_P]  [+ route terms]  +  ρ Σ s
    subject to  lo_i <= u_ik <= hi_i                     (amplitude ∩ charge-density bound, hard)
                |u_ik − u_i,k−1| <= slew_i, u_−1 = last applied input                     (hard)
                Σ_{k=j−W+1..j} ‖u_k‖² <= E  for every window ending at a plan step j, the inputs
                applied before the plan counted, and (with a slew limit) the windows ending during
                the ramp to zero after it        (energy budget over rolling windows, hard; _budget)
                y_min − s <= ŷ <= y_max + s,  s >= 0      (output bounds, soft; exact L1 penalty ρ)

The modules, one job each:

* :mod:`~stimsteer.control.mpc.plan` — :class:`Plan`, the frozen result of one plan;
* :mod:`~stimsteer.control.mpc.condensed` — stacked prediction matrices and the condensed problem built from
  prediction maps; :mod:`~stimsteer.control.mpc.fastqp` — the reusable OSQP problem;
* :mod:`~stimsteer.control.mpc.model` — :class:`ModelPredictiveController` on a state-space form (``ŷ = G u + Φ x̂``,
  ``x̂`` from the model's Kalman predictor; condensed or sparse; output or state targets);
* :mod:`~stimsteer.control.mpc.data` — :class:`DataPredictiveController`: DeePC on a predictor's data blocks, or
  the condensed problem on a linear predictor's maps (SPC for the least-squares predictor);
* :mod:`~stimsteer.control.mpc.dispatch` — :func:`controller_for`, which picks from the predictor's declared
  capabilities (:mod:`stimsteer.sysid.protocols`), never from its class;
* :mod:`~stimsteer.control.mpc.target` — :func:`parse_target`, targets from text or tables.

Safety. Every returned input sequence respects the hard limits. Before a solve the step bounds are checked
(the slew window of the first step against the amplitude window, and the energy of the safe sequence); after a
solve the answer is verified, clipped onto the exact bounds when it exceeds them by solver tolerance only, and
re-checked. A plan that cannot be solved (limits conflict, solver failure, infeasible data constraints) carries
the safe fallback of :meth:`StimLimits.safe_inputs`: towards zero stimulation as fast as the slew limit allows,
inside the amplitude window. The only case where that fallback itself breaks a limit is when no input sequence
can meet the limits at all (the last applied input lies outside the amplitude window, or even the fallback's
least-energy sequence breaks an energy window, counting the inputs applied before the plan); the plan then says so
(status ``"infeasible"``, ``Plan.broken_limits``). The energy windows reach back into ``u_past`` (pass the applied
inputs as far back as ``energy_window_steps_ − 1`` samples; earlier ones count as rest), so that in a closed loop
the budget holds over every window of *applied* stimulation; this is recursively feasible
(:mod:`~stimsteer.control.mpc._budget`). The cvxpy costs are divided by a per-plan scale (a Parameter) so that far
targets do not make the cone solver call a feasible problem infeasible.

The file workflow of ``stimsteer plan`` (:func:`plan_to_folder`, :func:`write_plan`, :class:`PlanRun`) lives in
:mod:`stimsteer.control.commands.plan`; those names are still importable from here, loaded on first use.

References
----------
Rawlings J.B., Mayne D.Q., Diehl M.M. (2017), Model Predictive Control: Theory, Computation, and Design, 2nd ed.
Coulson J., Lygeros J., Dörfler F. (2019), Data-Enabled Predictive Control: In the Shallows of the DeePC, ECC.
Favoreel W., De Moor B., Van Overschee P. (1999), SPC: Subspace Predictive Control, IFAC World Congress.
Stellato B. et al. (2020), OSQP: an operator splitting solver for quadratic programs, Math. Prog. Comp.
"""

from .plan import Plan
from .condensed import condensed_prediction
from .model import ModelPredictiveController
from .data import DataPredictiveController
from .dispatch import controller_for
from .target import parse_target

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

_MOVED_TO_COMMANDS = ("write_plan", "PlanRun", "plan_to_folder")


def __getattr__(name):
    # The plan-folder workflow moved to the command layer; the numerics do not import it, but the old import
    # path keeps working (PEP 562: looked up only when the name is asked for).
    if name in _MOVED_TO_COMMANDS:
        from ..commands import plan as _command

        return getattr(_command, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
