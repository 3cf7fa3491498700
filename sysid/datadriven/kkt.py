"""The KKT solves of the regularised Hankel predictor's ℓ2 / projection problem, and the row blocks they work on
(:class:`HankelBlocks`; split from :mod:`stimsteer.sysid.datadriven.hankel_predictor`)."""

from __future__ import annotations

import threading
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla

from ..exceptions import ConditioningWarning, SessionError
from ..hankel import _is_lower

__all__ = ["HankelBlocks", "_kkt_map", "_kkt_predictor", "_projection_closed_form", "_coordinate_projector", "_projection_map", "_projection_g"]


@dataclass(frozen=True)
class HankelBlocks:
    """The four row blocks of a (possibly compressed) data matrix; ``r`` columns each.

    Attributes
    ----------
    Up : ndarray, shape (n_inputs·past_steps, r)
    Yp : ndarray, shape (n_outputs·past_steps, r)
    Uf : ndarray, shape (n_inputs·horizon_steps, r)
    Yf : ndarray, shape (n_outputs·horizon_steps, r)
    compressed : bool
        True when the blocks are the row-space factor (``r ≤ n_rows``), False for the raw Hankel columns.
    """

    Up: np.ndarray
    Yp: np.ndarray
    Uf: np.ndarray
    Yf: np.ndarray
    compressed: bool

    @property
    def D(self) -> np.ndarray:
        """``[Up; Yp; Uf]``, shape ((m+p)·past + m·horizon, r)."""
        return np.vstack([self.Up, self.Yp, self.Uf])

    @classmethod
    def from_matrix(cls, H: np.ndarray, m: int, p: int, past: int, horizon: int, compressed: bool):
        """Split the rows of ``[Up; Yp; Uf; Yf]`` (``(m + p)(past + horizon)`` of them)."""
        if H.ndim != 2 or H.shape[0] != (m + p) * (past + horizon):
            raise SessionError(
                f"a data matrix for {m} input(s), {p} output(s), past {past} and horizon {horizon} needs "
                f"{(m + p) * (past + horizon)} rows; got shape {H.shape}."
            )
        cuts = np.cumsum([m * past, p * past, m * horizon])
        Up, Yp, Uf, Yf = (np.ascontiguousarray(b) for b in np.split(H, cuts, axis=0))
        return cls(Up, Yp, Uf, Yf, bool(compressed))


def _kkt_system(blocks, M, lam_g: float, lam_y: float):
    """The symmetric KKT matrix of :func:`_kkt_map` and its constraint scaling ``β``."""
    Up, Yp, Uf = blocks.Up, blocks.Yp, blocks.Uf
    r = Up.shape[1]
    A = np.vstack([Up, Uf])
    K = np.zeros((r + A.shape[0], r + A.shape[0]))
    K[:r, :r] = lam_y * (Yp.T @ Yp)
    if M is None:
        K[np.arange(r), np.arange(r)] += lam_g
    else:
        K[:r, :r] += lam_g * M
    # symmetric scaling of the constraint rows (multipliers ν/β): same solution, balanced blocks
    beta = np.abs(K[:r, :r]).max() / max(np.abs(A).max(), np.finfo(float).tiny)
    K[:r, r:] = beta * A.T
    K[r:, :r] = beta * A
    return K, beta


def _solve_kkt(K, rhs, lam_g: float, lam_y: float) -> np.ndarray:
    """``K⁻¹ rhs``; an ill-conditioned system (scipy's LinAlgWarning) is reported as :class:`ConditioningWarning`
    and solved anyway."""
    with warnings.catch_warnings():
        warnings.simplefilter("error", sla.LinAlgWarning)
        try:
            return sla.solve(K, rhs, assume_a="sym", check_finite=False)
        except sla.LinAlgWarning:
            pass
    warnings.warn(ConditioningWarning(
        f"the Hankel predictor's KKT system ({K.shape[0]} unknowns) is ill-conditioned at lambda_g = {lam_g:.3g}, "
        f"lambda_y = {lam_y:.3g}; the prediction may be inaccurate. Use larger lambdas_g or noisier (richer) data."
    ), stacklevel=7)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sla.LinAlgWarning)
        return sla.solve(K, rhs, assume_a="sym", check_finite=False)


