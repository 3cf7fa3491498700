"""Validation of batches of prediction windows, shared by every predictor's ``predict_many``; their products in BLAS
calls small enough for one thread each, or on one BLAS thread; the windows of a run as the rows of one matrix."""

from __future__ import annotations

import contextlib

import numpy as np
from numpy.lib.stride_tricks import as_strided, sliding_window_view

from ._lagged import blas_controller
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


def one_blas_thread():
    """Single-threaded BLAS for the duration of a ``with``, through the process's one threadpool controller
    (``sysid._lagged.blas_controller``; ~25 µs to enter and leave).

    For the products of many prediction windows: a (721 × 170) @ (170 × 160) product took 0.9 ms of CPU on one
    thread and 7.9 ms of CPU when OpenBLAS spread it over the 2 cores of a busy machine (load 2.3), and split into
    products under its threading threshold (:func:`small_gemms`) 4.2 ms.
    """
    ctl = blas_controller()
    return contextlib.nullcontext() if ctl is None else ctl.limit(limits=1)


def window_rows(u: np.ndarray, y: np.ndarray, past: int, horizon: int, rows: slice = slice(None)) -> np.ndarray:
    """The prediction windows of one run as the rows that prediction maps multiply (one contiguous matrix).

    Row ``r`` of the result is ``[vec(u[t−P:t]); vec(y[t−P:t]); vec(u[t:t+H])]`` (time-major, the column order of
    :class:`~stimsteer.sysid.protocols.PredictionMaps`' ``[P F]``) of the window that starts at ``t = P + r``, for
    ``r`` in ``range(T − P − H + 1)[rows]``; ``u`` (T, m) and ``y`` (T, p). The windows are read as overlapping
    views of the run's rows (a window of consecutive time-major samples is one stretch of memory) and copied once.
    """
    u = np.ascontiguousarray(u, dtype=np.float64)
    y = np.ascontiguousarray(y, dtype=np.float64)
    P, H = int(past), int(horizon)
    (T, m), p = u.shape, y.shape[1]
    n = max(T - P - H + 1, 0)
    us = as_strided(u.reshape(-1), shape=(n, (P + H) * m), strides=(m * 8, 8), writeable=False)[rows]
    ys = as_strided(y.reshape(-1), shape=(n, P * p), strides=(p * 8, 8), writeable=False)[rows]
    out = np.empty((us.shape[0], P * (m + p) + H * m))
    out[:, :P * m] = us[:, :P * m]
    out[:, P * m:P * (m + p)] = ys
    out[:, P * (m + p):] = us[:, P * m:]
    return out


def stacked_maps(predictor, P: int, H: int, m: int, p: int):
    """``(Gᵀ, c)`` with ``G = [P F]`` of the predictor's :class:`~stimsteer.sysid.protocols.PredictionMaps` over
    windows of ``P`` past and ``H`` future samples (``m`` inputs, ``p`` outputs), or None for a predictor without
    linear maps.

    ``window_rows(...) @ Gᵀ + c`` is then its prediction of a batch of windows (the maps are exactly what
    ``predict`` computes, the ``LinearPredictor`` contract): one product of the windows of a run with maps built
    once, where ``predict_many`` validated and assembled every batch again, and ridge ARX ran its recursion with
    one thin (p-column) product per step.
    """
    if not getattr(predictor, "has_linear_maps", False) or not callable(getattr(predictor, "prediction_maps", None)):
        return None
    maps = predictor.prediction_maps(P, H)
    G = np.concatenate([np.asarray(maps.P, np.float64), np.asarray(maps.F, np.float64)], axis=1)
    c = np.asarray(maps.c, np.float64).reshape(-1)
    if G.shape != (H * p, P * (m + p) + H * m) or c.shape != (H * p,):
        raise SessionError(f"the predictor's prediction maps have shapes {G.shape} and {c.shape}; expected "
                           f"{(H * p, P * (m + p) + H * m)} and {(H * p,)} for {P} past and {H} future samples.")
    return np.ascontiguousarray(G.T), c


