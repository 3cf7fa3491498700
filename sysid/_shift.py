"""The innovation predictor's matrix ``Ak = A − K C`` applied as what it is: for a lag realisation a shift.

Ridge ARX's observer-form realisation (:func:`~stimsteer.sysid.arx_statespace.arx_to_state_space`) has ``K = [I;
0]``, so every row of ``Ak`` is zero or a single 1 (each state takes the one before it), and ``Ak`` is nilpotent:
after ``max(na, nu)`` steps the predictor has forgotten the window's start. As dense products, running the predictor
over a past window cost ``n³`` per sample: at past 100 ms of 3 sites and 20 channels (2,297 states, 100 samples)
most of the 104 s ``stimsteer plan`` took with that model went there (``benchmarks/bench_cli_fit.py --plan``). Here
such an ``Ak`` is a partial permutation (no two rows copy the same state) applied by copying rows, and its powers
are index arrays. The copies are the products' numbers exactly: each entry of the product is one entry of the
operand times 1, plus zeros.
"""

from __future__ import annotations

import numpy as np

__all__: list = []


def shift_rows(Ak: np.ndarray) -> np.ndarray | None:
    """For an ``Ak`` whose rows are each zero or a single 1, no two rows with their 1 in the same column: the column
    of each row's 1 (−1 for a zero row). None for any other matrix."""
    nonzero = Ak != 0
    counts = nonzero.sum(axis=1)
    if counts.size == 0 or counts.max() > 1:
        return None
    src = np.where(counts == 1, nonzero.argmax(axis=1), -1)
    rows = np.flatnonzero(src >= 0)
    if not np.all(Ak[rows, src[rows]] == 1.0) or np.unique(src[rows]).size != rows.size:
        return None
    return src


class PredictorStep:
    """``Ak @ X`` and the powers of ``Ak``: by row copies and index arrays where ``Ak`` is a shift
    (:func:`shift_rows`), else by dense products."""

    def __init__(self, Ak: np.ndarray, src=False):
        self.Ak, self.src = Ak, shift_rows(Ak) if src is False else src
        n = Ak.shape[0]
        self._power = np.arange(n) if self.src is not None else np.eye(n)  # Ak^0

    @classmethod
    def of(cls, model) -> "PredictorStep":
        """For ``model``'s ``A − K C``; whether it is a shift is found once per model (its arrays are read-only copies,
        so the answer is kept on it, as its poles are)."""
        Ak = model.A - model.K @ model.C
        src = model.__dict__.get("_shift_rows", False)
        if src is False:
            src = shift_rows(Ak)
            object.__setattr__(model, "_shift_rows", src)
        return cls(Ak, src)

    def __call__(self, X: np.ndarray) -> np.ndarray:
        """``Ak @ X``."""
        if self.src is None:
            return self.Ak @ X
        out = np.zeros((self.src.size,) + X.shape[1:])
        rows = self.src >= 0
        out[rows] = X[self.src[rows]]
        return out

    def times_power(self, C: np.ndarray) -> np.ndarray:
        """``C @ Ak^t`` of the current power ``t`` (0 at first; :meth:`advance` raises it)."""
        if self.src is None:
            return C @ self._power
        out = np.zeros((C.shape[0], self.src.size))
        rows = np.flatnonzero(self._power >= 0)
        out[:, self._power[rows]] = C[:, rows]
        return out

    def advance(self) -> None:
        """``t → t + 1``."""
        if self.src is None:
            self._power = self.Ak @ self._power
        else:  # row i of Ak^(t+1) is row src[i] of Ak^t
            self._power = np.where(self.src >= 0, self._power[np.maximum(self.src, 0)], -1)

    def power(self) -> np.ndarray | None:
        """``Ak^t`` as a dense matrix, or None where it is zero for a shift (nilpotent: the window's start is
        forgotten)."""
        if self.src is None:
            return self._power
        if not (self._power >= 0).any():
            return None
        n = self.src.size
        M = np.zeros((n, n))
        rows = np.flatnonzero(self._power >= 0)
        M[rows, self._power[rows]] = 1.0
        return M