def _kkt_map(blocks, M, lam_g: float, lam_y: float, B: np.ndarray) -> np.ndarray:
    """Minimisers ``g`` (one column per column of ``B = [u_past; y_past; u_future]``) of the ℓ2 / projection problem.

    KKT system of ``min λ_y ||Yp g − y_p||² + λ_g gᵀ M g  s.t.  [Up; Uf] g = [u_p; u_f]``::

        [λ_y YpᵀYp + λ_g M   Aᵀ] [g]   [λ_y Ypᵀ y_p]
        [A                   0 ] [ν] = [u_p; u_f  ]

    (``M`` is an orthogonal projector, so ``MᵀM = M``; ``M = None`` is the identity.) An ill-conditioned system
    (scipy's LinAlgWarning) is reported as :class:`ConditioningWarning` and solved anyway.
    """
    Up, Yp = blocks.Up, blocks.Yp
    r, nu, npst = Up.shape[1], Up.shape[0], Yp.shape[0]
    K, beta = _kkt_system(blocks, M, lam_g, lam_y)
    rhs = np.vstack([lam_y * (Yp.T @ B[nu:nu + npst]), beta * B[:nu], beta * B[nu + npst:]])
    return _solve_kkt(K, rhs, lam_g, lam_y)[:r]


def _kkt_predictor(blocks, M, lam_g: float, lam_y: float) -> np.ndarray:
    """``Yf g(B)`` as one matrix over ``B = [u_past; y_past; u_future]``: ``Yf @ _kkt_map(..., I)``.

    With ``K`` symmetric, ``Yf [I 0] K⁻¹ R = Xᵀ R`` for ``X = K⁻¹ [Yfᵀ; 0]``: one solve with ``p N`` right-hand
    sides (the predicted outputs) instead of one per column of ``B`` (``(m + p) Tini + m N``), and ``R`` (the
    right-hand side of a unit ``B``) is applied in closed form.
    """
    Up, Yp, Uf, Yf = blocks.Up, blocks.Yp, blocks.Uf, blocks.Yf
    r, nu = Up.shape[1], Up.shape[0]
    K, beta = _kkt_system(blocks, M, lam_g, lam_y)
    X = _solve_kkt(K, np.vstack([Yf.T, np.zeros((K.shape[0] - r, Yf.shape[0]))]), lam_g, lam_y)
    return np.hstack([beta * X[r:r + nu].T, lam_y * (X[:r].T @ Yp.T), beta * X[r + nu:].T])


# ------------------------------------------------------------------------------------------------ closed form
def _leading_block(blocks):
    """``n_b`` when ``D = [D1 0]`` with ``D1`` square (``n_b × n_b``), as for a Cholesky factor of the Gram in the
    row order ``[Up; Yp; Uf; Yf]``; else None."""
    n_b, r = blocks.Up.shape[0] + blocks.Yp.shape[0] + blocks.Uf.shape[0], blocks.Up.shape[1]
    if not blocks.compressed or r < n_b or any(np.any(b[:, n_b:]) for b in (blocks.Up, blocks.Yp, blocks.Uf)):
        return None
    return n_b


def _leading_square(blocks, n_b: int) -> np.ndarray:
    """``D1``, the first ``n_b`` columns of ``D`` (made from the row blocks, without the ``n_b × r`` ``D``),
    Fortran-ordered: the order LAPACK takes without a copy of its own."""
    D1 = np.empty((n_b, n_b), order="F")
    r0 = 0
    for b in (blocks.Up, blocks.Yp, blocks.Uf):
        D1[r0:r0 + b.shape[0]] = b[:, :n_b]
        r0 += b.shape[0]
    return D1


def _projection_closed_form(blocks, limit: float, make_projector: bool = True):
    """``(I − Π, Θ)`` exactly when ``D = [D1 0]`` with ``D1`` invertible (estimated condition number <= ``limit``:
    then ``D`` has full row rank, its row space is the first ``n_b`` coordinates and ``I − Π = diag(0_{n_b}, I)``);
    ``Θ = Yf1 D1⁻¹`` is the projection predictor (:func:`_projection_map`). ``(None, None)`` otherwise. With
    ``make_projector=False`` the first item is ``n_b`` instead (the caller makes the dense projector later).
    """
    n_b = _leading_block(blocks)
    if n_b is None:
        return None, None
    D1 = _leading_square(blocks, n_b)
    lower = _is_lower(D1)
    if lower:  # the Cholesky factor: LAPACK trcon on the triangle itself
        trcon, = sla.get_lapack_funcs(("trcon",), (D1,))
        rcond, info = trcon(D1, norm="1", uplo="L", diag="N")
    else:
        lu, _piv = sla.lu_factor(D1, check_finite=False)
        gecon, = sla.get_lapack_funcs(("gecon",), (lu,))
        rcond, info = gecon(lu, float(np.abs(D1).sum(axis=0).max()), norm="1")
        del lu
    if info != 0 or not rcond * limit >= 1.0:
        return None, None
    rhs = np.asfortranarray(blocks.Yf[:, :n_b].T)  # solved in place (Fortran order: no copy by the wrapper)
    theta = (sla.solve_triangular(D1, rhs, lower=True, trans="T", overwrite_b=True, check_finite=False) if lower
             else sla.solve(D1.T, rhs, check_finite=False)).T
    del D1, rhs
    return (_coordinate_projector(blocks.Up.shape[1], n_b) if make_projector else n_b), theta


