"""Energy over rolling windows of stimulation: the arithmetic that limits, controllers and loops share.

An energy budget ``E`` (µA²) with a window of ``W`` samples holds when ``Σ_{k=j−W+1..j} Σ_i u_ik² <= E`` for every
sample ``j`` of a sequence, the samples before the sequence counting with their applied values (``history``) or as
zero stimulation when none are given. A window shorter than ``W`` at the start of a sequence without history is the
sum of the samples it holds (the ones before are rest).
"""

from __future__ import annotations

import numpy as np

from ..sysid.exceptions import InvalidParameterError

__all__: list = []


def check_window(window, name: str = "energy_window_steps") -> int:
    """``window`` as a whole number of samples >= 1, or an error naming ``name``."""
    if isinstance(window, bool) or not isinstance(window, (int, np.integer)) or window < 1:
        raise InvalidParameterError(f"{name} must be a whole number of samples >= 1; got {window!r}. Give the window "
                                    "length in samples.")
    return int(window)


def window_energies(inputs, window: int, history=None) -> np.ndarray:
    """Energy of the window of ``window`` samples that ends at each sample of ``inputs``, µA².

    Parameters
    ----------
    inputs : ndarray, shape (n_steps, n_inputs)
        µA.
    window : int
        ``W``, samples.
    history : ndarray, shape (n_before, n_inputs), optional
        Inputs applied before ``inputs[0]`` (the last ``W − 1`` count); default rest (zeros).

    Returns
    -------
    ndarray, shape (n_steps,)
        ``Σ`` of ``u²`` over samples ``j − W + 1 … j`` for each ``j``.
    """
    u = np.asarray(inputs, dtype=np.float64)
    u = u.reshape(u.shape[0], -1)
    e = np.sum(u**2, axis=1)
    h = np.zeros(0) if history is None else np.sum(np.asarray(history, np.float64).reshape(-1, u.shape[1])**2, axis=1)
    h = h[max(0, h.size - (window - 1)):]
    full = np.concatenate([np.zeros(window - 1 - h.size), h, e])
    c = np.concatenate([[0.0], np.cumsum(full)])
    return c[window:] - c[:-window] if full.size >= window else np.zeros(0)


def over_budget(inputs, budget: float, window: int, history=None, rtol: float = 1e-9) -> tuple[int, float]:
    """Number of windows (ending at a sample of ``inputs``) above ``budget``, and the largest window energy / budget."""
    w = window_energies(inputs, window, history)
    if w.size == 0:
        return 0, 0.0
    return int(np.sum(w > budget * (1.0 + rtol))), float(np.max(w) / budget)
