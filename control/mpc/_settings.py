"""Checks of a predictive controller's settings and targets, shared by every formulation: weights as square-root
factors, the horizon, an output target as rows over the horizon."""

from __future__ import annotations

import numpy as np

from ...sysid import InvalidParameterError, SessionError

__all__: list = []


def _sqrt_weight(name, w, dim):
    """A factor ``L`` with ``LᵀL = W`` for a scalar, per-channel vector or PSD matrix weight."""
    W = np.asarray(w, dtype=np.float64)
    if W.ndim == 0:
        W = np.full(dim, float(W))
    if not np.all(np.isfinite(W)):
        raise InvalidParameterError(f"{name} must be finite; got {w!r}.")
    if W.ndim == 1:
        if W.shape != (dim,) or np.any(W < 0):
            raise InvalidParameterError(f"{name} must be a non-negative number, {dim} non-negative values or a "
                                        f"({dim}, {dim}) PSD matrix; got {W.tolist() if W.size < 20 else W.shape}.")
        return np.diag(np.sqrt(W))
    if W.shape != (dim, dim) or not np.allclose(W, W.T, atol=1e-12 * max(1.0, np.abs(W).max())):
        raise InvalidParameterError(f"{name} as a matrix must be symmetric with shape ({dim}, {dim}); got "
                                    f"{W.shape}.")
    ev, V = np.linalg.eigh(0.5 * (W + W.T))
    if ev.min() < -1e-10 * max(1.0, ev.max()):
        raise InvalidParameterError(f"{name} must be positive semidefinite; its smallest eigenvalue is "
                                    f"{ev.min():.3g}.")
    return np.sqrt(np.clip(ev, 0, None))[:, None] * V.T


def _clip_psd(W):
    """The nearest positive semidefinite matrix to symmetric ``W`` (negative eigenvalues set to zero)."""
    ev, V = np.linalg.eigh(0.5 * (W + W.T))
    return (V * np.clip(ev, 0, None)) @ V.T


def _horizon(h, max_h):
    """``h`` as a positive number of steps, at most ``max_h`` (the predictor's horizon) when that is set."""
    try:
        N = int(h)
    except (TypeError, ValueError):
        raise InvalidParameterError(f"horizon_steps must be a positive integer; got {h!r}.") from None
    if N != h or N < 1:
        raise InvalidParameterError(f"horizon_steps must be a positive integer; got {h!r}.")
    if max_h is not None and N > max_h:
        raise InvalidParameterError(f"horizon_steps = {N} exceeds the predictor's horizon of {max_h} steps; plan over "
                                    f"at most {max_h} steps or refit the predictor with a longer horizon.")
    return N


def _output_target(t, N, p):
    """An output target as (N, p) rows: a constant (p,) repeated, or the first N rows of a trajectory."""
    if t.ndim == 1:
        if t.shape != (p,):
            raise SessionError(f"a constant target must have one value per output ({p}); got shape {t.shape}.")
        t = np.tile(t, (N, 1))
    if t.ndim != 2 or t.shape[1] != p or t.shape[0] < N:
        raise SessionError(f"a target trajectory must have shape (>= {N}, {p}) (horizon, outputs); got {t.shape}.")
    t = t[:N]
    if not np.isfinite(t).all():
        raise SessionError("the target holds NaN or infinite values; give a finite target for every output.")
    return t
