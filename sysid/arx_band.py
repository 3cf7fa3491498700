"""Ridge solutions for a whole grid of strengths from one orthogonal reduction of the Gram to band form.

A symmetric ``R`` (``d × d``) is reduced to a band matrix ``B = Qᵀ R Q`` of half-bandwidth ``b`` by one sweep of
block Householder reflections (Bischof, Lang & Sun 2000, "A framework for symmetric band reduction", ACM TOMS
26:581–601, the first stage of the two-stage tridiagonal reduction): per panel of ``b`` columns, a QR factor of the
panel below the band and a two-sided rank-``2b`` update of the trailing matrix (``symm`` and ``syr2k``, matrix-matrix
work). Then for every strength α, ``R + α I = Q (B + α I) Qᵀ`` and

    (R + α I)⁻¹ X = Q (B + α I)⁻¹ Qᵀ X,

one banded Cholesky factor of ``B + α I`` (``d b²`` flops) and two applications of ``Q`` to the few right-hand
sides. ``Q`` is orthogonal, so ``B + α I`` has the eigenvalues of ``R + α I``: the banded factor exists exactly when
the dense one does, and the solutions are backward stable like the dense Cholesky solve and the eigendecomposition
(errors ``~ κ(R + α I) · eps``; Golub & Van Loan 2013, Matrix Computations, 4th ed., sec. 5.1 and 8.3).

Why: cross-validating ridge over a grid of strengths needs one solve per strength and fold. One dense Cholesky
factor per strength costs ``d³/3`` flops each (nine strengths: ``3 d³``); a full eigendecomposition per fold gives
every strength but its tridiagonal reduction is matrix-vector work, measured at 17 Cholesky factors at 2,300 rows on
the 2-core development machine (``eigh`` 8.1 s, one ``dpotrf`` 0.47 s, under load 7). The band reduction costs
``~4/3 d³`` flops of ``syr2k``/``symm`` (measured 0.83 s against 1.75 s for nine factors, ``b = 128``, one BLAS
thread, load 4), after which each strength costs ``O(d b² + d² k)``.
"""

from __future__ import annotations

import ctypes

import numpy as np
import scipy.linalg as sla
from scipy.linalg import blas, lapack

from ._lapack_nogil import scipy_c_function

__all__ = ["BandForm", "band_betas"]

#: Half-bandwidth of the reduction: wide enough for matrix-matrix speed, narrow enough that a banded factor per
#: strength (``d b²`` flops) stays far below a dense one (``d³/3``). 96–192 measured alike at 2,300 rows.
BANDWIDTH = 128


def _blas_function(name: str, n_ints: int, layout: str):
    """The ctypes function of ``scipy.linalg.cython_blas.<name>`` (SciPy's public C API for Cython: the BLAS that
    ``scipy.linalg.blas`` wraps), or None where it cannot be had. ``layout``: one letter per argument after the
    leading character flags, ``i`` an int and ``d`` a double (both by reference), ``a`` a double array. Called
    through ctypes, BLAS runs with the GIL released and takes any leading dimension (the f2py wrappers copy a
    strided view first)."""
    kinds = {"i": ctypes.POINTER(ctypes.c_int), "d": ctypes.POINTER(ctypes.c_double),
             "a": ctypes.POINTER(ctypes.c_double)}
    return scipy_c_function("blas", name, *([ctypes.c_char_p] * n_ints), *(kinds[k] for k in layout))


# dsymm(side, uplo, m, n, alpha, a, lda, b, ldb, beta, c, ldc); dsyr2k(uplo, trans, n, k, alpha, a, lda, b, ldb,
# beta, c, ldc)
_DSYMM = _blas_function("dsymm", 2, "iidaiaidai")
_DSYR2K = _blas_function("dsyr2k", 2, "iidaiaidai")


def in_place_available() -> bool:
    """Whether :class:`BandForm` can reduce a strided view in place (the ctypes BLAS route was found)."""
    return _DSYMM is not None and _DSYR2K is not None


