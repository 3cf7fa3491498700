"""Validation of the constructor arguments shared by the simulated plants (shapes, finiteness, signs, names)."""

from __future__ import annotations

import numbers

import numpy as np

from ..sysid import SessionError


def _matrix(name: str, M, shape: tuple | None = None) -> np.ndarray:
    arr = np.asarray(M, dtype=np.float64)
    if arr.ndim != 2:
        raise SessionError(f"{name} must be a 2-D matrix; got an array of shape {arr.shape}. Reshape it.")
    if shape is not None and arr.shape != shape:
        raise SessionError(
            f"{name} must have shape {shape} to match the other matrices; got {arr.shape}. Check its orientation "
            "(rows = nodes for A, W and B; rows = recorded channels for C and D)."
        )
    if not np.all(np.isfinite(arr)):
        raise SessionError(f"{name} holds NaN or infinite entries; give finite numbers.")
    arr = arr.copy()
    arr.setflags(write=False)
    return arr


def _input_output_matrices(n: int, B, C, D):
    """Validate B (n, m), C (p, n) and D (p, m, default zero) against n nodes."""
    B = _matrix("B", B)
    if B.shape[0] != n:
        raise SessionError(
            f"B must have one row per node, shape ({n}, n_inputs); got {B.shape}. Transpose it if it is (m, n)."
        )
    C = _matrix("C", C)
    if C.shape[1] != n:
        raise SessionError(
            f"C must have one column per node, shape (n_outputs, {n}); got {C.shape}. Transpose it if it is (n, p)."
        )
    D = _matrix("D", np.zeros((C.shape[0], B.shape[1])) if D is None else D, (C.shape[0], B.shape[1]))
    return B, C, D


def _nonneg(name: str, value, n: int) -> np.ndarray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        raise SessionError(f"{name} must be a number or one value per channel, shape ({n},); got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise SessionError(f"{name} must be finite and non-negative (a standard deviation or amplitude); got {arr}.")
    arr = arr.copy()
    arr.setflags(write=False)
    return arr


def _positive(name: str, value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise SessionError(f"{name} must be a positive number; got {value!r}.") from None
    if not np.isfinite(v) or v <= 0:
        raise SessionError(f"{name} must be positive and finite; got {v}.")
    return v


def _names(kind: str, names, n: int, prefix: str) -> tuple:
    if names is None:
        return tuple(f"{prefix}{i}" for i in range(n))
    names = tuple(str(s) for s in names)
    if len(names) != n or len(set(names)) != n or any(not s.strip() for s in names):
        raise SessionError(f"{kind} must be {n} unique non-empty names, one per channel; got {list(names)}.")
    return names


def _seed_int(seed) -> int:
    if isinstance(seed, numbers.Integral) and not isinstance(seed, bool) and int(seed) >= 0:
        return int(seed)
    raise SessionError(f"seed must be a non-negative integer; got {seed!r}.")


def _spectral_radius(A: np.ndarray) -> float:
    return float(np.max(np.abs(np.linalg.eigvals(A)))) if A.size else 0.0


def _network_matrices(name: str, M, B, C, D):
    """Validate a square coupling ``M`` (n_nodes, n_nodes) named ``name``, and B, C, D against its n nodes."""
    M = _matrix(name, M)
    n = M.shape[0]
    if M.shape != (n, n):
        raise SessionError(f"{name} must be square (n_nodes, n_nodes); got shape {M.shape}.")
    B, C, D = _input_output_matrices(n, B, C, D)
    return M, B, C, D


def _input_array(u, n_inputs: int, what: str = "u", min_samples: int = 0) -> np.ndarray:
    """A time-major float64 input (n_samples, n_inputs), finite, with at least ``min_samples`` rows."""
    u = np.asarray(u, dtype=np.float64)
    if u.ndim == 1 and n_inputs == 1:
        u = u[:, None]
    if u.ndim != 2 or u.shape[1] != n_inputs or u.shape[0] < min_samples:
        rows = f" and at least {min_samples} sample(s)" if min_samples else ""
        raise SessionError(f"{what} must be time-major with shape (n_samples, {n_inputs}){rows} for this plant's "
                           f"{n_inputs} input(s); got shape {u.shape}.")
    if not np.all(np.isfinite(u)):
        raise SessionError(f"{what} holds NaN or infinite values; give finite amplitudes (µA).")
    return u
