"""Held-out errors of a ridge grid scored one strength at a time, two strengths at once (large Grams).

For a training Gram ``[G11 G12; G21 G22]`` and a strength ``s``, ``K = G11 + s I = L Lᵀ`` (Cholesky) and
``Θ = G21 K⁻¹``. With ``W = L⁻¹ G12 Ω``, ``Y = L⁻ᵀ W = (Ω Θ)ᵀ`` and the total Gram's Cholesky factor
``F = [Ct 0; L21 L22]`` (the validation Gram is the total minus the training Gram), ``Z = Ctᵀ Y``:

    error(s) = tr(Ω (G22v − 2 Θ G12v + Θ G11v Θᵀ) Ω)
             = c0 + ||Z − L21ᵀ Ω||² − ||L21ᵀ Ω||² + ||W||² + s ||Y||²,   c0 = tr(Ω G22v Ω)

(from ``G12v = Ct L21ᵀ − G12``, ``G11v = Ct Ctᵀ − K + s I`` and ``Yᵀ K Y = Wᵀ W``). Per strength: one Cholesky
factor (``n³/3`` flops), two triangular solves and one triangular product with ``pN`` right-hand sides
(``n² pN`` each). Against one eigendecomposition per fold for the whole grid this is about the same CPU at
``n`` = 2,450, ``pN`` = 1,000 and 9 strengths (5 % more, measured on the fit's folds at load ~10), but it comes in
independent pieces: two strengths run side by side on the machine's two cores, each with one BLAS thread (so
nothing spins on a busy machine), while the eigenvalue routine runs on one core only (its tridiagonal reduction is
memory-bound matrix-vector work); two folds' eigendecompositions side by side need 100 MB more memory there
(``_eigen_folds``, taken on mid-sized Grams).
Memory: the training Gram's assembled rows (Fortran-ordered), worked on in place, one more ``n × n`` array for the
second worker and one ``n × RHS_BLOCK`` block of right-hand sides per worker (:func:`strength_errors`).

The LAPACK/BLAS calls go through SciPy's exported C functions (``scipy.linalg.cython_lapack`` /
``cython_blas``) called by ``ctypes``, which releases the GIL while they run (SciPy's f2py wrappers of
``potrf``/``trsm``/``trmm`` keep it held for most of the call: measured here, a Python thread beside them got
0.15–0.25 of their CPU, against 1.0 beside ``numpy.matmul``). Where the pointers cannot be had, the f2py wrappers
are used: the same numbers, one strength at a time in effect.

References
----------
Golub G.H., Van Loan C.F. (2013), Matrix Computations, 4th ed., sections 4.2 (Cholesky) and 3.1 (triangular
systems). Hoerl A.E., Kennard R.W. (1970), Ridge regression, Technometrics 12:55.
"""

from __future__ import annotations

import ctypes
import queue
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy.linalg import blas, lapack

from .._lapack_nogil import _DPOTRF as _POTRF
from .._lapack_nogil import _DBL, _DTRMM, _DTRSM, _INT, int_ref, scipy_c_function

__all__: list = []

_TRIANGULAR = {"dtrsm": _DTRSM, "dtrmm": _DTRMM}  # the lookups of _lapack_nogil (one per process)
_DDOT = scipy_c_function("blas", "ddot", _INT, _DBL, _INT, _DBL, _INT)
if _DDOT is not None:
    _DDOT.restype = ctypes.c_double  # (the constructor above declares the arguments; ddot returns a double)


def nogil_available() -> bool:
    """Whether the kernels release the GIL (the ``ctypes`` route was found)."""
    return _POTRF is not None and _DDOT is not None and all(f is not None for f in _TRIANGULAR.values())