def _ints(*values):
    return [ctypes.byref(ctypes.c_int(int(v))) for v in values]


def _ptr(a: np.ndarray):
    return a.ctypes.data_as(ctypes.POINTER(ctypes.c_double))


def _update_in_place(S: np.ndarray, V: np.ndarray, T: np.ndarray) -> None:
    """:func:`_update` on a C-ordered view ``S`` with any row stride (its lower triangle is the upper triangle of
    the Fortran matrix ``Sᵀ`` with leading dimension the row stride): the same BLAS calls, without a copy."""
    m, b = V.shape
    ld = S.strides[0] // S.itemsize
    one, zero, minus = (ctypes.byref(ctypes.c_double(v)) for v in (1.0, 0.0, -1.0))
    VT = np.asfortranarray(V @ T)  # the products in NumPy as :func:`_update` forms them (the same numbers)
    X = np.empty((m, b), order="F")
    _DSYMM(b"L", b"U", *_ints(m, b), one, _ptr(S), *_ints(ld), _ptr(VT), *_ints(m), zero, _ptr(X), *_ints(m))
    W = np.asfortranarray(X - 0.5 * (V @ (T.T @ (V.T @ X))))
    Vf = np.asfortranarray(V)
    _DSYR2K(b"U", b"N", *_ints(m, b), minus, _ptr(Vf), *_ints(m), _ptr(W), *_ints(m), one, _ptr(S), *_ints(ld))


def _strided_rows(R: np.ndarray) -> bool:
    """Whether ``R`` is a float64 view with contiguous rows (any row stride), as the in-place route needs."""
    return R.dtype == np.float64 and R.strides[1] == R.itemsize and R.strides[0] % R.itemsize == 0 and \
        R.strides[0] >= R.shape[1] * R.itemsize and R.flags.writeable


def _mirror_upper(R: np.ndarray, diagonal: np.ndarray, rows: int = 64) -> None:
    """``R``'s lower triangle from its upper one and its diagonal from ``diagonal``, ``rows`` rows at a time
    (on ``R.T``: the upper triangle from the lower one)."""
    d = R.shape[0]
    for i0 in range(0, d, rows):
        i1 = min(d, i0 + rows)
        R[i0:i1, :i0] = R[:i0, i0:i1].T
        block = R[i0:i1, i0:i1]
        upper = np.triu(block, 1)
        block[...] = upper + upper.T
        block[np.diag_indices(i1 - i0)] = diagonal[i0:i1]