def _coordinate_projector(r: int, n_b: int) -> np.ndarray:
    """``diag(0_{n_b}, I_{r − n_b})`` (the same numbers as ``np.diag``), its zero pages left untouched
    (:func:`_sparse_zeros`)."""
    M = _sparse_zeros((r, r))
    k = np.arange(n_b, r)
    M[k, k] = 1.0
    return M


_HUGEPAGE_LOCK = threading.Lock()


def _sparse_zeros(shape) -> np.ndarray:
    """``np.zeros(shape)`` without NumPy's transparent-huge-page advice while it is made.

    A large zero array comes from ``calloc`` as fresh zero pages of the operating system: only the pages written
    become resident. NumPy advises huge pages for arrays of 4 MB and more, and where the kernel follows that advice
    (``madvise`` mode) one written entry makes a whole 2 MB page resident: the dense ``r × r`` coordinate projector
    (ones on a diagonal) took 88 MB of resident memory instead of 13 at ``r`` = 3,450 (past 100 / horizon 50; issue
    14). Any later write to the array still works as for any array (its pages then become resident).
    """
    toggle = getattr(getattr(np, "_core", None), "multiarray", None)
    toggle = getattr(toggle, "_set_madvise_hugepage", None)
    if toggle is None:  # pragma: no cover - other NumPy versions
        return np.zeros(shape)
    with _HUGEPAGE_LOCK:
        old = toggle(False)
        try:
            return np.zeros(shape)
        finally:
            toggle(old)


def _is_coordinate_projector(M, n_b: int) -> bool:
    d = np.diagonal(M)
    return (M.shape[0] > n_b and not d[:n_b].any() and bool(np.all(d[n_b:] == 1.0))
            and np.count_nonzero(M) == M.shape[0] - n_b)


def _solve_leading(blocks, M, B: np.ndarray, transposed: bool):
    """``D1⁻¹ B`` (``D1⁻ᵀ B`` when ``transposed``) in :func:`_projection_map`'s case, else None."""
    n_b = _leading_block(blocks)
    if n_b is None or M is None or not _is_coordinate_projector(M, n_b):
        return None
    D1 = _leading_square(blocks, n_b)
    if _is_lower(D1):
        return sla.solve_triangular(D1, B, lower=True, trans="T" if transposed else "N", check_finite=False)
    return sla.solve(D1.T if transposed else D1, B, check_finite=False)


def _projection_map(blocks, M):
    """``Θ = Yf1 D1⁻¹`` (``[u_past; y_past; u_future] -> vec(y_future)``): the projection predictor in closed form
    when ``D = [D1 0]`` and ``M = diag(0, I)``; None otherwise (solve the KKT system).

    With ``g = [g1; g2]``, the constraints and the slack involve ``D1 g1`` only and the penalty is ``||g2||²``, so
    ``g2 = 0`` and ``D1 g1 = b`` (zero slack, zero penalty) is the unique minimiser for every ``λ_g, λ_y > 0``.
    """
    n_b = _leading_block(blocks)
    out = None if n_b is None else _solve_leading(blocks, M, np.ascontiguousarray(blocks.Yf[:, :n_b].T), True)
    return None if out is None else out.T


def _projection_g(blocks, M, B: np.ndarray):
    """The minimisers ``g = [D1⁻¹ B; 0]`` of :func:`_projection_map`'s case (None outside it)."""
    g1 = _solve_leading(blocks, M, B, False)
    if g1 is None:
        return None
    g = np.zeros((blocks.Up.shape[1], B.shape[1]))
    g[:g1.shape[0]] = g1
    return g


def c_order_in_place(H: np.ndarray, block: int = 256) -> np.ndarray:
    """``H`` as a C-ordered array, made in ``H``'s own memory where it is a square Fortran-ordered array (its tiles
    swapped with their transposes: the same numbers, no second array of its size); a C-ordered copy otherwise.

    The Hankel predictor's row blocks are rows of the total Gram's Cholesky factor (Fortran-ordered, ``n × n``):
    row blocks of a C-ordered array need no copies, where copying them out of the factor held the factor and the
    copies at once (190 MB at past 100 / horizon 50; issue 14). ``H`` is overwritten: the caller drops it.
    """
    n = H.shape[0]
    if H.ndim != 2 or H.shape[1] != n or not H.flags.f_contiguous or H.flags.c_contiguous or not H.flags.writeable:
        return np.ascontiguousarray(H)
    for i0 in range(0, n, block):
        I = slice(i0, min(i0 + block, n))
        H[I, I] = H[I, I].T.copy()
        for j0 in range(i0 + block, n, block):
            J = slice(j0, min(j0 + block, n))
            upper = H[I, J].copy()
            H[I, J] = H[J, I].T
            H[J, I] = upper.T
    return H.T  # the memory now holds Hᵀ column by column: H row by row
