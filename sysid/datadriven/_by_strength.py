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
Memory: one ``n × n`` and one ``n × pN`` array per strength in flight.

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

from .._lapack_nogil import scipy_c_function

__all__: list = []

_INT = ctypes.POINTER(ctypes.c_int)
_DBL = ctypes.POINTER(ctypes.c_double)
_CHR = ctypes.c_char_p


_POTRF = scipy_c_function("lapack", "dpotrf", _CHR, _INT, _DBL, _INT, _INT)
_TRIANGULAR = {name: scipy_c_function("blas", name, _CHR, _CHR, _CHR, _CHR, _INT, _INT, _DBL, _DBL, _INT, _DBL, _INT)
               for name in ("dtrsm", "dtrmm")}
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
    return float(_DDOT(_ref(W.size), x, _ref(1), x, _ref(1)))


def _ref(value: int):
    return ctypes.byref(ctypes.c_int(value))


def _potrf_lower(K: np.ndarray) -> int:
    """Lower Cholesky factor of the Fortran-ordered ``K`` in place (its strict upper triangle is not touched)."""
    if not nogil_available():  # pragma: no cover - other SciPy builds
        _c, info = lapack.dpotrf(K, lower=1, overwrite_a=1, clean=0)
        return int(info)
    info = ctypes.c_int(0)
    _POTRF(b"L", _ref(K.shape[0]), K.ctypes.data_as(_DBL), _ref(K.shape[0]), ctypes.byref(info))
    return int(info.value)


def _triangular(name: str, T: np.ndarray, n: int, B: np.ndarray, trans: bool) -> None:
    """``B ← op(T[:n, :n]) ⁻¹ B`` (``dtrsm``) or ``B ← op(T[:n, :n]) B`` (``dtrmm``) in place, ``T`` lower
    triangular (only its lower triangle is read; ``T`` may be the leading block of a larger Fortran array),
    ``op`` the transpose when ``trans``; ``B`` Fortran-ordered ``n × k``."""
    if not nogil_available():  # pragma: no cover - other SciPy builds
        f = blas.dtrsm if name == "dtrsm" else blas.dtrmm
        f(1.0, T[:n, :n], B, lower=1, trans_a=int(trans), overwrite_b=1)
        return
    one = ctypes.c_double(1.0)
    _TRIANGULAR[name](b"L", b"L", b"T" if trans else b"N", b"N", _ref(n), _ref(B.shape[1]), ctypes.byref(one),
                      T.ctypes.data_as(_DBL), _ref(T.shape[0]), B.ctypes.data_as(_DBL), _ref(n))


def _restore_lower(K: np.ndarray, diagonal: np.ndarray, block: int = 256) -> None:
    """Write the symmetric matrix held in ``K``'s strict upper triangle (which ``potrf``/``trsm``/``trmm`` with the
    lower triangle never touch) back into its lower one, and ``diagonal`` onto the diagonal, by block columns."""
    n = K.shape[0]
    for j0 in range(0, n, block):
        j1 = min(j0 + block, n)
        D = K[j0:j1, j0:j1]
        D[np.tril_indices(j1 - j0, -1)] = D.T[np.tril_indices(j1 - j0, -1)]
        K[j1:, j0:j1] = K[j0:j1, j1:].T
    K[np.diag_indices(n)] = diagonal


