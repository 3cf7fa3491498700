"""Predictive control through a monotone input recruitment (Hammerstein): plan in ``v = f(u)``, decode to ``u``.

For a :class:`~stimsteer.sysid.protocols.RecruitmentForm` predictor ``y = L(f(u))`` with ``f`` monotone per site,
the amplitude window ``lo <= u <= hi`` is exactly ``f(lo) <= v <= f(hi)``, so planning over ``v`` with the linear
part ``L`` is the usual convex problem (:func:`~stimsteer.control.mpc.controller_for` on ``L``) and
``u = f⁻¹(v)`` meets the declared window. Limits that speak of ``u`` in other ways (slew, energy over windows)
are not preserved by a nonlinear map, so they are refused rather than planned approximately. A map that is not
monotone is refused (the fit reports it). The decoded plan is checked against the declared limits once more;
a plan that would break them is replaced by the safe fallback of :meth:`StimLimits.safe_inputs`.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ...sysid import InvalidParameterError
from ..limits import StimLimits
from .plan import _ro

__all__ = ["RecruitmentController", "recruited_limits"]


def recruited_limits(predictor, limits) -> StimLimits:
    """The limits of the recruited inputs ``v = f(u)``: the amplitude window mapped through the monotone ``f``.

    Raises
    ------
    InvalidParameterError
        For a non-monotone recruitment, or limits with a slew limit or an energy budget.
    """
    rec = predictor.recruitment()
    bad = [n for n, ok in zip(rec.input_names, rec.monotone) if not ok]
    if bad:
        raise InvalidParameterError(
            f"the recruitment of site(s) {bad} is not monotone, so no plan is made through it (an amplitude "
            "window has no convex image). Refit with more data or fewer knots, or use a linear route.")
    if not isinstance(limits, StimLimits):
        raise InvalidParameterError(f"limits must be a StimLimits; got {type(limits).__name__}.")
    lim = limits.aligned(tuple(predictor.input_names_), tuple(predictor.output_names_))
    if lim.energy_budget_ua2 is not None or lim.has_sequence_limits or (lim.slew_max_ua is not None and np.any(np.isfinite(lim.slew_max_ua))):
        raise InvalidParameterError(
            "a recruitment (Hammerstein) plan keeps amplitude and charge-density bounds exactly, but not a slew "
            "limit or an energy budget (they do not map through a nonlinear recruitment); remove them from the "
            "limits file or plan with a linear route.")
    lo, hi = lim.input_bounds()
    vlo, vhi = rec.forward(lo[None])[0], rec.forward(hi[None])[0]
    return StimLimits(amplitude_min_ua=np.minimum(vlo, 0.0), amplitude_max_ua=np.maximum(vhi, 0.0),
                      output_min=lim.output_min, output_max=lim.output_max, input_names=lim.input_names,
                      output_names=lim.output_names)


class RecruitmentController:
    """Plans for a Hammerstein predictor: the linear part's controller over the recruited inputs, decoded.

    Parameters
    ----------
    predictor : RecruitmentForm
        Fitted, with a monotone recruitment.
    limits : StimLimits
        The declared limits: amplitude (and charge-density) bounds and output bounds; no slew limit or energy
        budget.
    inner : fitted controller
        The linear part's controller, built on :func:`recruited_limits` (what
        :func:`~stimsteer.control.mpc.controller_for` does).

    Attributes
    ----------
    limits_ : StimLimits
        The declared limits.
    method_ : str
        ``"recruitment"``.
    past_steps_, horizon_steps_, n_inputs_, n_outputs_, input_names_, output_names_, energy_window_steps_
    """

    def __init__(self, *, predictor, limits, inner):
        self.predictor = predictor
        self.limits = limits
        self.inner = inner

    def fit(self):
        """Check the map and the limits again and take the inner controller's shape."""
        recruited_limits(self.predictor, self.limits)
        self.limits_ = self.limits.aligned(tuple(self.predictor.input_names_), tuple(self.predictor.output_names_))
        self._rec, self.method_ = self.predictor.recruitment(), "recruitment"
        for name in ("horizon_steps_", "n_inputs_", "n_outputs_", "input_names_", "output_names_",
                     "energy_window_steps_", "target_kind_"):
            setattr(self, name, getattr(self.inner, name, None))
        self.past_steps_ = int(self.predictor.past_steps_)
        return self

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None):
        """A plan of amplitudes: planned over the recruited inputs, decoded by ``f⁻¹``, checked against the limits.

        Parameters and result as :meth:`ModelPredictiveController.plan`; inputs in amplitudes (µA), predicted
        outputs from the Hammerstein predictor itself.
        """
        rec = self._rec
        v_past = rec.forward(np.asarray(u_past, np.float64))
        v_last = None if last_input is None else rec.forward(np.asarray(last_input, np.float64)[None])[0]
        plan = self.inner.plan(v_past, y_past, target=target, last_input=v_last, use_fast_path=use_fast_path)
        N = plan.inputs.shape[0]
        lo, hi = self.limits_.input_bounds()
        u = np.clip(rec.inverse(plan.inputs), lo, hi)  # decoding round-off only: f maps the window onto itself
        fallback = bool(plan.fallback)
        if any(self.limits_.violations(u, last_input).values()):
            u, fallback = self.limits_.safe_inputs(N, last_input), True
        y = self.predictor.predict(u_past, y_past, u)
        last = np.zeros(self.n_inputs_) if last_input is None else np.asarray(last_input, np.float64)
        return replace(plan, inputs=_ro(u), predicted_outputs=_ro(y), fallback=fallback, last_input=_ro(last),
                       step_bounds=(_ro(np.tile(lo, (N, 1))), _ro(np.tile(hi, (N, 1)))),
                       message=(plan.message + " " if plan.message else "") + "planned over the recruited inputs "
                       "f(u) and decoded to amplitudes by the inverse recruitment.")
