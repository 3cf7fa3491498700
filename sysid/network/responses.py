"""Responses of a network to stimulation: impulse responses (Markov parameters) and driven responses.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.signal as ssig

from ..exceptions import SessionError
from .systems import _as_model, _check_horizon, _frozen

__all__ = ["impulse_responses", "controlled_response", "ControlledResponse"]


# ---------------------------------------------------------------------------------------------------- responses
@dataclass(frozen=True)
class ControlledResponse:
    """The response of a linear model to an input pattern, split into its free and driven parts.

    Attributes
    ----------
    y : ndarray, shape (n_samples, n_outputs)
        Total response ``free + forced``.
    free : ndarray, shape (n_samples, n_outputs)
        Response to the initial state alone, ``C A^k x0``.
    forced : ndarray, shape (n_samples, n_outputs)
        Convolution of the impulse responses with the input, ``sum_j h[j] u[k - j]``.
    x0 : ndarray, shape (n_states,)
    """

    y: np.ndarray
    free: np.ndarray
    forced: np.ndarray
    x0: np.ndarray


def impulse_responses(system, n_steps: int) -> np.ndarray:
    """Impulse responses from every stimulation site to every recorded channel.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    n_steps : int
        Number of samples, at least 1.

    Returns
    -------
    h : ndarray, shape (n_steps, n_outputs, n_inputs)
        ``h[k, i, j]`` is the output on channel ``i``, ``k`` samples after a unit impulse at site ``j``:
        ``h[0] = D``, ``h[k] = C A^(k-1) B`` (the Markov parameters).
    """
    return _as_model(system).impulse_response(_check_horizon(n_steps, allow_none=False))


def controlled_response(system, u, x0=None) -> ControlledResponse:
    """Response to an input pattern as the free part plus the convolution of impulse responses with the input.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    u : array_like, shape (n_samples, n_inputs)
        Input pattern (units of the model's inputs).
    x0 : array_like, shape (n_states,), optional
        Initial state; default rest (zero).

    Returns
    -------
    ControlledResponse

    Notes
    -----
    ``y[k] = C A^k x0 + sum_{j=0}^{k} h[j] u[k-j]``; the convolution is done by :func:`scipy.signal.fftconvolve`
    along time. It equals :meth:`StateSpaceModel.simulate` up to rounding (tested).
    """
    model = _as_model(system)
    u = model._check_u(u)
    n, T = model.n_states, u.shape[0]
    x0 = np.zeros(n) if x0 is None else np.asarray(x0, dtype=np.float64).reshape(-1)
    if x0.shape != (n,) or not np.all(np.isfinite(x0)):
        raise SessionError(f"x0 must be a finite vector of {n} states; got shape {x0.shape}.")
    free = np.empty((T, model.n_outputs))
    x = x0.copy()
    for k in range(T):
        free[k] = model.C @ x
        x = model.A @ x
    if T == 0:
        forced = np.zeros((0, model.n_outputs))
    else:
        h = model.impulse_response(T)
        forced = ssig.fftconvolve(h, u[:, None, :], axes=0)[:T].sum(axis=2)
    return ControlledResponse(y=_frozen(free + forced), free=_frozen(free), forced=_frozen(forced), x0=_frozen(x0))
