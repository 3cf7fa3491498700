"""The dictionaries of the lifted predictor and the windows it lifts (helpers of :mod:`stimsteer.sysid.lifted`).

A lifted state at sample ``t`` is ``z_t = [r_t; φ(s_t); 1]``:

* ``r_t`` — the raw past window, inputs then outputs, time-major (``u_{t−T+1..t}``, ``y_{t−T+1..t}``), the
  ordering of :func:`~stimsteer.sysid.protocols.past_vector`;
* ``s_t`` — the standardised feature source: the past outputs ``y_{t−T+1..t}`` and the strictly past inputs
  ``u_{t−T+1..t−1}`` (the current input enters the lifted dynamics linearly, as in Korda & Mezić 2018);
* ``φ`` — the dictionary: random Fourier features, radial features at centres drawn from the training windows, or
  all products of two entries of ``s_t`` (``"poly2"``).
"""

from __future__ import annotations

import numpy as np

from .exceptions import InvalidParameterError

__all__ = ["DICTIONARIES", "Dictionary", "dictionary_from", "draw_dictionary", "fourier_features", "source_dim",
           "windows"]

DICTIONARIES = ("rff", "rbf", "poly2")


def source_dim(T: int, m: int, p: int) -> int:
    """Length of the feature source ``s_t``: ``T`` past outputs and ``T − 1`` strictly past inputs."""
    return T * p + (T - 1) * m


def windows(u: np.ndarray, y: np.ndarray, T: int):
    """Raw windows ``r_t`` and feature sources (not yet standardised) for every ``t >= T − 1`` of one segment.

    Returns
    -------
    raw : ndarray, shape (n − T + 1, T·(m + p))
    src : ndarray, shape (n − T + 1, source_dim)
    """
    n, m = u.shape
    k = n - T + 1
    U = np.stack([u[i:i + k] for i in range(T)], axis=1)  # (k, T, m), time-major
    Y = np.stack([y[i:i + k] for i in range(T)], axis=1)
    raw = np.concatenate([U.reshape(k, -1), Y.reshape(k, -1)], axis=1)
    src = np.concatenate([Y.reshape(k, -1), U[:, :T - 1].reshape(k, -1)], axis=1)
    return raw, src


def fourier_features(s: np.ndarray, omega: np.ndarray, phase: np.ndarray, amplitude) -> np.ndarray:
    """Random Fourier features ``amplitude · cos(s ωᵀ + phase)`` of standardised sources ``s`` (Rahimi & Recht
    2007), made in one array (one set of frequencies, or several dictionaries' stacked)."""
    out = s @ omega.T
    out += phase
    np.cos(out, out=out)
    out *= amplitude
    return out


class Dictionary:
    """A fixed dictionary ``φ`` on standardised feature sources (its random draws are stored, so it is repeatable).

    Parameters
    ----------
    kind : {"rff", "rbf", "poly2"}
    mean, scale : ndarray, shape (d,)
        Standardisation of the source (training mean and standard deviation).
    omega, phase : ndarray or None
        ``rff``: frequencies (D, d) and phases (D,); ``rbf``: centres (D, d) in ``omega`` and ``phase`` unused.
    bandwidth : float
        Kernel width in standardised units (``rff`` and ``rbf``).
    """

    def __init__(self, kind, mean, scale, omega=None, phase=None, bandwidth=1.0):
        self.kind, self.mean, self.scale = kind, np.asarray(mean, float), np.asarray(scale, float)
        self.omega = None if omega is None else np.asarray(omega, float)
        self.phase = None if phase is None else np.asarray(phase, float)
        self.bandwidth = float(bandwidth)

    @property
    def n_features(self) -> int:
        """Number of features ``D``."""
        d = self.mean.size
        if self.kind == "poly2":
            return d * (d + 1) // 2
        return 0 if self.omega is None else int(self.omega.shape[0])

    def __call__(self, src: np.ndarray) -> np.ndarray:
        """Features of sources ``src`` (n, d), shape (n, D)."""
        return self.of_standardised(self.standardise(src))

    def standardise(self, src: np.ndarray) -> np.ndarray:
        """The sources in standardised units (dictionaries of the same training rows share them)."""
        return (np.asarray(src, float) - self.mean) / self.scale

    def of_standardised(self, s: np.ndarray) -> np.ndarray:
        """Features of standardised sources ``s`` (n, d), shape (n, D)."""
        if self.kind == "poly2":
            i, j = np.triu_indices(s.shape[1])
            return s[:, i] * s[:, j]
        if self.n_features == 0:
            return np.zeros((s.shape[0], 0))
        if self.kind == "rff":
            return fourier_features(s, self.omega, self.phase, np.sqrt(2.0 / self.n_features))
        d2 = (s * s).sum(1)[:, None] - 2.0 * s @ self.omega.T + (self.omega * self.omega).sum(1)[None]
        return np.exp(-np.maximum(d2, 0.0) / (2.0 * self.bandwidth ** 2))

    def to_state(self) -> dict:
        """The stored form (arrays and plain values)."""
        state = {"kind": self.kind, "mean": self.mean, "scale": self.scale, "bandwidth": self.bandwidth}
        if self.omega is not None:
            state["omega"], state["phase"] = self.omega, self.phase
        return state

    @classmethod
    def from_state(cls, state: dict) -> "Dictionary":
        """Inverse of :meth:`to_state`."""
        return cls(str(state["kind"]), state["mean"], state["scale"], state.get("omega"), state.get("phase"),
                   float(state["bandwidth"]))


def draw_dictionary(kind: str, src: np.ndarray, n_features: int, bandwidth: float, seed: int) -> Dictionary:
    """A dictionary of ``n_features`` features for training sources ``src`` (n, d), drawn from ``seed``.

    The bandwidth is relative: the kernel width is ``bandwidth · √d`` in standardised units, the typical distance
    between two standardised windows (common practice, no source).
    """
    mean = src.mean(0) if src.size else np.zeros(src.shape[1])
    scale = src.std(0) if src.size else np.ones(src.shape[1])
    return dictionary_from(kind, mean, scale, src.shape[0], lambda idx: src[idx], n_features, bandwidth, seed)


def dictionary_from(kind: str, mean, scale, n_rows: int, rows_at, n_features: int, bandwidth: float,
                    seed: int) -> Dictionary:
    """:func:`draw_dictionary` from the sources' mean and standard deviation, their count and ``rows_at(idx)``
    (the sources of rows ``idx``, asked for by the radial dictionary's centres only): the same draws."""
    if kind not in DICTIONARIES:
        raise InvalidParameterError(f"dictionary must be one of {DICTIONARIES}; got {kind!r}.")
    mean, scale = np.asarray(mean, float), np.asarray(scale, float)
    scale = np.where(scale > 1e-12 * max(1.0, float(np.abs(mean).max(initial=0.0))), scale, 1.0)
    if kind == "poly2" or n_features == 0:
        return Dictionary(kind, mean, scale)
    d = mean.size
    width = float(bandwidth) * np.sqrt(max(d, 1))
    rng = np.random.default_rng(seed)
    if kind == "rff":
        omega = rng.standard_normal((n_features, d)) / width
        return Dictionary(kind, mean, scale, omega, rng.uniform(0.0, 2 * np.pi, n_features), width)
    pick = rng.choice(n_rows, size=n_features, replace=n_rows < n_features)
    centres = (rows_at(pick) - mean) / scale
    return Dictionary(kind, mean, scale, centres, np.zeros(n_features), width)
