"""The written contracts that prediction, control, evaluation and storage rely on.

Everything downstream of a fitted route talks to it through these protocols, never through its concrete class or
its private attributes. One contract test (``tests/test_contract.py``) runs every registered implementation
through them.

Arrays are time-major float64: a past window is ``u_past`` (n_past, m) and ``y_past`` (n_past, p); future inputs
``u_future`` (n_future, m); predictions (n_future, p). Batches add a leading window axis.

Capabilities
------------
A predictor declares what it can do; a controller picks its formulation from the declaration
(:func:`stimsteer.control.mpc.controller_for`), in this order:

1. :class:`StateSpaceForm` — ``state_space_model()`` gives a state-space model with its Kalman predictor: the
   model predictive controller (state targets, terminal costs, the sparse formulation).
2. :class:`DataBlocksForm` — ``data_blocks()`` gives the Hankel blocks and the regulariser of a data predictor:
   the DeePC formulation, where the Hankel weights are decision variables.
3. :class:`LinearPredictor` with ``has_linear_maps`` True — ``prediction_maps()``: the condensed formulation
   ``y = P past + F u + c`` (subspace predictive control when the maps come from data).

A predictor whose prediction is not affine in its window (the ℓ1-regularised Hankel predictor) sets
``has_linear_maps = False``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np

__all__ = ["Predictor", "LinearPredictor", "PredictionMaps", "StateSpaceForm", "DataBlocks", "DataBlocksForm",
           "Plant", "past_vector", "InputAffineForm", "RecruitmentForm", "IntervalForm"]


def past_vector(u_past, y_past) -> np.ndarray:
    """The stacked past window ``[vec(u_past); vec(y_past)]`` (row-major, time-major) that ``P`` multiplies."""
    return np.concatenate([np.asarray(u_past, np.float64).reshape(-1), np.asarray(y_past, np.float64).reshape(-1)])


@dataclass(frozen=True)
class PredictionMaps:
    """The affine map of a linear predictor over a fixed past window and horizon.

    ``vec(y_future) = P @ past_vector(u_past, y_past) + F @ vec(u_future) + c`` with time-major stacking.

    Attributes
    ----------
    P : ndarray, shape (N·p, T·(m + p))
        Map of the past window (``T`` past samples, inputs first, then outputs).
    F : ndarray, shape (N·p, N·m)
        Map of the future inputs (``N`` horizon steps).
    c : ndarray, shape (N·p,)
        Constant term (the outputs' offset where the predictor carries one).
    past_steps, horizon_steps : int
    """

    P: np.ndarray
    F: np.ndarray
    c: np.ndarray
    past_steps: int
    horizon_steps: int

    def apply(self, u_past, y_past, u_future) -> np.ndarray:
        """The prediction of one window, shape (horizon_steps, p)."""
        T = self.past_steps
        past = past_vector(np.asarray(u_past)[-T:], np.asarray(y_past)[-T:])
        y = self.P @ past + self.F @ np.asarray(u_future, np.float64).reshape(-1) + self.c
        return y.reshape(self.horizon_steps, -1)


@runtime_checkable
class Predictor(Protocol):
    """Every route: predicts future outputs from a past window and future inputs.

    Fitted attributes: ``past_steps_`` (int, samples of past needed), ``max_horizon_steps_`` (int, or None for any
    horizon), ``n_inputs_``, ``n_outputs_``, ``input_names_``, ``output_names_``, ``input_units_``,
    ``output_units_`` (tuples of str), ``has_linear_maps`` (bool).
    """

    has_linear_maps: bool

    def predict(self, u_past, y_past, u_future) -> np.ndarray: ...

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray: ...

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]: ...


@runtime_checkable
class LinearPredictor(Predictor, Protocol):
    """A predictor that is affine in its past window and future inputs."""

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps: ...


@runtime_checkable
class StateSpaceForm(Protocol):
    """A predictor realised as a state-space model (with its Kalman predictor and output offset)."""

    def state_space_model(self): ...


@dataclass(frozen=True)
class DataBlocks:
    """The data of a Hankel predictor as DeePC uses them.

    Attributes
    ----------
    Up, Yp, Uf, Yf : ndarray
        Past-input, past-output, future-input and future-output rows of the (possibly compressed) Hankel matrix,
        each (rows, r).
    regularizer : {"l2", "l1", "projection"}
    lambda_g, lambda_y : float
        Regulariser strength and past-output slack weight.
    reg_matrix : ndarray (r, r) or None
        ``M`` of ``R(g) = ‖M g‖²`` (None: identity, or not quadratic).
    output_offset : ndarray, shape (p,)
        Offset removed from the outputs before the blocks were built (zeros when not centred).
    """

    Up: np.ndarray
    Yp: np.ndarray
    Uf: np.ndarray
    Yf: np.ndarray
    regularizer: str
    lambda_g: float
    lambda_y: float
    reg_matrix: np.ndarray | None
    output_offset: np.ndarray


@runtime_checkable
class DataBlocksForm(Protocol):
    """A data predictor whose Hankel blocks a DeePC controller can use directly."""

    def data_blocks(self) -> DataBlocks: ...


@runtime_checkable
class InputAffineForm(Protocol):
    """A predictor affine in its future inputs with a map that does not depend on the past (the lifted route).

    ``vec(y_future) = vec(predict(u_past, y_past, 0)) + input_map(N) @ vec(u_future)``: the condensed convex
    problem plans with the free response computed from the measured past (Korda & Mezić 2018).
    """

    def input_map(self, horizon_steps: int) -> np.ndarray: ...


@runtime_checkable
class RecruitmentForm(Protocol):
    """A static monotone input nonlinearity before linear dynamics (Hammerstein): ``y = L(f(u))``.

    ``recruitment()`` gives the per-site map with ``forward``/``inverse`` and whether it is monotone;
    ``linear_part()`` the fitted linear predictor in the transformed inputs ``v = f(u)``.
    """

    def recruitment(self): ...

    def linear_part(self): ...


@runtime_checkable
class IntervalForm(Protocol):
    """A predictor that gives prediction intervals: ``predict_interval(...) -> (mean, lower, upper)``."""

    def predict_interval(self, u_past, y_past, u_future, *, level=0.95): ...


@runtime_checkable
class Plant(Protocol):
    """A system a closed loop can run on: simulated plants, surrogates and the streaming bridge."""

    def reset(self, seed=None, x0=None) -> None: ...

    def step(self, u_k) -> np.ndarray: ...
