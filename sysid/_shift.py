"""The innovation predictor's matrix ``Ak = A − K C`` applied as what it is: for a lag realisation a shift.

Ridge ARX's observer-form realisation (:func:`~stimsteer.sysid.arx_statespace.arx_to_state_space`) has ``K = [I;
0]``, so every row of ``Ak`` is zero or a single 1 (each state takes the one before it), and ``Ak`` is nilpotent:
after ``max(na, nu)`` steps the predictor has forgotten the window's start. As dense products, running the predictor
over a past window cost ``n³`` per sample: at past 100 ms of 3 sites and 20 channels (2,297 states, 100 samples)
most of the 104 s ``stimsteer plan`` took with that model went there (``benchmarks/bench_cli_fit.py --plan``). Here
such an ``Ak`` is a partial permutation (no two rows copy the same state) applied by copying rows, and its powers
are index arrays. The copies are the products' numbers exactly: each entry of the product is one entry of the
operand times 1, plus zeros. :func:`unit_window_run` runs the predictor over every unit window at once (the state
estimate's linear map) the same way: the identity's blocks placed, not multiplied.
"""

from __future__ import annotations

import numpy as np

__all__: list = []


def unit_rows(A: np.ndarray) -> np.ndarray | None:
    """Each row of ``A`` classified: the column of its single 1 (a unit row), −1 (a zero row) or −2 (any other, a
    dense row); None where two unit rows have their 1 in the same column."""
    nonzero = A != 0
    counts = nonzero.sum(axis=1)
    first = nonzero.argmax(axis=1)
    unit = (counts == 1) & (A[np.arange(A.shape[0]), first] == 1.0)
    src = np.where(unit, first, np.where(counts == 0, -1, -2))
    return None if np.unique(src[unit]).size != np.count_nonzero(unit) else src


def non_nilpotent_states(A: np.ndarray) -> np.ndarray | None:
    """The states outside ``A``'s nilpotent part made of zero rows and chains of unit rows: ``S`` grows from the
    zero rows by the unit rows copying a state of ``S``, so ``A[S, ~S] = 0`` and ``A[S, S]`` is strictly triangular
    in that order, and the eigenvalues of ``A`` are those of ``A[~S, ~S]`` and ``|S|`` zeros (block triangular).
    A ridge ARX's realisation: its lagged inputs (297 of 2,297 states at past 100 ms of 3 sites). None where ``S``
    is empty or ``A``'s rows are not classified (:func:`unit_rows`)."""
    src = unit_rows(A) if A.shape[0] else None
    if src is None:
        return None
    found = src == -1
    layer = found
    while layer.any():
        layer = (src >= 0) & ~found & found[np.maximum(src, 0)]
        found |= layer
    return np.flatnonzero(~found) if found.any() else None


def eigenvalues(A: np.ndarray) -> np.ndarray:
    """``numpy.linalg.eigvals(A)``, its nilpotent part (:func:`non_nilpotent_states`) given as exact zeros and the
    rest from the smaller block (a ridge ARX at past 100 ms: 2,000 of 2,297 states, 6.3 -> 5.0 s)."""
    rest = non_nilpotent_states(A)
    if rest is None:
        return np.linalg.eigvals(A)
    return np.concatenate([np.linalg.eigvals(A[np.ix_(rest, rest)]), np.zeros(A.shape[0] - rest.size)])


def shift_rows(Ak: np.ndarray) -> np.ndarray | None:
    """For an ``Ak`` whose rows are each zero or a single 1, no two rows with their 1 in the same column: the column
    of each row's 1 (−1 for a zero row). None for any other matrix."""
    src = unit_rows(Ak) if Ak.shape[0] else None
    return None if src is None or np.any(src == -2) else src


