"""The left singular pairs of a wide matrix as :meth:`~.factor._FactorProjection.decompose` takes them (the ``R`` of
a QR of its transpose, then the SVD of ``Rᵀ``), inside a workspace the caller hands over, with the GIL released.

The same LAPACK calls as before, with the same workspace sizes (each routine's own optimal size, as SciPy's
``qr`` and NumPy's ``svd`` query it), so the same numbers bit for bit: ``dgeqrf`` on the transposed matrix (SciPy's
``scipy.linalg.qr(mode="r")``) and ``dgesdd("S")`` on ``Rᵀ`` (NumPy's ``svd(full_matrices=False)``; checked equal
in ``tests/sysid/test_subspace_speed_buffers.py``). What changes is where the memory comes from: the caller's
workspace (the projection's Gram buffer, dead once its factor's pieces are taken: :func:`work_size` items) instead
of fresh arrays of that size per call, whose first touch costs page faults, and the calls run through SciPy's
exported C functions
(:func:`stimsteer.sysid._lapack_nogil.scipy_c_function`), so the other pipeline's Python work proceeds meanwhile.
Where those functions cannot be had, SciPy's ``qr`` and NumPy's ``svd`` are called as before.
"""

from __future__ import annotations

import ctypes

import numpy as np
import scipy.linalg as sla

from .._lapack_nogil import _DBL, _INT, scipy_c_function

__all__ = ["left_singular_pairs", "work_size"]

_CHR = ctypes.c_char_p
# m, n, a, lda, tau, work, lwork, info
_DGEQRF = scipy_c_function("lapack", "dgeqrf", _INT, _INT, _DBL, _INT, _DBL, _DBL, _INT, _INT)
# jobz, m, n, a, lda, s, u, ldu, vt, ldvt, work, lwork, iwork, info
_DGESDD = scipy_c_function("lapack", "dgesdd", _CHR, _INT, _INT, _DBL, _INT, _DBL, _DBL, _INT, _DBL, _INT, _DBL,
                           _INT, _INT, _INT)


def _i(v: int):
    return ctypes.byref(ctypes.c_int(int(v)))


def _p(a: np.ndarray):
    return a.ctypes.data_as(_DBL)


def _reference(mat: np.ndarray):
    """The calls of before (SciPy's ``qr``, NumPy's ``svd``)."""
    R = sla.qr(mat.T, mode="r", check_finite=False)[0][:mat.shape[0]].T
    U, sv, _ = np.linalg.svd(R, full_matrices=False)
    return U, sv


def _query_qr(nc: int, k: int) -> int:
    w, info = np.empty(1), ctypes.c_int(0)
    _DGEQRF(_i(nc), _i(k), None, _i(nc), None, _p(w), _i(-1), ctypes.byref(info))
    return max(1, int(w[0]))


def _query_svd(k: int, iwork: np.ndarray) -> int:
    w, info = np.empty(1), ctypes.c_int(0)
    _DGESDD(b"S", _i(k), _i(k), None, _i(k), None, None, _i(k), None, _i(k), _p(w), _i(-1),
            iwork.ctypes.data_as(_INT), ctypes.byref(info))
    return max(1, int(w[0]))


def _lower_from_qr(T: np.ndarray, A: np.ndarray, k: int, band: int = 256) -> None:
    """``T = triu(R)`` (C order, so ``T.T`` is ``Rᵀ`` in Fortran order) from the first ``k`` rows of the in-place
    QR ``A.T`` (``R[i, j] = A[j, i]``), a band of rows at a time."""
    for a in range(0, k, band):
        b = min(k, a + band)
        T[a:b] = A[:k, a:b].T
        T[a:b, :a] = 0.0
        T[a:b, a:b][np.tril_indices(b - a, -1)] = 0.0


def work_size(k: int, nc: int) -> int:
    """The float64 items :func:`left_singular_pairs` computes in for a ``k × nc`` matrix (0 where SciPy's exported
    functions cannot be had)."""
    if _DGEQRF is None or _DGESDD is None:  # pragma: no cover - other SciPy builds
        return 0
    lq, ls = _query_qr(nc, k), _query_svd(k, np.empty(8 * k, dtype=np.intc))
    return max(k * nc + k + lq, 2 * k * k + ls) + k * k  # [A tau work_qr | .. T], then [U VT work_svd | .. T]


def left_singular_pairs(mat: np.ndarray, work: np.ndarray | None = None):
    """``(U, s)`` of the wide ``mat`` (``k × nc``, ``nc > k``): the left singular vectors (C order, ``k × k``) and
    values of ``Rᵀ`` for the ``R`` of a QR of ``matᵀ``, as ``np.linalg.svd(sla.qr(mat.T, mode="r")[0][:k].T)``.
    ``work``: a flat float64 array to compute in (overwritten; any size: what does not fit is allocated)."""
    k, nc = mat.shape
    if _DGEQRF is None or _DGESDD is None:  # pragma: no cover - other SciPy builds
        return _reference(mat)
    iwork = np.empty(8 * k, dtype=np.intc)
    need = work_size(k, nc)
    ws = work if work is not None and work.size >= need else np.empty(need)
    lq, ls = _query_qr(nc, k), _query_svd(k, iwork)
    info = ctypes.c_int(0)
    A = ws[:k * nc].reshape(k, nc)
    A[...] = mat  # A.T: matᵀ in Fortran order (leading dimension nc)
    tau, wq = ws[k * nc:k * nc + k], ws[k * nc + k:k * nc + k + lq]
    _DGEQRF(_i(nc), _i(k), _p(A), _i(nc), _p(tau), _p(wq), _i(lq), ctypes.byref(info))
    T = ws[need - k * k:need].reshape(k, k)
    _lower_from_qr(T, A, k)
    UF, VT, wd = (ws[:k * k], ws[k * k:2 * k * k], ws[2 * k * k:2 * k * k + ls])
    s = np.empty(k)
    _DGESDD(b"S", _i(k), _i(k), _p(T), _i(k), _p(s), _p(UF), _i(k), _p(VT), _i(k), _p(wd), _i(ls),
            iwork.ctypes.data_as(_INT), ctypes.byref(info))
    if info.value != 0:
        raise np.linalg.LinAlgError("SVD did not converge")
    return np.ascontiguousarray(UF.reshape(k, k).T), s
