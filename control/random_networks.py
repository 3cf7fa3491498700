"""Random coupling matrices for simulated networks, made stable by the normalisation of Gu et al. (2015)."""

from __future__ import annotations

import numbers

import numpy as np

from ..sysid import SessionError, UnstableModelError
from ._plant_params import _positive, _spectral_radius

__all__ = ["random_network"]


def random_network(n_nodes: int, *, density: float, seed, scale: float = 1.0, self_weight=0.0,
                   symmetric: bool = False, signed: bool = True, require_stable: bool = True) -> np.ndarray:
    """A sparse random coupling matrix made stable by the normalisation of Gu et al. (2015).

    Parameters
    ----------
    n_nodes : int
        Number of nodes n (at least 1).
    density : float
        Probability in (0, 1] that each off-diagonal edge exists (Erdős–Rényi).
    seed : int or numpy.random.Generator
        Source of the random edges and weights.
    scale : float, default 1.0
        Positive factor applied to the normalised coupling.
    self_weight : float or ndarray (n_nodes,), default 0.0
        Weight added on the diagonal: each node's persistence of its own activity (one value for all nodes, or
        one per node for nodes with different time constants).
    symmetric : bool, default False
        Undirected network: edges and weights mirrored across the diagonal.
    signed : bool, default True
        Weights are standard normal; when False, their absolute values (excitatory-only coupling).
    require_stable : bool, default True
        Raise when the spectral radius of the result is not below 1.

    Returns
    -------
    A : ndarray, shape (n_nodes, n_nodes)
        ``diag(self_weight) + scale · A_raw / (1 + σ_max(A_raw))``, dimensionless.

    Raises
    ------
    SessionError
        On a bad size, density or scale.
    UnstableModelError
        When ``require_stable`` and the spectral radius is at least 1.

    Notes
    -----
    Since ``σ_max(A_raw / (1 + σ_max(A_raw))) = σ_max / (1 + σ_max) < 1``, the result satisfies
    ``σ_max(A) ≤ max|self_weight| + scale · σ_max / (1 + σ_max) < 1`` whenever ``max|self_weight| + scale ≤ 1``;
    the spectral radius is bounded by ``σ_max``, so such a network is stable.

    References
    ----------
    Gu S. et al. (2015), Controllability of structural brain networks, Nat. Commun. 6:8414 (Methods).

    Examples
    --------
    >>> A = random_network(8, density=0.3, seed=1)
    >>> bool(np.linalg.norm(A, 2) < 1)
    True
    """
    if not isinstance(n_nodes, numbers.Integral) or isinstance(n_nodes, bool) or n_nodes < 1:
        raise SessionError(f"n_nodes must be a positive integer; got {n_nodes!r}.")
    density = float(density)
    if not 0 < density <= 1:
        raise SessionError(f"density must be in (0, 1], the probability of each edge; got {density}.")
    scale = _positive("scale", scale)
    n = int(n_nodes)
    diag = np.asarray(self_weight, dtype=np.float64)
    if diag.ndim == 0:
        diag = np.full(n, float(diag))
    if diag.shape != (n,) or not np.all(np.isfinite(diag)):
        raise SessionError(
            f"self_weight must be a finite number or one finite value per node, shape ({n},); got {self_weight!r}."
        )
    rng = np.random.default_rng(seed)
    edges = rng.random((n, n)) < density
    weights = rng.standard_normal((n, n))
    if not signed:
        weights = np.abs(weights)
    raw = np.where(edges, weights, 0.0)
    np.fill_diagonal(raw, 0.0)
    if symmetric:
        upper = np.triu(raw, 1)
        raw = upper + upper.T
    sigma = float(np.linalg.norm(raw, 2)) if n > 1 else 0.0
    A = np.diag(diag) + scale * raw / (1.0 + sigma)
    rho = _spectral_radius(A)
    if require_stable and rho >= 1:
        raise UnstableModelError(
            f"the scaled network has spectral radius {rho:.4f} >= 1 (scale={scale}, largest self_weight "
            f"{np.max(np.abs(diag)):g}). Keep max|self_weight| + scale <= 1 for a guaranteed stable network, or pass "
            "require_stable=False."
        )
    return A

