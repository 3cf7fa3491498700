"""Validation of batches of prediction windows, shared by every predictor's ``predict_many``, and their products
in BLAS calls small enough for one thread each."""

from __future__ import annotations

import numpy as np

from .exceptions import SessionError


def window_batch(u_past, y_past, u_future, *, n_inputs: int, n_outputs: int, min_past: int = 1):
    """Check a batch of windows and return float64 arrays ``(u_past, y_past, u_future)``.

    Parameters
    ----------
    u_past : array_like, shape (n_windows, n_past, n_inputs)
    y_past : array_like, shape (n_windows, n_past, n_outputs)
    u_future : array_like, shape (n_windows, n_future, n_inputs)
    min_past : int
        Fewest past samples a window may have.

    Raises
    ------
    SessionError
        Wrong shapes, unequal batch sizes or past lengths, a past shorter than ``min_past``, NaN or inf.
    """
    arrays = []
    for name, a, c in (("u_past", u_past, n_inputs), ("y_past", y_past, n_outputs), ("u_future", u_future, n_inputs)):
        a = np.asarray(a, dtype=np.float64)
        if a.ndim != 3 or a.shape[2] != c:
            raise SessionError(f"predict_many needs batches of windows: {name} must have shape (n_windows, "
                               f"n_samples, {c}); got {a.shape}.")
        if not np.all(np.isfinite(a)):
            raise SessionError(f"{name} holds NaN or infinite values; give windows of valid samples.")
        arrays.append(a)
    up, yp, uf = arrays
    if not up.shape[0] == yp.shape[0] == uf.shape[0]:
        raise SessionError(f"predict_many needs the same number of windows in u_past, y_past and u_future; got "
                           f"{up.shape[0]}, {yp.shape[0]} and {uf.shape[0]}.")
    if up.shape[1] != yp.shape[1] or up.shape[1] < min_past:
        raise SessionError(
            f"each past window needs at least past_steps_={min_past} samples of inputs and outputs of equal "
            f"length; got {up.shape[1]} input and {yp.shape[1]} output samples. Pass a longer past window."
        )
    return up, yp, uf


#: Multiply-adds per BLAS call below which OpenBLAS keeps a product on the calling thread (its threshold is 65,536
#: times a build factor >= 1; half of it here). Larger products of this size are spread over its threads, which
#: doubled the CPU time of a batch recursion on a loaded machine (threads waiting for busy cores).
_ONE_THREAD_GEMM = 32768


def small_gemms(a: np.ndarray, w: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """``a @ w`` (``a`` with unit column stride) as one stacked product of row blocks small enough for one BLAS
    thread each (:data:`_ONE_THREAD_GEMM`), and the rows left over."""
    n, k = a.shape
    out = np.empty((n, w.shape[1])) if out is None else out
    rows = max(1, _ONE_THREAD_GEMM // max(1, k * w.shape[1]))
    full = n // rows * rows if n > rows else 0
    if full:
        np.matmul(a[:full].reshape(-1, rows, k), w, out=out[:full].reshape(-1, rows, w.shape[1]))
    if full < n:
        np.matmul(a[full:], w, out=out[full:])
    return out
