"""Predictive control with a predictor that is affine in its future inputs (the lifted route).

For a :class:`~stimsteer.sysid.protocols.InputAffineForm` predictor the prediction is
``vec(ŷ) = f(past) + F vec(u)`` with ``F = input_map(N)`` fixed and the free response ``f(past)`` computed by the
predictor from the measured past (for the lifted predictor: the lifted state run forward without input). The
problem is the condensed convex one of the linear predictors (:mod:`~stimsteer.control.mpc.condensed`), built once
with ``F``; each plan only recomputes ``f(past)``. The limits, their checks and the fallback are those of every
controller (:mod:`~stimsteer.control.mpc._core`).

References
----------
Korda M., Mezić I. (2018), Linear predictors for nonlinear dynamical systems: Koopman operator meets model
predictive control, Automatica 93:149–160, section 4 (the lifted MPC is a convex QP in the inputs).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from ...sysid import InvalidParameterError
from ...sysid.protocols import InputAffineForm
from ._core import _horizon, _sqrt_weight
from .data import DataPredictiveController

__all__ = ["InputAffinePredictiveController"]


class InputAffinePredictiveController(DataPredictiveController):
    """The condensed problem on ``ŷ = f(past) + F u`` for a predictor declaring ``input_map`` (lifted route).

    Parameters are those of :class:`DataPredictiveController` (``horizon_steps`` is required when the predictor
    predicts over any horizon). ``method_`` is ``"spc"`` (the condensed formulation on prediction maps).
    """

    def fit(self, session=None):
        """Fit the predictor when needed (on a copy) and build the control problem once with ``F``.

        Raises
        ------
        InvalidParameterError
            If the predictor does not declare ``input_map`` or no horizon is given.
        """
        if not isinstance(self.predictor, InputAffineForm):
            raise InvalidParameterError(
                f"InputAffinePredictiveController needs a predictor with input_map(horizon_steps) (the "
                f"InputAffineForm of stimsteer.sysid.protocols); got a {type(self.predictor).__name__}.")
        pred = self._fitted_predictor(session)
        self.problem_ = None
        self.predictor_, self.method_, self.target_kind_ = pred, "spc", "output"
        max_h = pred.max_horizon_steps_
        if self.horizon_steps is None and max_h is None:
            raise InvalidParameterError(f"the {type(pred).__name__} predicts over any horizon, so it gives the "
                                        "controller none; give horizon_steps.")
        N = _horizon(max_h if self.horizon_steps is None else self.horizon_steps, max_h)
        p = int(pred.n_outputs_)
        self._setup_common(tuple(pred.input_names_), tuple(pred.output_names_), N)
        self.past_steps_ = int(pred.past_steps_)
        self._Lz = sla.block_diag(*[_sqrt_weight("output_weight", self.output_weight, p)] * N)
        self._y_off = None
        F = np.asarray(pred.input_map(N), np.float64)
        self._build_condensed(F, F, self._Lz)
        return self

    def _free(self, u_past, y_past):
        """The predictor's response to zero future inputs from the measured past, stacked time-major."""
        N, m = self.horizon_steps_, self.n_inputs_
        return np.asarray(self.predictor_.predict(u_past, y_past, np.zeros((N, m))), np.float64).reshape(-1)
