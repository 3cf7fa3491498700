"""A model sequence over the horizon: a predictor that switches between fitted models at given steps.

``ModelSequence(models, switch_steps)`` predicts with ``models[0]`` for steps ``[0, s_1)``, ``models[1]`` for
``[s_1, s_2)``, ..., each segment continuing from the measured past and the predictions before it (its own past
window cut from them). With linear members it is affine in its window and future inputs, with time-varying maps
(the blocks of each segment come from its model), so :func:`~stimsteer.control.mpc.controller_for` plans through a
planned change of condition (a drug wash-in, a state change at a known time) by the same convex problem.
"""

from __future__ import annotations

import numpy as np

from ._base import BasePredictor, check_fitted
from .exceptions import InvalidParameterError
from .protocols import LinearPredictor, PredictionMaps
from .recursive import maps_by_probing

__all__ = ["ModelSequence"]


class ModelSequence(BasePredictor):
    """Fitted models used one after the other over the horizon (time-varying prediction).

    Parameters
    ----------
    models : sequence of fitted predictors
        Same inputs and outputs (names and units).
    switch_steps : sequence of int
        ``len(models) − 1`` increasing horizon steps (>= 1) where the next model takes over.

    Attributes
    ----------
    past_steps_ : int
        The longest past window of the models.
    max_horizon_steps_ (None), n_inputs_, n_outputs_, input_names_, output_names_, input_units_, output_units_

    Raises
    ------
    InvalidParameterError
        Models with different channels, or switch steps that are not increasing whole numbers >= 1.
    """

    def __init__(self, *, models, switch_steps):
        self.models = models
        self.switch_steps = switch_steps

    @property
    def has_linear_maps(self) -> bool:
        return all(isinstance(m, LinearPredictor) and m.has_linear_maps for m in self.models)

    def fit(self, session=None):
        """Check the sequence (the models are fitted already; ``session`` is not used)."""
        models, steps = list(self.models), [int(s) for s in self.switch_steps]
        if not models or len(steps) != len(models) - 1 or any(s < 1 for s in steps) or steps != sorted(set(steps)):
            raise InvalidParameterError(f"switch_steps must hold len(models) - 1 = {len(models) - 1} increasing "
                                        f"horizon steps >= 1; got {list(self.switch_steps)!r}.")
        first = models[0]
        for m in models:
            check_fitted(m, "past_steps_")
            if (m.input_names_, m.output_names_, m.input_units_, m.output_units_) != (
                    first.input_names_, first.output_names_, first.input_units_, first.output_units_):
                raise InvalidParameterError("the models of a sequence must share input and output names and units.")
        self.steps_ = steps
        self.past_steps_ = max(int(m.past_steps_) for m in models)
        self.max_horizon_steps_ = None
        for name in ("n_inputs_", "n_outputs_", "input_names_", "output_names_", "input_units_", "output_units_"):
            setattr(self, name, getattr(first, name))
        return self

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Predictions of a batch of windows, each segment by its model from the window before it."""
        check_fitted(self, "steps_")
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        U, Y = up, yp
        H, out = uf.shape[1], []
        bounds = [0] + [s for s in self.steps_ if s < H] + [H]
        for k, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
            if b <= a:
                continue
            model = self.models[min(k, len(self.models) - 1)]
            y = model.predict_many(U, Y, uf[:, a:b])
            out.append(y)
            U, Y = np.concatenate([U, uf[:, a:b]], axis=1), np.concatenate([Y, y], axis=1)
        return np.concatenate(out, axis=1)

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The time-varying affine maps of :meth:`predict` (every model must have linear maps)."""
        check_fitted(self, "steps_")
        if not self.has_linear_maps:
            raise InvalidParameterError("a model sequence has linear maps only when every model has them.")
        return maps_by_probing(lambda up, yp, uf: self.predict_many(up, yp, uf), self.n_inputs_, self.n_outputs_,
                               self.past_steps_, int(past_steps), int(horizon_steps))

    def rest_window(self):
        """The first model's rest window, over the sequence's past window."""
        check_fitted(self, "steps_")
        u, y = self.models[0].rest_window()
        P = self.past_steps_
        return np.zeros((P, self.n_inputs_)), np.tile(y[-1], (P, 1))