def _sum_of_squares(W: np.ndarray) -> float:
    """``||W||_F²`` of a Fortran-contiguous array (BLAS ``ddot``, the GIL released: the workers hold it only
    between calls, so a worker descheduled on a busy machine does not stall the other)."""
    if not nogil_available():  # pragma: no cover - other SciPy builds
        return float(np.einsum("ij,ij->", W, W))
    x = W.ctypes.data_as(_DBL)
    return float(_DDOT(int_ref(W.size), x, int_ref(1), x, int_ref(1)))


def _potrf_lower(K: np.ndarray, n: int | None = None) -> int:
    """Lower Cholesky factor of ``K[:n, :n]`` in place (``K`` Fortran-ordered, possibly with more rows: its
    leading dimension is ``K.shape[0]``; the strict upper triangle is not touched)."""
    n = K.shape[1] if n is None else n
    if not nogil_available():  # pragma: no cover - other SciPy builds
        c, info = lapack.dpotrf(K[:n, :n], lower=1, clean=0)
        K[:n, :n] = c
        return int(info)
    info = ctypes.c_int(0)
    _POTRF(b"L", int_ref(n), K.ctypes.data_as(_DBL), int_ref(K.shape[0]), ctypes.byref(info))
    return int(info.value)


def _triangular(name: str, T: np.ndarray, n: int, B: np.ndarray, trans: bool) -> None:
    """``B ← op(T[:n, :n]) ⁻¹ B`` (``dtrsm``) or ``B ← op(T[:n, :n]) B`` (``dtrmm``) in place, ``T`` lower
    triangular (only its lower triangle is read; ``T`` may be the leading block of a larger Fortran array),
    ``op`` the transpose when ``trans``; ``B`` Fortran-ordered ``n × k``."""
    if not nogil_available():  # pragma: no cover - other SciPy builds
        f = blas.dtrsm if name == "dtrsm" else blas.dtrmm
        B[...] = f(1.0, T[:n, :n], B, lower=1, trans_a=int(trans))
        return
    one = ctypes.c_double(1.0)
    _TRIANGULAR[name](b"L", b"L", b"T" if trans else b"N", b"N", int_ref(n), int_ref(B.shape[1]), ctypes.byref(one),
                      T.ctypes.data_as(_DBL), int_ref(T.shape[0]), B.ctypes.data_as(_DBL), int_ref(n))


def _restore_lower(K: np.ndarray, diagonal: np.ndarray, block: int = 256, source: np.ndarray | None = None) -> None:
    """Write the symmetric matrix held in the strict upper triangle of ``source`` (default ``K`` itself; ``potrf``,
    ``trsm`` and ``trmm`` with the lower triangle never touch it) into ``K``'s lower one, and ``diagonal`` onto the
    diagonal, by block columns (``K`` and ``source`` ``n × n``, or views of that block of a larger array)."""
    n = K.shape[1]
    S = K if source is None else source
    for j0 in range(0, n, block):
        j1 = min(j0 + block, n)
        D, E = K[j0:j1, j0:j1], S[j0:j1, j0:j1]
        D[np.tril_indices(j1 - j0, -1)] = E.T[np.tril_indices(j1 - j0, -1)]
        K[j1:n, j0:j1] = S[j0:j1, j1:n].T
    K[np.diag_indices(n)] = diagonal


