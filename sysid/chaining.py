"""Whether a predictor's long predictions stay bounded: the spectral radius of its zero-input recursion.

A predictor with a finite horizon ``N`` (the direct route) predicts a pattern longer than ``N`` by chaining blocks:
each block's past window (``T`` samples of inputs and outputs) is taken from the previous block's inputs and
predictions. With zero future inputs, the past window ``z = [vec(u_past); vec(y_past)]`` of the next block is a
linear function of the current one, ``z⁺ = M z``, and the chained prediction stays bounded for every bounded
pattern only if the spectral radius ``ρ(M) < 1`` (a discrete-time linear recursion; e.g. Kailath (1980), Linear
Systems, ch. 2). From the prediction maps ``vec(y_future) = P z + F vec(u_future) + c`` over ``T`` past and ``N``
future samples, ``M`` shifts the concatenated inputs ``[u_past; 0]`` and outputs ``[y_past; P z]`` by ``N``
samples and keeps the last ``T``.

Predictors without a horizon limit (ridge ARX, subspace) recurse on their own state-space realisation; their
radius is that of the realisation's ``A`` (``state_space_model().spectral_radius``).
"""

from __future__ import annotations

import numpy as np

__all__ = ["block_map", "chain_radius", "growth_text"]


def block_map(maps, n_inputs: int, n_outputs: int) -> np.ndarray:
    """The zero-input map ``z⁺ = M z`` of the past window from one block to the next.

    Parameters
    ----------
    maps : PredictionMaps
        Over ``T = maps.past_steps`` past samples and ``N = maps.horizon_steps`` future samples.
    n_inputs, n_outputs : int

    Returns
    -------
    M : ndarray, shape (T (m + p), T (m + p))
        Acting on ``[vec(u_past); vec(y_past)]`` (time-major blocks).
    """
    m, p, T, N = int(n_inputs), int(n_outputs), int(maps.past_steps), int(maps.horizon_steps)
    size = T * (m + p)
    M = np.zeros((size, size))
    for k in range(T):  # sample k of the next past window is sample N + k of [past; future]
        src = N + k
        if src < T:  # still inside the current past window: a shift
            M[k * m:(k + 1) * m, src * m:(src + 1) * m] = np.eye(m)
            M[T * m + k * p:T * m + (k + 1) * p, T * m + src * p:T * m + (src + 1) * p] = np.eye(p)
        else:  # a predicted sample (zero input)
            f = src - T
            M[T * m + k * p:T * m + (k + 1) * p] = maps.P[f * p:(f + 1) * p]
    return M


def chain_radius(predictor) -> float | None:
    """Spectral radius of the recursion a long prediction runs (None when it cannot be computed).

    Chained blocks (finite ``max_horizon_steps_`` with linear maps): ``ρ`` of :func:`block_map`. No horizon limit:
    ``ρ`` of the state-space realisation. A predictor without linear maps (ℓ1 Hankel) has no fixed map: None.
    """
    limit = getattr(predictor, "max_horizon_steps_", None)
    if limit is None:
        if hasattr(predictor, "state_space_model"):
            return float(predictor.state_space_model().spectral_radius)
        return None
    if not getattr(predictor, "has_linear_maps", False):
        return None
    T = int(predictor.past_steps_)
    maps = predictor.prediction_maps(T, int(limit))
    M = block_map(maps, int(predictor.n_inputs_), int(predictor.n_outputs_))
    return float(np.max(np.abs(np.linalg.eigvals(M)), initial=0.0))


def growth_text(radius: float, n_steps: int, block_steps: int | None) -> str:
    """How much a deviation can grow over ``n_steps`` samples at this radius, in words."""
    n_blocks = int(np.ceil(n_steps / block_steps)) if block_steps else int(n_steps)
    unit = f"{n_blocks} chained blocks of {block_steps} samples" if block_steps else f"{n_steps} steps"
    with np.errstate(over="ignore"):
        factor = float(radius) ** n_blocks
    return f"spectral radius {radius:.4f}: over {unit} a deviation can grow by a factor of up to {factor:.3g}"