def strength_errors(Ks: list, G12w: np.ndarray, F: np.ndarray, strengths, c0: float, weights) -> np.ndarray | None:
    """Weighted held-out squared errors at each absolute strength (module docstring), ``len(Ks)`` at a time.

    Parameters
    ----------
    Ks : list of ndarray, shape (n, n), Fortran order
        One copy of the training Gram's regressor block ``G11`` per worker, overwritten (each is reused from one
        strength to the next: its strict upper triangle keeps ``G11``).
    G12w : ndarray, shape (n, pN), Fortran order
        ``G12 Ω`` of the training Gram (not modified).
    F : ndarray, Fortran order
        The total Gram's lower Cholesky factor in its lower triangle (``n + pN`` rows at least; what lies above
        the diagonal is not read).
    strengths : sequence of float
    c0 : float
        ``tr(Ω G22v Ω)`` of the validation fold.

    Returns
    -------
    ndarray, or None where some ``G11 + s I`` is not positive definite (the caller takes the eigen route).
    """
    if not (all(K.flags.f_contiguous for K in Ks) and G12w.flags.f_contiguous and F.flags.f_contiguous):
        raise ValueError("strength_errors needs Fortran-ordered G11 copies, G12w and F")
    grid = _Grid(Ks, G12w, F, c0, weights)
    strengths = [float(s) for s in strengths]
    paired = strengths[: len(strengths) - len(strengths) % 2]  # the odd one: on both workers (the same numbers)
    if len(Ks) > 1 and nogil_available():
        with ThreadPoolExecutor(max_workers=len(Ks), thread_name_prefix="stimsteer-ridge-grid") as pool:
            out = list(pool.map(grid.whole, paired))
            out += [grid.split(s, pool) for s in strengths[len(paired):]]
    else:
        out = [grid.whole(s) for s in paired] + [grid.split(s, None) for s in strengths[len(paired):]]
    return None if any(e is None for e in out) else np.asarray(out)


class _Grid:
    """The arrays of :func:`strength_errors` and its two ways of scoring one strength."""

    def __init__(self, Ks, G12w, F, c0, weights):
        self.n, self.G12w, self.F, self.c0 = G12w.shape[0], G12w, F, float(c0)
        self.diagonal = np.diagonal(Ks[0]).copy()
        self.L21w = np.asfortranarray(F[self.n:self.n + G12w.shape[1], :self.n].T * weights[None, :])  # L21ᵀ Ω
        self.base = float(np.einsum("ij,ij->", self.L21w, self.L21w))
        self.free = queue.SimpleQueue()
        for K in Ks:  # each worker's arrays, made here: no large allocation on the worker threads
            self.free.put((K, np.empty_like(G12w, order="F")))

    def _factor(self, K: np.ndarray, s: float) -> bool:
        _restore_lower(K, self.diagonal + s)
        return _potrf_lower(K) == 0

    def _columns(self, K, W, c: slice) -> tuple[float, float, float]:
        """``||W||², ||Y||², ||Z − L21ᵀΩ||²`` over the right-hand sides ``c``, in ``W[:, c]``."""
        Wc = W[:, c]
        np.copyto(Wc, self.G12w[:, c])
        _triangular("dtrsm", K, self.n, Wc, trans=False)  # L⁻¹ G12 Ω
        ww = _sum_of_squares(Wc)
        _triangular("dtrsm", K, self.n, Wc, trans=True)  # Y = K⁻¹ G12 Ω
        yy = _sum_of_squares(Wc)
        _triangular("dtrmm", self.F, self.n, Wc, trans=True)  # Z = Ctᵀ Y
        Wc -= self.L21w[:, c]
        return ww, yy, _sum_of_squares(Wc)

    def _error(self, s: float, parts) -> float:
        ww, yy, zz = (sum(v) for v in zip(*parts))
        return self.c0 + zz - self.base + ww + s * yy

    def whole(self, s: float) -> float | None:
        """One strength on one worker."""
        K, W = self.free.get()
        try:
            return self._error(s, [self._columns(K, W, slice(None))]) if self._factor(K, s) else None
        finally:
            self.free.put((K, W))

    def split(self, s: float, pool) -> float | None:
        """One strength on two workers: one factor, the right-hand sides in halves side by side (the odd strength
        of a grid; the same numbers with or without ``pool``)."""
        K, W = self.free.get()
        try:
            if not self._factor(K, s):
                return None
            pN = W.shape[1]
            first, second = slice(0, pN // 2), slice(pN // 2, pN)  # disjoint columns of the same W
            if pool is None:
                return self._error(s, [self._columns(K, W, first), self._columns(K, W, second)])
            other = pool.submit(self._columns, K, W, second)
            return self._error(s, [self._columns(K, W, first), other.result()])
        finally:
            self.free.put((K, W))
