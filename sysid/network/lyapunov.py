"""Infinite-horizon Gramians of stable discrete-time models, ``W = A W Aᵀ + Q``, at every model size.

Small models go to SciPy's :func:`scipy.linalg.solve_discrete_lyapunov` (its bilinear transform and Bartels-Stewart
solve, as before: the same numbers). From :data:`DOUBLING_STATES` states on, the sum ``W = Σ_k A^k Q (A^k)ᵀ`` is
taken by doubling (the squared Smith iteration: Smith 1968, "Matrix equation XA + BX = C", SIAM J. Appl. Math.
16(1); the reference is from memory): ``W ← W + M W Mᵀ``, ``M ← M²``, so after ``j`` steps ``W`` holds the first
``2^j`` terms. Each step is two dense products and half of a third (``M W Mᵀ`` is symmetric: its lower block
triangle is formed; until the sixteenth session three whole products, whose timings below were measured), and it
stops once a step's term is below rounding of ``W``
(about ``ρ(A)^(2^(j+1))`` of it: 10 steps at spectral radius 0.95, 17 at 0.9995). Measured on random stable models
of spectral radius 0.95 (``benchmarks/bench_lyapunov.py``, 2 cores): at 800 states SciPy 1.04 s, doubling 0.32 s;
at 1,600 states 12.5 s and 2.9 s; relative residuals ``|A W Aᵀ − W + Q| / |W|`` 9e-15 (SciPy) and 9e-16. A ridge
ARX at past 100 ms of 3 sites and 20 channels, realised on its lags, has 2,297 states (spectral radius 0.9995), and
``stimsteer network`` of it solved eight Gramians of that size: stopped unfinished after 300 s. Such a realisation's
``A`` is a shift plus ``p`` dense coefficient rows, and its powers ``A^(2^j)`` keep that form with ``2^j p`` dense
rows: the first doubling steps (six at 2,297 states and 20 channels) take their products in that form
(:class:`_Rows`), the rest densely; the pair of Gramians of that model 19.4 -> 13.6 s, equal to 5.6e-16 of the
largest entry. A companion form (``A``'s transpose in that form: the same model on its 2,000 output lags) is doubled
in the powers of ``Aᵀ``, each sum's side swapped: its pair 12.2 -> 8.4 s.
"""

from __future__ import annotations

import numpy as np

from .._shift import _runs, unit_rows

__all__ = ["DOUBLING_STATES", "stable_gramian", "stable_gramians", "stable_gramian_pair"]

#: States from which :func:`stable_gramian` sums by doubling instead of calling SciPy's solver.
DOUBLING_STATES = 512
#: Doubling steps at most (``2^64`` terms: a spectral radius within ``1e-16`` of 1 would need more; the callers
#: refuse unstable models first).
_MAX_STEPS = 64


def stable_gramian(A, Q) -> np.ndarray:
    """``W`` with ``W = A W Aᵀ + Q`` for a stable ``A`` (spectral radius below 1, checked by the callers), symmetric
    ``Q``: SciPy's solution as it returns it below :data:`DOUBLING_STATES` states, the doubled sum symmetrised from
    there on (:func:`_doubled`)."""
    A = np.asarray(A, dtype=np.float64)
    Q = np.asarray(Q, dtype=np.float64)
    if A.shape[0] < DOUBLING_STATES:
        import scipy.linalg as sla

        return sla.solve_discrete_lyapunov(A, Q)
    return _doubled(A, [(Q, False)])[0]


def stable_gramians(A, Qs) -> list:
    """:func:`stable_gramian` of ``A`` with each ``Q`` of ``Qs``; from :data:`DOUBLING_STATES` states on, the doubled
    sums share the powers ``A^(2^j)`` (each sum takes the same steps as alone: the same numbers)."""
    A = np.asarray(A, dtype=np.float64)
    if A.shape[0] < DOUBLING_STATES or len(Qs) < 2:
        return [stable_gramian(A, Q) for Q in Qs]
    return _doubled(A, [(np.asarray(Q, dtype=np.float64), False) for Q in Qs])


def stable_gramian_pair(A, Q, R) -> tuple[np.ndarray, np.ndarray]:
    """``(W, V)`` with ``W = A W Aᵀ + Q`` and ``V = Aᵀ V A + R`` (a controllability and an observability Gramian):
    :func:`stable_gramian` of each below :data:`DOUBLING_STATES` states; from there the two doubled sums share the
    powers ``M = A^(2^j)`` (``V``'s are their transposes): 8 ``n³`` flops a step for both instead of 10."""
    A = np.asarray(A, dtype=np.float64)
    if A.shape[0] < DOUBLING_STATES:
        return stable_gramian(A, Q), stable_gramian(A.T, R)
    W, V = _doubled(A, [(Q, False), (R, True)])
    return W, V


def _doubled(A: np.ndarray, sums) -> list:
    """The doubled sums ``G = Σ_k M_k Q M_kᵀ`` for each ``(Q, transposed)`` of ``sums`` (``M_k = A^k``, or its
    transpose), symmetrised: ``G ← G + M G Mᵀ``, ``M ← M²``, the powers shared. Each term is formed as ``X = M G``,
    then the lower block triangle of ``X Mᵀ`` (symmetric), mirrored (:func:`_symmetric_product`). A sum stops once
    its term is below rounding of it (or it is zero)."""
    G = [np.array(Q, dtype=np.float64) for Q, _t in sums]
    live = [True] * len(sums)
    M, eps = _Rows.of(A), np.finfo(np.float64).eps
    if M is None:  # a companion form: its transpose is a lag realisation's form, doubled as the powers of Aᵀ
        M = _Rows.of(A.T)
        sums = sums if M is None else [(Q, not transposed) for Q, transposed in sums]  # each sum's side flipped
    M = A.copy() if M is None else M
    for _ in range(_MAX_STEPS):
        for k, (_Q, transposed) in enumerate(sums):
            if live[k]:
                if isinstance(M, _Rows):
                    term = M.sandwich(G[k], transposed)
                else:
                    left = M.T if transposed else M
                    term = _symmetric_product(left @ G[k], left)
                G[k] += term
                live[k] = np.max(np.abs(term)) > eps * np.max(np.abs(G[k]))
        if not any(live):
            break
        M = M.squared() if isinstance(M, _Rows) else M @ M
    return [0.5 * (g + g.T) for g in G]


