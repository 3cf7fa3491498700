"""LAPACK's triangular-pentagonal QR (``dtpqrt``) called with the GIL released.

SciPy's f2py wrapper ``scipy.linalg.lapack.dtpqrt`` holds the GIL for the whole call (measured here: a pure-Python
thread beside a 4096 × 220 call ran at 11 % of its idle rate, against 64 % beside ``dgeqrf``, whose wrapper releases
it), so the workers of :func:`stimsteer.sysid.hankel.row_space_factor` took turns instead of running side by side
(1.00 core busy). SciPy exports the same LAPACK routine as a C function for Cython (``scipy.linalg.cython_lapack``,
a public API whose functions are in ``__pyx_capi__``); a ``ctypes.CFUNCTYPE`` call of that function releases the
GIL while LAPACK runs. Where the pointer cannot be had (another SciPy build), the f2py wrapper is used: the same
numbers, without the overlap.
"""

from __future__ import annotations

import ctypes

import numpy as np

__all__: list = []

_INT = ctypes.POINTER(ctypes.c_int)
_DBL = ctypes.POINTER(ctypes.c_double)


def scipy_c_function(module: str, name: str, *argtypes):
    """The ``ctypes`` function of SciPy's exported ``scipy.linalg.cython_<module>.<name>`` (``module`` is ``"blas"``
    or ``"lapack"``; SciPy's public C API for Cython), taking ``argtypes``; or None where it cannot be had (another
    SciPy build). Called through ctypes, the routine runs with the GIL released and takes any leading dimension."""
    try:
        if module == "blas":
            from scipy.linalg import cython_blas as exported
        else:
            from scipy.linalg import cython_lapack as exported
        capsule = exported.__pyx_capi__[name]
        api = ctypes.pythonapi
        api.PyCapsule_GetName.restype, api.PyCapsule_GetName.argtypes = ctypes.c_char_p, [ctypes.py_object]
        api.PyCapsule_GetPointer.restype = ctypes.c_void_p
        api.PyCapsule_GetPointer.argtypes = [ctypes.py_object, ctypes.c_char_p]
        address = api.PyCapsule_GetPointer(capsule, api.PyCapsule_GetName(capsule))
    except (ImportError, AttributeError, KeyError, ValueError, TypeError):  # pragma: no cover - other SciPy builds
        return None
    return ctypes.CFUNCTYPE(None, *argtypes)(address) if address else None


# m, n, l, nb, a, lda, b, ldb, t, ldt, work, info (LAPACK's reference argument order)
_DTPQRT = scipy_c_function("lapack", "dtpqrt", _INT, _INT, _INT, _INT, _DBL, _INT, _DBL, _INT, _DBL, _INT, _DBL,
                           _INT)


def tpqrt_nogil_available() -> bool:
    """Whether :func:`tpqrt_inplace` releases the GIL (the ctypes route was found)."""
    return _DTPQRT is not None


def tpqrt_inplace(R: np.ndarray, B: np.ndarray, l: int, nb: int) -> np.ndarray:
    """Fold the rows of ``B`` into the upper-triangular ``R``: afterwards ``triu(R)ᵀ triu(R)`` equals
    ``RᵀR + BᵀB`` (before), as LAPACK ``dtpqrt(M, N, L, NB, R, B)``.

    Parameters
    ----------
    R : ndarray, shape (n, n), float64, Fortran order
        Overwritten with the new factor (its strictly lower part is not referenced).
    B : ndarray, shape (k, n), float64, Fortran order
        Overwritten (Householder vectors); its last ``l`` rows are upper trapezoidal (``l = 0``: a full block,
        ``l = n``: upper triangular).
    l, nb : int
        LAPACK's ``L`` and block size (``1 <= nb <= n``).

    Returns
    -------
    R : the same array (from the wrapper's output on the fallback route).
    """
    k, n = B.shape
    if R.shape != (n, n) or not (R.flags.f_contiguous and B.flags.f_contiguous) \
            or R.dtype != np.float64 or B.dtype != np.float64:
        raise ValueError("tpqrt_inplace needs float64 Fortran-ordered R (n × n) and B (k × n)")
    if _DTPQRT is None:  # pragma: no cover - other SciPy builds
        from scipy.linalg import lapack

        R, _b, _t, info = lapack.dtpqrt(l, nb, R, B, overwrite_a=1, overwrite_b=1)
    else:
        T = np.empty((nb, n), order="F")
        work = np.empty(max(1, nb * n))
        ints = [ctypes.c_int(v) for v in (k, n, l, nb, max(1, n), max(1, k), nb, 0)]
        m_, n_, l_, nb_, lda, ldb, ldt, info_ = (ctypes.byref(v) for v in ints)
        _DTPQRT(m_, n_, l_, nb_, R.ctypes.data_as(_DBL), lda, B.ctypes.data_as(_DBL), ldb,
                T.ctypes.data_as(_DBL), ldt, work.ctypes.data_as(_DBL), info_)
        info = ints[7].value
    if info != 0:  # pragma: no cover - only for invalid arguments
        raise np.linalg.LinAlgError(f"LAPACK tpqrt failed (info={info})")
    return R