def strength_errors(Gt: np.ndarray, F: np.ndarray, strengths, c0: float, weights, workers: int = 2):
    """Weighted held-out squared errors at each absolute strength (module docstring), ``workers`` at a time.

    Parameters
    ----------
    Gt : ndarray, shape (n, n + pN), Fortran order
        The training Gram's first ``n`` rows ``[G11 G12]`` (``gram_rows(..., fortran=True)``). The first worker
        factors in place of its ``G11`` (whose strict upper triangle keeps ``G11`` for every strength: its lower
        triangle and diagonal are overwritten), the others in one ``n × n`` array each; ``G12 Ω`` is formed a
        block of :data:`RHS_BLOCK` columns at a time.
    F : ndarray, Fortran order
        The total Gram's lower Cholesky factor in its lower triangle (``n + pN`` rows at least; what lies above
        the diagonal is not read).
    strengths : sequence of float
    c0 : float
        ``tr(Ω G22v Ω)`` of the validation fold.

    Returns
    -------
    ndarray, or None where some ``G11 + s I`` is not positive definite (the caller takes the eigen route).

    Memory: ``Gt`` and ``F`` (the caller's), ``workers − 1`` arrays of ``n × n`` and ``workers`` of
    ``n × RHS_BLOCK``: no copy of ``G11`` for the first worker, of ``G12 Ω`` or of ``L21ᵀ Ω`` (issue 14: beside
    ``F``, 136 MB of arrays at past 100 / horizon 50, the rows 68, the second factor 48 and the right-hand sides
    2 × 10, instead of 174 with those copies and whole blocks of right-hand sides). The sums of squares are taken a
    block at a time, so the errors agree with sums over whole arrays to rounding (2.1e-13 relative at past 100 /
    horizon 50; ``tests/sysid/test_gram_total.py``).
    """
    if not (Gt.flags.f_contiguous and F.flags.f_contiguous):
        raise ValueError("strength_errors needs the Fortran-ordered rows [G11 G12] and a Fortran-ordered F")
    grid = _Grid(Gt, F, c0, weights, max(1, int(workers)))
    strengths = [float(s) for s in strengths]
    paired = strengths[: len(strengths) - len(strengths) % 2]  # the odd one: on both workers (the same numbers)
    if workers > 1 and nogil_available():
        with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="stimsteer-ridge-grid") as pool:
            out = list(pool.map(grid.whole, paired))
            out += [grid.split(s, pool) for s in strengths[len(paired):]]
    else:
        out = [grid.whole(s) for s in paired] + [grid.split(s, None) for s in strengths[len(paired):]]
    return None if any(e is None for e in out) else np.asarray(out)


#: Right-hand sides (columns of ``G12 Ω``) solved at a time by a worker: measured at ``n`` = 2,450, ``pN`` = 1,000,
#: 9 strengths on two workers (CPU of the grid, issue 14), 4.7-4.8 s at 512 and at 1,000 (whole), 4.9-5.0 at 256.
RHS_BLOCK = 512
#: Columns of ``L21ᵀ Ω`` formed at a time (subtracted from ``Z``).
_SUB_BLOCK = 64


def base_term(F: np.ndarray, n: int, pN: int, weights: np.ndarray) -> float:
    """``||L21ᵀ Ω||²`` from the total's factor ``F`` (the same for every fold)."""
    L21w = np.asfortranarray(F[n:n + pN, :n].T * weights[None, :])  # L21ᵀ Ω (the subtraction forms it by blocks)
    return float(np.einsum("ij,ij->", L21w, L21w))


def gram_scale(fold) -> float:
    """``tr(G) / n_rows`` of the fold's Gram ``G`` from its diagonal: the data scale of the relative strengths."""
    return float(fold.gram_diagonal().sum()) / fold.n_rows


def held_out_constant(val, n_b: int, weights: np.ndarray) -> float:
    """``c0 = tr(Ω G22v Ω)`` of the validation fold ``val`` (module docstring), from its Gram's diagonal."""
    return float(np.sum(weights ** 2 * val.gram_diagonal()[n_b:]))


def rhs_block(n: int, pN: int) -> np.ndarray:
    """A worker's block of :data:`RHS_BLOCK` right-hand sides (``n`` rows, Fortran-ordered)."""
    return np.empty((n, min(RHS_BLOCK, max(pN, 1))), order="F")


