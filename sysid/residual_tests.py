"""Residual tests of a fitted model: whiteness (Ljung–Box) and input–residual cross-correlation.

Re-exported by :mod:`stimsteer.sysid.metrics`, where they were first published.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .exceptions import SessionError
from ._lazy import lazy_module

stats = lazy_module("scipy.stats")  # imported at its first use (sysid/_lazy.py)

__all__ = ["LjungBox", "ljung_box", "CrossCorrelation", "input_residual_xcorr"]


# ------------------------------------------------------------------------------------------------ residual tests
def _residuals(e, name="residuals"):
    e = np.asarray(e, dtype=np.float64)
    e = e[:, None] if e.ndim == 1 else e
    if e.ndim != 2 or not np.all(np.isfinite(e)):
        raise SessionError(f"{name} must be a finite 2-D time-major array (n_samples, n_channels); got {e.shape}.")
    return e


@dataclass(frozen=True)
class LjungBox:
    """Ljung–Box portmanteau test of residual whiteness, per channel.

    Attributes
    ----------
    statistic : ndarray, shape (n_channels,)
        ``Q = n (n + 2) Σ_{k=1..h} ρ_k² / (n − k)``.
    p_value : ndarray, shape (n_channels,)
        ``P(χ²_dof > Q)``.
    lags : int
        ``h``.
    dof : int
        ``h − fitted_params``.
    n_samples : int
    """

    statistic: np.ndarray
    p_value: np.ndarray
    lags: int
    dof: int
    n_samples: int

    def rejects(self, level: float = 0.05) -> np.ndarray:
        """True where whiteness is rejected at significance ``level``."""
        return self.p_value < level


def ljung_box(residuals, lags: int, *, fitted_params: int = 0) -> LjungBox:
    """Test whether residuals are white (uncorrelated in time), channel by channel.

    Parameters
    ----------
    residuals : ndarray, shape (n_samples, n_channels)
    lags : int
        Number of autocorrelation lags ``h`` pooled in the statistic, ``1 <= h < n_samples``.
    fitted_params : int, default 0
        Degrees of freedom removed from ``h`` (e.g. ARMA orders of a residual model).

    Returns
    -------
    LjungBox

    Raises
    ------
    SessionError
        Non-finite residuals, ``h`` out of range, or no degree of freedom left.

    Notes
    -----
    ``ρ_k = Σ_t ẽ_t ẽ_{t−k} / Σ_t ẽ_t²`` with ``ẽ = e − mean(e)``; under whiteness ``Q`` is approximately
    χ²-distributed with ``dof`` degrees of freedom.

    References
    ----------
    Ljung G.M., Box G.E.P. (1978), On a measure of lack of fit in time series models, Biometrika 65:297–303.
    """
    e = _residuals(residuals)
    n, h = e.shape[0], int(lags)
    if h != lags or not 1 <= h < n:
        raise SessionError(f"lags must be a whole number in [1, {n - 1}] for {n} residual samples; got {lags!r}.")
    dof = h - int(fitted_params)
    if dof < 1:
        raise SessionError(f"lags - fitted_params must be >= 1; got {h} - {fitted_params}. Use more lags.")
    ec = e - e.mean(axis=0)
    den = (ec ** 2).sum(axis=0)
    rho = np.stack([(ec[k:] * ec[:-k]).sum(axis=0) for k in range(1, h + 1)]) / np.where(den > 0, den, 1.0)
    q = n * (n + 2) * ((rho ** 2) / (n - np.arange(1, h + 1))[:, None]).sum(axis=0)
    return LjungBox(statistic=q, p_value=stats.chi2.sf(q, dof), lags=h, dof=dof, n_samples=n)


@dataclass(frozen=True)
class CrossCorrelation:
    """Sample cross-correlation of inputs with residuals and its 95% band under independence.

    Attributes
    ----------
    lags : ndarray of int, shape (2 max_lag + 1,)
        ``τ = −max_lag … max_lag``.
    values : ndarray, shape (2 max_lag + 1, n_inputs, n_outputs)
        ``values[l, i, j]`` correlates ``u_i[k]`` with ``e_j[k + τ_l]``; a significant value at ``τ > 0`` means
        an input effect the model missed.
    band : float
        ``1.96 / sqrt(n_samples)``.
    n_samples : int
    """

    lags: np.ndarray
    values: np.ndarray
    band: float
    n_samples: int

    @property
    def outside(self) -> np.ndarray:
        """True where ``|values| > band``."""
        return np.abs(self.values) > self.band


def input_residual_xcorr(u, e, max_lag: int) -> CrossCorrelation:
    """Normalised cross-correlation between inputs and residuals for lags ``−max_lag … max_lag``.

    Parameters
    ----------
    u : ndarray, shape (n_samples, n_inputs)
    e : ndarray, shape (n_samples, n_outputs)
        Residuals on the same samples.
    max_lag : int
        ``0 <= max_lag < n_samples``.

    Returns
    -------
    CrossCorrelation

    Notes
    -----
    ``r_ij(τ) = (1/N) Σ_k ũ_i[k] ẽ_j[k + τ] / (σ_ui σ_ej)`` over the overlapping samples, means removed. If
    inputs and residuals are independent and one of them is white, ``r(τ)`` is approximately normal with standard
    deviation ``1/√N``, hence the band ``±1.96/√N``.

    References
    ----------
    Ljung L. (1999), System Identification: Theory for the User, 2nd ed., section 16.6 (residual analysis).
    """
    uu, ee = _residuals(u, "u"), _residuals(e, "e")
    if uu.shape[0] != ee.shape[0]:
        raise SessionError(f"u and e must have the same number of samples; got {uu.shape[0]} and {ee.shape[0]}.")
    n, K = uu.shape[0], int(max_lag)
    if K != max_lag or not 0 <= K < n:
        raise SessionError(f"max_lag must be a whole number in [0, {n - 1}]; got {max_lag!r}.")
    uc, ec = uu - uu.mean(axis=0), ee - ee.mean(axis=0)
    su, se = uc.std(axis=0), ec.std(axis=0)
    norm = n * np.outer(np.where(su > 0, su, np.nan), np.where(se > 0, se, np.nan))
    vals = []
    for tau in range(-K, K + 1):
        prod = uc[: n - tau].T @ ec[tau:] if tau >= 0 else uc[-tau:].T @ ec[: n + tau]
        vals.append(prod / norm)
    return CrossCorrelation(np.arange(-K, K + 1), np.stack(vals), 1.96 / math.sqrt(n), n)