def _compact_wy(V: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """``T`` (upper triangular) with ``H_1 … H_k = I − V T Vᵀ`` for the reflectors ``H_i = I − τ_i v_i v_iᵀ``:
    ``T⁻¹ = diag(1/τ) + striu(VᵀV)`` (Joffrain, Low, Quintana-Ortí, van de Geijn & Van Zee 2006, "Accumulating
    Householder transformations, revisited", ACM TOMS 32:169–179), one triangular inversion; with a zero ``τ`` (a
    column already zero below its diagonal) the forward column-wise recurrence of LAPACK's ``dlarft``."""
    k = tau.size
    VtV = V.T @ V
    if np.all(tau != 0):
        Tinv = np.triu(VtV, 1)
        Tinv[np.diag_indices(k)] = 1.0 / tau
        return sla.solve_triangular(Tinv, np.eye(k), lower=False, check_finite=False)
    T = np.zeros((k, k))
    for i in range(k):
        T[i, i] = tau[i]
        if i:
            T[:i, i] = -tau[i] * (T[:i, :i] @ VtV[:i, i])
    return T


def _move_trailing(S: np.ndarray, b: int, work: np.ndarray) -> np.ndarray:
    """The lower triangle of ``S[b:, b:]`` moved to the front of ``work`` as a C-contiguous square (rows copied
    forwards: a destination row never reaches a later source row)."""
    n = S.shape[0]
    m = n - b
    out = work[: m * m].reshape(m, m)
    for i in range(m):
        out[i, : i + 1] = S[b + i, b: b + i + 1]
    return out


def _update(S: np.ndarray, V: np.ndarray, T: np.ndarray) -> None:
    """``S ← Hᵀ S H`` on the lower triangle of the C-contiguous ``S``, ``H = I − V T Vᵀ``: with ``X = S V T`` and
    ``W = X − ½ V (Tᵀ Vᵀ X)``, ``Hᵀ S H = S − V Wᵀ − W Vᵀ`` (one ``symm``, one ``syr2k``; ``S``'s lower triangle is
    the upper triangle of its Fortran-ordered transpose, updated in place)."""
    F = S.T
    X = blas.dsymm(1.0, F, V @ T, side=0, lower=0)
    W = X - 0.5 * (V @ (T.T @ (V.T @ X)))
    out = blas.dsyr2k(-1.0, V, W, beta=1.0, c=F, lower=0, trans=0, overwrite_c=1)
    if not np.shares_memory(out, S):  # pragma: no cover - F is Fortran-contiguous, so BLAS works in place
        F[...] = out


class BandForm:
    """``R = Q B Qᵀ`` with ``B`` banded (lower band storage ``ab``) and ``Q`` as a list of compact-WY panels.

    Parameters
    ----------
    R : ndarray (d, d)
        Symmetric; its lower triangle is used. Unchanged afterwards, except with ``work=None``: ``R`` is then the
        workspace and holds the reflectors until :meth:`release`, which restores it exactly symmetric (its upper
        triangle is the lower one's transpose: a rounding-level change where it was not; the reduction reads the
        lower triangle either way).
    work : ndarray or None
        A float64 buffer of at least ``d²`` values, overwritten (re-usable afterwards): the trailing matrix is
        kept in it, its lower triangle only, moved to the front as it shrinks. None: reduced in ``R`` itself (a
        view with contiguous rows, :func:`in_place_available`), which spares the buffer, its copy and the moves,
        so several folds can reduce at once in their own Grams.
    b : int
        Half-bandwidth (default :data:`BANDWIDTH`).
    """

    def __init__(self, R: np.ndarray, work: np.ndarray | None, b: int | None = None):
        self._restore = None
        d = R.shape[0]
        b = max(1, int(BANDWIDTH if b is None else b))
        self.d, self.b = d, b
        self.ab = np.zeros((b + 1, d))
        self.panels: list = []  # (first row, V, T): H = I − V T Vᵀ acting on rows [first row, d)
        if work is None:
            self._reduce_in_place(R)
            return
        S = work[: d * d].reshape(d, d)
        np.copyto(S, R)
        k = 0
        while d - k > b + 1:  # entries below the band remain
            V, T = self._reduce_panel(S)
            self._take_band(S, k, b)
            S = _move_trailing(S, b, work)
            _update(S, V, T)
            self.panels.append((k + b, V, T))
            k += b
        self._take_band(S, k, d - k)

    def _reduce_in_place(self, R: np.ndarray) -> None:
        """The reduction in ``R``'s own lower triangle (a view with contiguous rows: the trailing matrix is a view
        of it, nothing is copied or moved). The upper triangle is first made the lower one's transpose (what the
        reduction reads). Each panel's reflectors are kept where they annihilated the panel, below its ``R``
        factor, as LAPACK's ``geqrf`` keeps them (no ``d²/2`` array of them per fold); :meth:`release` restores
        the lower triangle from the upper one and the saved diagonal."""
        if not (in_place_available() and _strided_rows(R)):
            raise ValueError("BandForm(R, None) needs a writeable float64 R with contiguous rows and the ctypes "
                             "BLAS route (in_place_available()); pass a work buffer instead")
        d, b = self.d, self.b
        diagonal = np.diagonal(R).copy()
        _mirror_upper(R.T, diagonal)  # the upper triangle from the lower one, the triangle the reduction reads
        self._restore = (R, diagonal)
        S, k = R, 0
        try:
            while d - k > b + 1:
                V, T = self._reduce_panel(S)
                self._take_band(S, k, b)
                _update_in_place(S[b:, b:], V, T)
                held = S[b:, :V.shape[1]]
                for j in range(V.shape[1]):  # under the panel's R factor, which is upper triangular
                    held[j + 1:, j] = V[j + 1:, j]
                self.panels.append((k + b, held, T))
                S = S[b:, b:]
                k += b
            self._take_band(S, k, d - k)
        except BaseException:
            self.release()
            raise

    def release(self) -> None:
        """After an in-place reduction: restore ``R`` (its lower triangle from the upper one, its diagonal) once
        the panels are no longer needed (afterwards :meth:`to_band` and :meth:`from_band` refuse). A no-op
        otherwise."""
        restore = self._restore
        if restore is not None:
            self._restore, self.panels = None, None
            _mirror_upper(*restore)

    def _panels(self, backwards: bool = False):
        """``(first row, V, T)`` of each panel, one at a time (``V`` rebuilt from the held reflectors after an
        in-place reduction)."""
        if self.panels is None:
            raise RuntimeError("this in-place BandForm was released; its reflectors are gone")
        for r0, V, T in (reversed(self.panels) if backwards else self.panels):
            if self._restore is not None:
                held = V
                V = np.tril(held, -1)
                V[np.diag_indices(held.shape[1])] = 1.0
            yield r0, V, T

    def _reduce_panel(self, S: np.ndarray):
        """QR of the panel below the band, ``S[b:, :b] = H [R; 0]``: writes ``[R; 0]`` in its place and returns
        ``H = I − V T Vᵀ`` as ``(V, T)``."""
        b = self.b
        qr, tau, _work, info = lapack.dgeqrf(S[b:, :b])
        if info != 0:  # pragma: no cover - dgeqrf fails only on bad arguments
            raise np.linalg.LinAlgError(f"dgeqrf failed (info {info})")
        kk = tau.size
        V = np.tril(qr[:, :kk], -1)
        V[np.arange(kk), np.arange(kk)] = 1.0
        S[b:, :b] = 0.0
        S[b: b + kk, :b] = np.triu(qr[:kk, :b])
        return V, _compact_wy(V, tau)

    def _take_band(self, S: np.ndarray, k: int, w: int) -> None:
        """The band entries of the ``w`` leading columns of ``S`` (global columns ``k …``) into ``ab``."""
        for i in range(min(self.b, S.shape[0] - 1) + 1):
            diag = np.diagonal(S, -i)[:w]
            self.ab[i, k: k + diag.size] = diag

    def to_band(self, X: np.ndarray) -> np.ndarray:
        """``Qᵀ X`` (a new array)."""
        Y = np.array(X, dtype=np.float64, order="C")
        for r0, V, T in self._panels():
            Y[r0:] -= V @ (T.T @ (V.T @ Y[r0:]))
        return Y

    def from_band(self, Y: np.ndarray) -> np.ndarray:
        """``Q Y`` (in place)."""
        for r0, V, T in self._panels(backwards=True):
            Y[r0:] -= V @ (T @ (V.T @ Y[r0:]))
        return Y

    def band_solve(self, G: np.ndarray, alpha: float) -> np.ndarray | None:
        """``(B + α I)⁻¹ G`` (one banded Cholesky factor); None when ``B + α I`` has no factor (it is not positive
        definite in floating point)."""
        ab = self.ab.copy()
        ab[0] += alpha
        try:
            c = sla.cholesky_banded(ab, lower=True, check_finite=False)
        except np.linalg.LinAlgError:
            return None
        return sla.cho_solve_banded((c, True), G, check_finite=False)

    def solve(self, G: np.ndarray, alpha: float) -> np.ndarray | None:
        """``(R + α I)⁻¹ X`` from ``G = Qᵀ X`` (:meth:`to_band`); None where :meth:`band_solve` has no factor."""
        Y = self.band_solve(G, alpha)
        return None if Y is None else self.from_band(Y)


def _rounding_level(R: np.ndarray) -> float:
    """An upper bound of the eigen route's cut-off ``λ_max · d · eps`` (``λ_max <= tr R`` for a PSD ``R``)."""
    return float(max(np.trace(R), 0.0)) * R.shape[0] * np.finfo(float).eps


def band_of(R: np.ndarray) -> np.ndarray | None:
    """The band ``B`` of ``R = Q B Qᵀ`` (lower band storage, :class:`BandForm`), reduced in ``R`` itself (a scratch
    array with contiguous rows: overwritten, ``Q`` dropped); None where the in-place route is not available."""
    if not (in_place_available() and _strided_rows(R)):
        return None
    form = BandForm(R, None)
    form._restore, form.panels = None, None  # R is scratch: nothing to restore
    return form.ab


def _extend(R, r, n_core: int, e: np.ndarray, Ze: np.ndarray, Zr: np.ndarray, alpha: float):
    """Coefficients on ``[core, e]`` from ``Zr = (R_cc + α I)⁻¹ r_c`` and ``Ze = (R_cc + α I)⁻¹ R_ce`` by block
    elimination: the Schur complement ``S = R_ee + α I − R_ec Ze`` (Cholesky), ``β_e = S⁻¹ (r_e − R_ec Zr)``,
    ``β_c = Zr − Ze β_e``; None when ``S`` has no factor."""
    if e.size == 0:
        return Zr.copy()
    Rec = R[e, :n_core]
    S = R[np.ix_(e, e)] - Rec @ Ze
    S = 0.5 * (S + S.T)
    S[np.diag_indices_from(S)] += alpha
    try:
        cf = sla.cho_factor(S, lower=True, check_finite=False)
    except np.linalg.LinAlgError:
        return None
    be = sla.cho_solve(cf, r[e] - Rec @ Zr, check_finite=False)
    return np.vstack([Zr - Ze @ be, be])


def band_betas(R, r, n_core: int, extras, live, alphas, work: np.ndarray | None, parts: dict | None = None) -> dict:
    """Standardised coefficients ``{structure: [β per strength] or None}`` of one fold (the core leads ``R``), as
    :func:`stimsteer.sysid.arx_cv._fold_betas` gives them, from one band reduction of the core: every strength is a
    banded factor, and each structure adds its extra regressors by block elimination. None for every structure
    when a strength is at the rounding level of the core or a banded factor does not exist (the caller takes the
    eigen route then), for one structure when its Schur complement has no factor. ``work``: as
    :class:`BandForm`'s (None: in place in ``R``'s core block, restored afterwards). ``parts`` (a dict) receives
    the core solutions shared by every structure, ``"Z"`` ``(n_core, n_alphas, p + |union_e|)`` (``(R_cc + α I)⁻¹``
    times ``[r_c, R_c,union_e]``) and ``"union_e"``: each structure's β is ``Z[:, j, :p] − Z[:, j, p + pos] β_e`` on
    the core and ``β_e`` (its last rows) on its extras."""
    Rc = R[:n_core, :n_core]
    if n_core == 0 or min(alphas) <= _rounding_level(Rc):
        return {i: None for i in live}
    form = BandForm(Rc, work)
    union_e = np.unique(np.concatenate([extras[i] for i in live]))
    p = r.shape[1]
    try:  # (r and the core's rows of the extras lie outside the core block an in-place reduction works in)
        G = form.to_band(np.hstack([r[:n_core], R[:n_core, union_e]]))
        found = [form.band_solve(G, alpha) for alpha in alphas]
        if any(Y is None for Y in found):
            return {i: None for i in live}
        Z = form.from_band(np.hstack(found)).reshape(n_core, len(alphas), G.shape[1])  # Q once for every strength
    finally:
        form.release()  # R's core block restored (in place), before the extras read R again
    if parts is not None:
        parts.update(Z=Z, union_e=union_e)
    out: dict = {i: [] for i in live}
    for j, alpha in enumerate(alphas):
        for i in live:
            if out[i] is not None:
                pos = p + np.searchsorted(union_e, extras[i])
                beta = _extend(R, r, n_core, extras[i], Z[:, j, pos], Z[:, j, :p], alpha)
                out[i] = None if beta is None else out[i] + [beta]
    return out