class _Grid:
    """The arrays of :func:`strength_errors` and its two ways of scoring one strength."""

    def __init__(self, Gt, F, c0, weights, workers, base=None):
        self.n, self.Gt, self.F, self.c0 = Gt.shape[0], Gt, F, float(c0)
        self.pN = Gt.shape[1] - self.n
        self.weights = np.asarray(weights, dtype=np.float64)
        self.G11, self.G12 = Gt[:, :self.n], Gt[:, self.n:]  # Fortran-contiguous blocks
        self.diagonal = np.diagonal(self.G11).copy()
        self.base = base_term(F, self.n, self.pN, self.weights) if base is None else base
        self.free = queue.SimpleQueue()
        # each worker's arrays, made here: no large allocation on the worker threads (none: the caller's own)
        for k in range(workers):
            K = self.G11 if k == 0 else np.empty((self.n, self.n), order="F")
            self.free.put((K, rhs_block(self.n, self.pN)))

    def _factor(self, K: np.ndarray, s: float) -> bool:
        _restore_lower(K, self.diagonal + s, source=self.G11)
        return _potrf_lower(K, self.n) == 0

    def _columns(self, K, W, cols: range) -> tuple[float, float, float]:
        """``||W||², ||Y||², ||Z − L21ᵀΩ||²`` over the right-hand sides ``cols``, :data:`RHS_BLOCK` at a time in
        ``W``."""
        ww = yy = zz = 0.0
        n, w = self.n, self.weights
        for k0 in range(cols.start, cols.stop, W.shape[1]):
            k1 = min(k0 + W.shape[1], cols.stop)
            Wc = W[:, :k1 - k0]
            np.multiply(self.G12[:, k0:k1], w[None, k0:k1], out=Wc)  # G12 Ω
            _triangular("dtrsm", K, n, Wc, trans=False)  # L⁻¹ G12 Ω
            ww += _sum_of_squares(Wc)
            _triangular("dtrsm", K, n, Wc, trans=True)  # Y = K⁻¹ G12 Ω
            yy += _sum_of_squares(Wc)
            _triangular("dtrmm", self.F, n, Wc, trans=True)  # Z = Ctᵀ Y
            for j0 in range(k0, k1, _SUB_BLOCK):
                j1 = min(j0 + _SUB_BLOCK, k1)
                Wc[:, j0 - k0:j1 - k0] -= self.F[n + j0:n + j1, :n].T * w[None, j0:j1]  # L21ᵀ Ω
            zz += _sum_of_squares(Wc)
        return ww, yy, zz

    def _error(self, s: float, parts) -> float:
        ww, yy, zz = (sum(v) for v in zip(*parts))
        return self.c0 + zz - self.base + ww + s * yy

    def whole(self, s: float) -> float | None:
        """One strength on one worker."""
        K, W = self.free.get()
        try:
            return self.score(K, W, s)
        finally:
            self.free.put((K, W))

    def score(self, K, W, s: float) -> float | None:
        """One strength in the arrays ``K`` (``n × n`` at least, Fortran-ordered) and ``W``
        (:func:`rhs_block`)."""
        return self._error(s, [self._columns(K, W, range(self.pN))]) if self._factor(K, s) else None

    def halves(self) -> tuple[range, range]:
        """The right-hand sides of the two halves of a split strength (:meth:`split`)."""
        return range(0, self.pN // 2), range(self.pN // 2, self.pN)

    def split(self, s: float, pool) -> float | None:
        """One strength on two workers: one factor, the right-hand sides in halves side by side (the odd strength
        of a grid; the same numbers with or without ``pool``)."""
        K, W = self.free.get()
        other = self.free.get_nowait() if not self.free.empty() else None
        try:
            if not self._factor(K, s):
                return None
            first, second = self.halves()
            W2 = W if other is None or pool is None else other[1]
            if W2 is W:
                return self._error(s, [self._columns(K, W, first), self._columns(K, W, second)])
            done = pool.submit(self._columns, K, W2, second)
            return self._error(s, [self._columns(K, W, first), done.result()])
        finally:
            self.free.put((K, W))
            if other is not None:
                self.free.put(other)