# ------------------------------------------------------------------------------------------------ Cholesky panels
_CHR = ctypes.c_char_p
_DPOTRF = scipy_c_function("lapack", "dpotrf", _CHR, _INT, _DBL, _INT, _INT)
_DPOCON = scipy_c_function("lapack", "dpocon", _CHR, _INT, _DBL, _INT, _DBL, _DBL, _DBL, _INT, _INT)
_DTRSM = scipy_c_function("blas", "dtrsm", _CHR, _CHR, _CHR, _CHR, _INT, _INT, _DBL, _DBL, _INT, _DBL, _INT)
_DTRMM = scipy_c_function("blas", "dtrmm", _CHR, _CHR, _CHR, _CHR, _INT, _INT, _DBL, _DBL, _INT, _DBL, _INT)


def strided_cholesky_calls():
    """GIL-free LAPACK/BLAS calls on column-major blocks of a larger array (any leading dimension), or None where
    SciPy's exported functions cannot be had. A namespace of four functions; ``A``, ``B`` are float64 arrays whose
    memory holds a column-major matrix with leading dimension ``ld`` starting at element ``offset``:

    * ``potrf(A, offset, n, ld) -> info``: lower Cholesky factor of the leading ``n × n`` block, in place;
    * ``pocon(A, offset, n, ld, norm) -> rcond``: its reciprocal 1-norm condition estimate (``norm = ||G||₁``);
    * ``trsm(A, a_off, n, lda, B, b_off, m, ldb, trans)``: ``B := B L⁻ᵀ`` (``trans``) or ``B L⁻¹``, ``B`` ``m × n``;
    * ``trmm(A, a_off, n, lda, B, b_off, m, ldb)``: ``B := B L``, ``L`` the lower triangle of ``A``'s block.
    """
    if None in (_DPOTRF, _DPOCON, _DTRSM, _DTRMM):  # pragma: no cover - other SciPy builds
        return None
    import types

    def ptr(X, offset):
        if X.dtype != np.float64:
            raise ValueError("float64 arrays only")
        return ctypes.cast(X.ctypes.data + 8 * int(offset), _DBL)

    def ints(*values):
        return [ctypes.byref(ctypes.c_int(int(v))) for v in values]

    def potrf(A, offset, n, ld):
        info = ctypes.c_int(0)
        n_, ld_ = ints(n, ld)
        _DPOTRF(b"L", n_, ptr(A, offset), ld_, ctypes.byref(info))
        return info.value

    def pocon(A, offset, n, ld, norm):
        rcond, info = ctypes.c_double(0.0), ctypes.c_int(0)
        work, iwork = np.empty(3 * max(n, 1)), np.empty(max(n, 1), dtype=np.intc)
        n_, ld_ = ints(n, ld)
        _DPOCON(b"L", n_, ptr(A, offset), ld_, ctypes.byref(ctypes.c_double(norm)), ctypes.byref(rcond),
                work.ctypes.data_as(_DBL), iwork.ctypes.data_as(_INT), ctypes.byref(info))
        return rcond.value if info.value == 0 else 0.0

    def trsm(A, a_off, n, lda, B, b_off, m, ldb, trans):
        m_, n_, lda_, ldb_ = ints(m, n, lda, ldb)
        _DTRSM(b"R", b"L", b"T" if trans else b"N", b"N", m_, n_, ctypes.byref(ctypes.c_double(1.0)),
               ptr(A, a_off), lda_, ptr(B, b_off), ldb_)

    def trmm(A, a_off, n, lda, B, b_off, m, ldb):
        m_, n_, lda_, ldb_ = ints(m, n, lda, ldb)
        _DTRMM(b"R", b"L", b"N", b"N", m_, n_, ctypes.byref(ctypes.c_double(1.0)), ptr(A, a_off), lda_,
               ptr(B, b_off), ldb_)

    return types.SimpleNamespace(potrf=potrf, pocon=pocon, trsm=trsm, trmm=trmm)
