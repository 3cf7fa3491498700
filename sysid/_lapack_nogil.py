"""LAPACK/BLAS calls with the GIL released: ``dtpqrt`` (triangular-pentagonal QR), Cholesky panels, ``dsyevr``.

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
from numpy.lib.stride_tricks import as_strided

__all__: list = []

_INT = ctypes.POINTER(ctypes.c_int)
_DBL = ctypes.POINTER(ctypes.c_double)


def int_ref(value: int):
    """A by-reference C ``int`` argument (LAPACK/BLAS take every integer by pointer)."""
    return ctypes.byref(ctypes.c_int(int(value)))


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
# norm, m, n, a, lda, work: dlange returns the norm (the same C function, with its result type)
_DLANGE = scipy_c_function("lapack", "dlange", _CHR, _INT, _INT, _DBL, _INT, _DBL)
if _DLANGE is not None:
    _DLANGE = ctypes.CFUNCTYPE(ctypes.c_double, _CHR, _INT, _INT, _DBL, _INT, _DBL)(
        ctypes.cast(_DLANGE, ctypes.c_void_p).value)


def one_norm(A: np.ndarray) -> float:
    """``‖A‖₁`` (largest absolute column sum) of a float64 matrix, by LAPACK ``dlange`` in ``A``'s own memory: a
    column-major matrix (a Fortran array or a block of one) by ``dlange("1")``, a row-major one (C-ordered, or a
    block of one) by ``dlange("I")`` of its transpose, the same memory. Either way each column is summed in row
    order, so the same numbers give the same norm however they lie; no temporary (LAPACK's row sums take an
    ``n``-vector), and the GIL released where SciPy's exported function is found (SciPy's wrapper otherwise).
    Other layouts: NumPy's column sums.

    One function for every condition estimate's ``‖G‖₁`` (``pocon``): the Gram route's checks, the subspace
    route's Cholesky factors and its Riccati solver's. The Gram route's former row blocks, each a new array, made
    95 MB of new pages per norm of the 3,450-row Gram at past 100 / horizon 50 (the kernel cleared them at about
    1 GB/s on the 2-core benchmark machine: ``perf``, 0.06 s of CPU per Hankel predictor fit).
    """
    A = np.asarray(A)
    if A.ndim != 2 or A.dtype != np.float64:
        raise ValueError(f"one_norm takes a 2-D float64 matrix; got {A.ndim}-D {A.dtype}")
    m, n = A.shape
    if m == 0 or n == 0:
        return 0.0
    if A.strides[0] == 8 and A.strides[1] >= 8 * m:  # column-major: ‖A‖₁
        kind, rows, cols, ld, work = b"1", m, n, A.strides[1] // 8, None
    elif A.strides[1] == 8 and A.strides[0] >= 8 * n:  # row-major: Aᵀ is column-major, ‖A‖₁ = ‖Aᵀ‖∞
        kind, rows, cols, ld, work = b"I", n, m, A.strides[0] // 8, np.empty(n)
    else:
        return float(np.abs(A).sum(axis=0).max())
    if _DLANGE is None:  # pragma: no cover - other SciPy builds: SciPy's wrapper of the same routine
        import scipy.linalg as sla

        return float(sla.lapack.dlange(kind.decode(), A if kind == b"1" else A.T))
    return float(_DLANGE(kind, int_ref(rows), int_ref(cols), A.ctypes.data_as(_DBL), int_ref(ld),
                         None if work is None else work.ctypes.data_as(_DBL)))


_DPOTRF = scipy_c_function("lapack", "dpotrf", _CHR, _INT, _DBL, _INT, _INT)
_DPOCON = scipy_c_function("lapack", "dpocon", _CHR, _INT, _DBL, _INT, _DBL, _DBL, _DBL, _INT, _INT)
_DTRSM = scipy_c_function("blas", "dtrsm", _CHR, _CHR, _CHR, _CHR, _INT, _INT, _DBL, _DBL, _INT, _DBL, _INT)
_DTRMM = scipy_c_function("blas", "dtrmm", _CHR, _CHR, _CHR, _CHR, _INT, _INT, _DBL, _DBL, _INT, _DBL, _INT)


def column_major_ld(A: np.ndarray) -> int:
    """The leading dimension of the column-major float64 matrix ``A`` (a Fortran array or a block of one)."""
    if A.dtype != np.float64 or A.ndim != 2 or A.strides[0] != 8 or A.strides[1] < 8 * max(1, A.shape[0]):
        raise ValueError("a column-major float64 matrix (a Fortran array or a block of one) is needed")
    return A.strides[1] // 8


def _refs(*values):
    return [int_ref(v) for v in values]


def potrf_block(A: np.ndarray, uplo: str = "L") -> int:
    """The Cholesky factor of the square column-major ``A`` in its lower (``uplo="L"``: ``A = F Fᵀ``) or upper
    (``"U"``: ``A = Fᵀ F``) triangle, in place (the other triangle kept); LAPACK's ``info`` (0: done)."""
    ld = column_major_ld(A)
    if _DPOTRF is None:  # pragma: no cover - other SciPy builds
        import scipy.linalg as sla

        _c, info = sla.lapack.dpotrf(A, lower=int(uplo == "L"), clean=0, overwrite_a=1)
        return int(info)
    info = ctypes.c_int(0)
    n, lda = _refs(A.shape[0], ld)
    _DPOTRF(uplo.encode(), n, A.ctypes.data_as(_DBL), lda, ctypes.byref(info))
    return int(info.value)


