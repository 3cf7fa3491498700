"""Responses of a network to stimulation: impulse responses (Markov parameters) and driven responses.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import SessionError
from .systems import _as_model, _check_horizon, _frozen
from .._lazy import lazy_module

ssig = lazy_module("scipy.signal")  # imported at its first use (sysid/_lazy.py)

__all__ = ["impulse_responses", "controlled_response", "ControlledResponse", "mode_times", "ModeTimes",
           "SETTLE_FRACTION", "IMPULSE_CAP_STEPS", "SLOW_MODE_MAGNITUDE"]


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


# ---------------------------------------------------------------------------------------------------- time scales
#: An impulse response is shown until its slowest mode has decayed to this fraction (ln 100 = 4.6 time constants).
SETTLE_FRACTION = 0.01
#: Longest impulse response shown, in samples, whatever the slowest mode (the cap is stated where it applies).
IMPULSE_CAP_STEPS = 4000
#: A mode whose magnitude is at least this is flagged as slow (near-unstable) with its time constant.
SLOW_MODE_MAGNITUDE = 0.99


@dataclass(frozen=True)
class ModeTimes:
    """The modes of a model with their time scales, and how long an impulse response needs to settle.

    Attributes
    ----------
    magnitudes : ndarray
        ``|λ|`` of every eigenvalue of ``A``, largest first.
    time_constants_s : ndarray
        ``-1 / (rate · ln|λ|)`` in seconds (``inf`` for ``|λ| >= 1``).
    frequencies_hz : ndarray
        ``|arg λ| · rate / 2π``.
    settle_steps : int
        Samples until the slowest mode has decayed to :data:`SETTLE_FRACTION` (at least 20), capped; for an unstable
        model ``3 n_states`` (at least 20), which shows the growth.
    capped : bool
        The cap (:data:`IMPULSE_CAP_STEPS`) cut it short, or the model does not settle (``|λ| >= 1``).
    """

    magnitudes: np.ndarray
    time_constants_s: np.ndarray
    frequencies_hz: np.ndarray
    settle_steps: int
    capped: bool
    sample_rate_hz: float

    def slow_lines(self, limit: int = 5) -> list[str]:
        """One line per slow or unstable mode (``|λ| >=`` :data:`SLOW_MODE_MAGNITUDE`), at most ``limit``."""
        slow = np.flatnonzero(self.magnitudes >= SLOW_MODE_MAGNITUDE)
        lines = []
        for i in slow[:limit]:
            kind = "UNSTABLE" if self.magnitudes[i] >= 1.0 else "slow (near-unstable)"
            tau = "grows" if self.magnitudes[i] >= 1.0 else f"time constant {self.time_constants_s[i]:.4g} s"
            osc = f", oscillating at {self.frequencies_hz[i]:.4g} Hz" if self.frequencies_hz[i] > 0 else ""
            lines.append(f"warning: {kind} mode |λ| = {self.magnitudes[i]:.6f}: {tau}{osc}")
        if slow.size > limit:
            lines.append(f"warning: {slow.size - limit} more slow mode(s) not listed")
        return lines


def mode_times(system, *, cap_steps: int = IMPULSE_CAP_STEPS) -> ModeTimes:
    """Time constants of the modes of ``A`` and the impulse-response length that lets the slowest settle.

    Notes
    -----
    A mode ``λ`` decays as ``|λ|^k``; it falls to the fraction ``f`` after ``ln f / ln|λ|`` samples (common practice,
    no source). Give the minimal realisation (:func:`~stimsteer.sysid.network.systems.minimal_realisation`) so that
    the modes no input reaches or no channel sees are not counted.
    """
    model = _as_model(system)
    rate = float(model.sample_rate_hz)
    lam = model.poles  # computed once per model, sorted by decreasing modulus (ties in eigvals order)
    mag = np.abs(lam)
    with np.errstate(divide="ignore"):
        tau = np.where((mag < 1.0) & (mag > 0), -1.0 / (rate * np.log(np.where(mag > 0, mag, 1.0))), np.inf)
    tau = np.where(mag == 0, 0.0, tau)
    freq = np.abs(np.angle(lam)) * rate / (2 * np.pi)
    rho = float(mag[0]) if mag.size else 0.0
    if rho >= 1.0:  # it never settles: the growth over 3 n samples (at least 20) shows it without overflowing
        return ModeTimes(mag, tau, freq, min(max(20, 3 * model.n_states), int(cap_steps)), True, rate)
    need = 20 if rho == 0 else int(np.ceil(np.log(SETTLE_FRACTION) / np.log(rho))) + 1
    need = max(need, 20)
    return ModeTimes(mag, tau, freq, min(need, int(cap_steps)), need > cap_steps, rate)