def apply_stacked(maps, u_past, y_past, u_future) -> np.ndarray:
    """Predictions of a batch of windows, shape (n_windows, n_future, p), with the stacked maps ``(Gᵀ, c)`` of
    :func:`stacked_maps` over exactly these window lengths, checked as ``predict_many`` checks them
    (:func:`window_batch`)."""
    u_past, y_past, u_future = window_batch(u_past, y_past, u_future, n_inputs=u_past.shape[2],
                                            n_outputs=y_past.shape[2])
    n = u_past.shape[0]
    rows = np.concatenate([u_past.reshape(n, -1), y_past.reshape(n, -1), u_future.reshape(n, -1)], axis=1)
    return (rows @ maps[0] + maps[1]).reshape(n, u_future.shape[1], -1)


def apply_checked(maps, u_past, y_past, u_future) -> np.ndarray:
    """:func:`apply_stacked` of windows whose inputs are known to be finite float64 arrays of the right shapes (a
    chained free run's, checked once): only the past outputs, fed back from earlier blocks, are checked, with
    ``predict_many``'s message (the three checks per block were a third of :func:`apply_stacked`'s time)."""
    if not np.all(np.isfinite(y_past)):
        raise SessionError("y_past holds NaN or infinite values; give windows of valid samples.")
    n = u_past.shape[0]
    rows = np.concatenate([u_past.reshape(n, -1), y_past.reshape(n, -1), u_future.reshape(n, -1)], axis=1)
    return (rows @ maps[0] + maps[1]).reshape(n, u_future.shape[1], -1)

def check_finite(u, y) -> None:
    """Raise :class:`SessionError` when the samples of a valid segment hold NaN or infinite values."""
    if not (np.all(np.isfinite(u)) and np.all(np.isfinite(y))):
        raise SessionError("a valid segment of the session holds NaN or infinite values; mask them (the session's "
                           "mask) so that scoring leaves them out.")


def predict_batch(predictor, up, yp, uf) -> np.ndarray:
    """Predictions for stacked windows; uses ``predict_many`` when the predictor offers it."""
    if hasattr(predictor, "predict_many"):
        out = np.asarray(predictor.predict_many(up, yp, uf), dtype=np.float64)
    else:
        out = np.stack([np.asarray(predictor.predict(a, b, c), dtype=np.float64) for a, b, c in zip(up, yp, uf)])
    expected = (uf.shape[0], uf.shape[1], yp.shape[2])
    if out.shape != expected:
        raise SessionError(f"the predictor returned shape {out.shape[1:]}; expected {expected[1:]} per window.")
    return out


def window_predictions(predictor, linear, u, y, past: int, horizon: int, rows: slice) -> np.ndarray:
    """The predictions of the windows ``rows`` of one run (as :func:`window_rows` numbers them), one row of
    ``horizon·p`` (time-major) each: one product with the stacked maps ``linear`` (:func:`stacked_maps`; the
    samples must be finite), or ``predict_many`` of the windows where ``linear`` is None."""
    if linear is not None:
        r = range(max(u.shape[0] - past - horizon + 1, 0))[rows]
        if len(r):  # the samples these windows read (predict_many checks the same)
            check_finite(u[r[0]:r[-1] + past + horizon], y[r[0]:r[-1] + past])
        out = window_rows(u, y, past, horizon, rows) @ linear[0]
        out += linear[1]
        return out
    # the windows [t - P, t + H) as strided views (no gather), one contiguous copy of each part
    u_win = sliding_window_view(u, past + horizon, axis=0).transpose(0, 2, 1)[rows]
    y_win = sliding_window_view(y, past + horizon, axis=0).transpose(0, 2, 1)[rows, :past]
    out = predict_batch(predictor, np.ascontiguousarray(u_win[:, :past]), np.ascontiguousarray(y_win),
                        np.ascontiguousarray(u_win[:, past:]))
    return out.reshape(out.shape[0], -1)