class PredictorStep:
    """``Ak @ X`` and the powers of ``Ak``: by row copies and index arrays where ``Ak`` is a shift
    (:func:`shift_rows`), else by dense products."""

    def __init__(self, Ak: np.ndarray | None, src=False, runs=None):
        self.Ak, self.src = Ak, shift_rows(Ak) if src is False else src
        n = self.src.size if self.src is not None else Ak.shape[0]  # a shift does not need Ak itself
        self._power = np.arange(n) if self.src is not None else np.eye(n)  # Ak^0
        self._runs = None if self.src is None else runs if runs is not None else _runs(self.src)

    @classmethod
    def of(cls, model) -> "PredictorStep":
        """For ``model``'s ``A − K C``; whether it is a shift is found once per model (its arrays are read-only copies,
        so the answer is kept on it, as its poles are), and a shift found before is applied without forming
        ``A − K C`` again (two ``n × n`` temporaries per call: 0.1-0.2 s at 2,297 states)."""
        src = model.__dict__.get("_shift_rows", False)
        if src is not False and src is not None:
            return cls(None, src, model.__dict__.get("_shift_runs"))
        Ak = model.A - model.K @ model.C
        if src is False:
            src = shift_rows(Ak)
            object.__setattr__(model, "_shift_rows", src)
            object.__setattr__(model, "_shift_runs", None if src is None else _runs(src))
        return cls(Ak, src, model.__dict__.get("_shift_runs"))

    def __call__(self, X: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``Ak @ X`` (into ``out``, of that shape and not ``X``'s memory, where given). A shift is applied as slice
        copies of its runs of consecutive rows (no gathered temporary of ``X``'s size), its zero rows zeroed."""
        if self.src is None:
            return self.Ak @ X if out is None else np.matmul(self.Ak, X, out=out)
        out = np.empty((self.src.size,) + X.shape[1:]) if out is None else out
        for a, b, c in self._runs:
            if c < 0:
                out[a:b] = 0.0
            else:
                out[a:b] = X[c:c + b - a]
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


def _runs(src: np.ndarray) -> list:
    """``src`` (a shift's source row of each row, −1 for a zero row) as runs ``(a, b, c)``: rows ``[a, b)`` copy
    rows ``[c, c + b − a)``, or are zero where ``c`` is −1."""
    n = src.size
    if n == 0:
        return []
    zero = src < 0
    starts = np.ones(n, dtype=bool)  # row i begins a run
    starts[1:] = np.where(zero[1:], ~zero[:-1], zero[:-1] | (src[1:] != src[:-1] + 1))
    a = np.flatnonzero(starts)
    return [(int(i), int(j), int(src[i]) if src[i] >= 0 else -1) for i, j in zip(a, np.r_[a[1:], n])]


def unit_window_run(model, n_past: int):
    """``(x, resid)``: the innovation predictor of ``model`` run over every unit window of ``n_past`` samples at once
    (column ``k`` for the window that is 1 at entry ``k`` of ``[vec u; vec y]``, time-major), from a zero state:
    the state after the window (``n × n_past (m + p)``) and the innovations (``n_past × p × n_past (m + p)``).

    Sample ``t`` of the unit windows is one column block of the identity for ``u`` and one for ``y``, so the
    products with it (``Bk U_t``, ``K Y_t``, ``D U_t``) are those matrices placed in the blocks' columns, added in
    place: the sums of the products with the identity, term for term, without ``n × n_past (m + p)`` products and
    temporaries at every sample; the state is stepped between two buffers (:meth:`PredictorStep.__call__`)."""
    m, p, n = model.n_inputs, model.n_outputs, model.n_states
    step, Bk = PredictorStep.of(model), model.B - model.K @ model.D
    x, spare = np.zeros((n, n_past * (m + p))), np.empty((n, n_past * (m + p)))
    resid = np.empty((n_past, p, x.shape[1]))
    for t in range(n_past):
        u, y = slice(t * m, (t + 1) * m), slice(n_past * m + t * p, n_past * m + (t + 1) * p)
        r = np.matmul(model.C, x, out=resid[t])  # y_t − (C x + D u_t)
        r[:, u] += model.D
        np.negative(r, out=r)
        r[:, y] += np.eye(p)
        x, spare = step(x, out=spare), x  # x ← Ak x + Bk u_t + K y_t
        x[:, u] += Bk
        x[:, y] += model.K
    return x, resid
