"""Invented sessions for the tests: a linear state-space system driven by a given input, in trials of equal length.

The tests that need "some stable system with noise" share this loop instead of each writing it again; each keeps
its own system (its ``A``, ``B``, ``C``, sizes and seed), drawn in its own order from its own generator.
"""

from __future__ import annotations

import numpy as np

from stimsteer.sysid import Session


def state_space_session(u: np.ndarray, A: np.ndarray, B: np.ndarray, C: np.ndarray | None = None, *,
                        noise: float = 0.0, rng: np.random.Generator | None = None, n_trials: int = 4,
                        sample_rate_hz: float = 100.0) -> Session:
    """``x_{k+1} = A x_k + B u_k``, ``y_k = C x_k + noise · e_k`` (``C`` None: ``y_k = x_k + noise · e_k``) from
    ``x_0 = 0``, with ``e_k`` standard normal, drawn from ``rng`` step by step; the samples cut into ``n_trials``
    trials of (nearly) equal length."""
    T, n = u.shape[0], A.shape[0]
    p = n if C is None else C.shape[0]
    x, y = np.zeros(n), np.zeros((T, p))
    for k in range(T):
        y[k] = (x if C is None else C @ x) + noise * rng.standard_normal(p)
        x = A @ x + B @ u[k]
    edges = np.linspace(0, T, n_trials + 1).astype(int)
    return Session(u=u, y=y, sample_rate_hz=sample_rate_hz, trials=np.column_stack([edges[:-1], edges[1:]]))
