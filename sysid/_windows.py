"""Validation of batches of prediction windows, shared by every predictor's ``predict_many``."""

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