def pocon_block(F: np.ndarray, norm: float, uplo: str = "L") -> float:
    """The reciprocal 1-norm condition estimate of ``F Fᵀ`` from its lower factor ``F`` (``uplo="U"``: of ``Fᵀ F``
    from its upper factor; ``norm`` its 1-norm); 0 on a LAPACK error."""
    ld = column_major_ld(F)
    if _DPOCON is None:  # pragma: no cover - other SciPy builds
        import scipy.linalg as sla

        rcond, info = sla.lapack.dpocon(F, norm, uplo=uplo)
        return float(rcond) if info == 0 else 0.0
    n_ = F.shape[0]
    rcond, info = ctypes.c_double(0.0), ctypes.c_int(0)
    work, iwork = np.empty(3 * max(n_, 1)), np.empty(max(n_, 1), dtype=np.intc)
    n, lda = _refs(n_, ld)
    _DPOCON(uplo.encode(), n, F.ctypes.data_as(_DBL), lda, ctypes.byref(ctypes.c_double(norm)), ctypes.byref(rcond),
            work.ctypes.data_as(_DBL), iwork.ctypes.data_as(_INT), ctypes.byref(info))
    return float(rcond.value) if info.value == 0 else 0.0


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

    def block(A, offset, n, ld):  # the n × n column-major block at element ``offset`` (leading dimension ld)
        if not (A.flags.c_contiguous or A.flags.f_contiguous):
            raise ValueError("a contiguous array is needed")
        return as_strided(A.ravel(order="K")[int(offset):], shape=(int(n), int(n)), strides=(8, 8 * int(ld)))

    def potrf(A, offset, n, ld):
        return potrf_block(block(A, offset, n, ld))

    def pocon(A, offset, n, ld, norm):
        return pocon_block(block(A, offset, n, ld), norm)

    def trsm(A, a_off, n, lda, B, b_off, m, ldb, trans):
        m_, n_, lda_, ldb_ = _refs(m, n, lda, ldb)
        _DTRSM(b"R", b"L", b"T" if trans else b"N", b"N", m_, n_, ctypes.byref(ctypes.c_double(1.0)),
               ptr(A, a_off), lda_, ptr(B, b_off), ldb_)

    def trmm(A, a_off, n, lda, B, b_off, m, ldb):
        m_, n_, lda_, ldb_ = _refs(m, n, lda, ldb)
        _DTRMM(b"R", b"L", b"N", b"N", m_, n_, ctypes.byref(ctypes.c_double(1.0)), ptr(A, a_off), lda_,
               ptr(B, b_off), ldb_)

    return types.SimpleNamespace(potrf=potrf, pocon=pocon, trsm=trsm, trmm=trmm)


# ------------------------------------------------------------------------------------------------ eigenvectors
# jobz, range, uplo, n, a, lda, vl, vu, il, iu, abstol, m, w, z, ldz, isuppz, work, lwork, iwork, liwork, info
_DSYEVR = scipy_c_function("lapack", "dsyevr", _CHR, _CHR, _CHR, _INT, _DBL, _INT, _DBL, _DBL, _INT, _INT, _DBL,
                           _INT, _DBL, _DBL, _INT, _INT, _DBL, _INT, _INT, _INT, _INT)