class _Rows:
    """A square matrix whose rows are unit rows (a single 1), zero rows or dense rows, with the unit rows' 1s in
    distinct columns: ``src[i]`` is the column of row ``i``'s 1, −1 for a zero row, −2 for a dense row (``D[k]`` the
    ``k``-th, in row order). A lag realisation's ``A`` is one (its shift plus ``p`` rows of coefficients), and so are
    its powers ``A^j`` up to ``j p`` dense rows: products with them cost ``O(k n²)`` for ``k`` dense rows instead of
    ``O(n³)``, the unit rows copied (their products' numbers exactly: one entry times 1, plus zeros). Kept while at
    most :data:`_ROWS_DENSE` of the rows are dense (:meth:`squared` returns the dense array after that)."""

    def __init__(self, src: np.ndarray, D: np.ndarray):
        self.src, self.D = src, D
        self.dense = np.flatnonzero(src == -2)
        # the unit rows as runs (a, b, c): rows [a, b) copy rows/columns [c, c + b − a) (slices, not gathers)
        self.runs = [r for r in _runs(np.where(src >= 0, src, -1)) if r[2] >= 0]

    @classmethod
    def of(cls, A: np.ndarray) -> "_Rows | None":
        """``A`` in this form, or None where more than :data:`_ROWS_DENSE` of its rows are dense or two unit rows
        copy the same column."""
        src = unit_rows(A)
        if src is None or np.count_nonzero(src == -2) > _ROWS_DENSE * A.shape[0]:
            return None
        return cls(src, A[src == -2].copy())

    def left(self, Y: np.ndarray) -> np.ndarray:
        """``M @ Y``."""
        out = np.empty((self.src.size,) + Y.shape[1:])
        out[self.src == -1] = 0.0
        for a, b, c in self.runs:
            out[a:b] = Y[c:c + b - a]
        out[self.dense] = self.D @ Y
        return out

    def tleft(self, Y: np.ndarray) -> np.ndarray:
        """``Mᵀ @ Y``."""
        out = self.D.T @ Y[self.dense]
        for a, b, c in self.runs:
            out[c:c + b - a] += Y[a:b]
        return out

    def sandwich(self, G: np.ndarray, transposed: bool) -> np.ndarray:
        """``M G Mᵀ`` (``Mᵀ G M`` when ``transposed``) for a symmetric ``G``, symmetrised (its lower triangle
        mirrored, as :func:`_symmetric_product` leaves it)."""
        apply = self.tleft if transposed else self.left
        return _mirror_lower(apply(apply(G).T), whole=True)  # (M (M G)ᵀ) = M G Mᵀ, G being symmetric

    def squared(self):
        """``M @ M``: in this form while it has at most :data:`_ROWS_DENSE` dense rows, else a dense array."""
        src = np.where(self.src >= 0, self.src[np.maximum(self.src, 0)], self.src)  # a unit row takes its source's
        dense = np.flatnonzero(src == -2)
        if dense.size > _ROWS_DENSE * src.size:
            return self.left(self.left(np.eye(src.size)))
        rows = np.empty((dense.size, src.size))
        # rows of M M: a dense row of M times M; a unit row of M is the row of M it copies (dense there too)
        own = np.isin(dense, self.dense)
        rows[own] = self.tleft(self.D.T).T
        copied = dense[~own]
        rows[~own] = self.D[np.searchsorted(self.dense, self.src[copied])]
        return _Rows(src, rows)


#: Largest share of dense rows for which :class:`_Rows` is kept: a product then costs at most about this share of
#: a dense one (twice, for the two sides of ``M G Mᵀ``, against the dense route's three halves).
_ROWS_DENSE = 0.5


def _symmetric_product(X: np.ndarray, M: np.ndarray, block: int = 384) -> np.ndarray:
    """``X Mᵀ`` where it is symmetric (``X = M G``, ``G`` symmetric): the lower block triangle by block rows (half
    the flops of the whole product), the upper one its transpose."""
    n = X.shape[0]
    out = np.empty((n, n))
    for i0 in range(0, n, block):
        i1 = min(i0 + block, n)
        out[i0:i1, :i1] = X[i0:i1] @ M[:i1].T
    return _mirror_lower(out, block)


def _mirror_lower(out: np.ndarray, block: int = 384, whole: bool = False) -> np.ndarray:
    """``out`` made exactly symmetric in place: the blocks above the block diagonal from those below (and, with
    ``whole``, the upper triangle of each diagonal block from its lower one, where those were computed too)."""
    n = out.shape[0]
    for i0 in range(0, n, block):
        i1 = min(i0 + block, n)
        if whole:
            out[i0:i1, i0:i1] = np.tril(out[i0:i1, i0:i1]) + np.tril(out[i0:i1, i0:i1], -1).T
        out[i0:i1, i1:] = out[i1:, i0:i1].T
    return out