def eigh_nogil_available() -> bool:
    """Whether :func:`eigh_lower` and :func:`trmm_lower_t` release the GIL (SciPy's exported functions found)."""
    return _DSYEVR is not None and _DTRMM is not None


def eigh_lower(A: np.ndarray, n: int, ld: int, count: int | None = None):
    """Eigenvalues (ascending) and eigenvectors of the symmetric matrix in the lower triangle of the leading
    ``n × n`` column-major block of ``A``'s memory (leading dimension ``ld``), by LAPACK ``dsyevr`` (MRRR), the
    GIL released. ``A``'s block is destroyed (the rest of its memory is not touched).

    MRRR rather than divide and conquer (``dsyevd``, SciPy's ``driver="evd"``): the same CPU here (2.94 against
    2.79 s at ``n`` = 2,450, one thread, 75 % of either in the shared tridiagonal reduction) with ``O(n)``
    workspace instead of ``2n²`` (96 MB at that size), so two of them fit side by side in the memory target.

    With ``count``, only the ``count`` largest eigenvalues and their vectors (``dsyevr`` for an index range).

    Returns
    -------
    d : ndarray, shape (n,) or (count,)
    V : ndarray, shape (n, n) or (n, count), Fortran order
    or None where LAPACK reports a failure (``info != 0``).
    """
    if A.dtype != np.float64 or not (A.flags.c_contiguous or A.flags.f_contiguous) or A.size < (n - 1) * ld + n:
        raise ValueError("eigh_lower needs a contiguous float64 array holding an n × n block of leading dimension ld")
    k = n if count is None else int(count)
    d, V = np.empty(n), np.empty((n, k), order="F")
    isuppz, iwork = np.empty(2 * max(n, 1), dtype=np.intc), np.empty(10 * max(n, 1), dtype=np.intc)
    work = np.empty(64 * max(n, 1))  # >= 26 n, LAPACK's minimum; room for its blocked tridiagonal reduction
    found, info, zero = ctypes.c_int(0), ctypes.c_int(0), ctypes.c_double(0.0)
    how, il, iu = (b"A", 0, 0) if count is None else (b"I", n - k + 1, n)
    _DSYEVR(b"V", how, b"L", int_ref(n), A.ctypes.data_as(_DBL), int_ref(ld), ctypes.byref(zero),
            ctypes.byref(zero), int_ref(il), int_ref(iu), ctypes.byref(zero), ctypes.byref(found),
            d.ctypes.data_as(_DBL), V.ctypes.data_as(_DBL), int_ref(max(n, 1)), isuppz.ctypes.data_as(_INT),
            work.ctypes.data_as(_DBL), int_ref(work.size), iwork.ctypes.data_as(_INT), int_ref(iwork.size),
            ctypes.byref(info))
    return (d[:k], V) if info.value == 0 and found.value == k else None


def trmm_lower_t(F: np.ndarray, n: int, ld: int, B: np.ndarray) -> np.ndarray:
    """``B := Cᵀ B`` in place, ``C`` the lower triangle of the leading ``n × n`` column-major block of ``F``'s
    memory (leading dimension ``ld``; what lies above the diagonal is not read, and no copy of the block is made),
    ``B`` a Fortran-ordered ``n × k`` array; BLAS ``dtrmm``, the GIL released."""
    if not (B.flags.f_contiguous and B.dtype == np.float64 and F.dtype == np.float64 and B.shape[0] == n
            and (F.flags.c_contiguous or F.flags.f_contiguous) and F.size >= (n - 1) * ld + n):
        raise ValueError("trmm_lower_t needs float64 arrays: F holding an n × n block of leading dimension ld, "
                         "B Fortran-ordered with n rows")
    m_, k_, ld_ = (ctypes.byref(ctypes.c_int(v)) for v in (n, B.shape[1], ld))
    _DTRMM(b"L", b"L", b"T", b"N", m_, k_, ctypes.byref(ctypes.c_double(1.0)), F.ctypes.data_as(_DBL), ld_,
           B.ctypes.data_as(_DBL), ctypes.byref(ctypes.c_int(max(n, 1))))
    return B
