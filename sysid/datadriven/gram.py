"""The Gram route of the direct predictors: per-fold Grams of the Hankel data matrix from streamed lag products.

The data matrix ``H = [Up; Yp; Uf; Yf]`` of depth ``L = past + horizon`` has one column per window; its Gram
``H Hᵀ`` is a permutation of the Gram of the lagged vectors ``[Z_k; Z_{k-1}; ...; Z_{k-L+1}]`` (``Z = [y u]``),
which :mod:`stimsteer.sysid._lagged` assembles from ``L`` lag products of the raw ``T × (m + p)`` samples plus
per-piece edge terms. A fold keeps only those compact sums (:class:`_GramFold`); the training data of a fold is the
total minus the fold (a difference of sums); the row-space factor, when a method needs one, is the Cholesky factor
of the Gram (``H Hᵀ = F Fᵀ``), not a QR of the data.

Numerical care: forming ``H Hᵀ`` squares the condition number of ``H``, so where the Gram is ill-conditioned the
Gram route would lose digits the QR route keeps. :func:`gram_condition` estimates ``κ₁(H Hᵀ)`` from the Cholesky
factor (LAPACK ``pocon``); above :data:`GRAM_CONDITION_LIMIT` (or when the Gram is not positive definite) the
predictors take the QR route instead and record why (``factor_route_``, ``gram_condition_``).

References
----------
Golub G.H., Van Loan C.F. (2013), Matrix Computations, 4th ed., sections 4.2 (Cholesky), 5.3 (normal equations vs
QR: the error of the normal equations grows with ``κ(A)²``) and 3.5.4 (condition estimation).
Higham N.J. (2002), Accuracy and Stability of Numerical Algorithms, 2nd ed., chapter 15 (condition estimators).
"""

from __future__ import annotations

import functools

import numpy as np
import scipy.linalg as sla

from .._lagged import _lagged_diagonal, _lagged_gram, _stream_lag_sums
from .._progress import progress
from ._eigen_folds import errors_for as _folds_side_by_side
from ._by_strength import gram_scale, held_out_constant, strength_errors
from .._pages import release_freed_memory, touched
from .._lapack_nogil import one_norm
from ._nogil_cholesky import pocon_lower, potrf_lower

#: Largest estimated 1-norm condition number of a Hankel Gram the Gram route accepts. Its rounding errors grow as
#: ``eps · κ(H Hᵀ)`` against ``eps · κ(H)`` for QR (Golub & Van Loan 2013, section 5.3.8): at 1e8 that bound is
#: 1.1e-8, the relative tolerance the Gram route's predictions keep against the QR route's. It was 1e7 until
#: one-signed inputs (pulse amplitudes, whose mean makes the lagged Gram ill-conditioned) sent long-window fits to
#: the QR route at 1.5e7 (24.7 s instead of ~1 s); measured there, the two routes' predictions differ by 2e-11
#: relative at conditions 2.6e7 and 9.1e7 (``tests/sysid/test_gram_route.py``).
GRAM_CONDITION_LIMIT = 1e8


def hankel_permutation(m: int, p: int, past: int, horizon: int) -> np.ndarray:
    """``perm`` with ``(H Hᵀ) = W[perm][:, perm]``: rows of ``[Up; Yp; Uf; Yf]`` as rows of the lagged Gram ``W``.

    Lagged block ``a`` holds sample ``k − a`` = time ``τ = L − 1 − a`` of the window, channels ``[y; u]``.
    """
    L, c = past + horizon, m + p
    rows = []
    for lo, hi, off, n in ((0, past, p, m), (0, past, 0, p), (past, L, p, m), (past, L, 0, p)):
        for tau in range(lo, hi):
            rows.append((L - 1 - tau) * c + off + np.arange(n))
    return np.concatenate(rows)


class _GramFold:
    """A fold of the Gram route: compact lag sums; its Gram and factor are made when asked for.

    Attributes
    ----------
    sums : _LagSums
    n_columns : int
        Windows (columns of ``H``) of the fold.
    full : list
        Always empty (the Gram route never keeps raw Hankel columns).
    """

    full: list = []
    #: The folds a total was summed from (:func:`total_fold`; empty for any other fold).
    parts: tuple = ()

    @property
    def n_rows(self) -> int:
        return int(self.perm.size)

    def __init__(self, sums, perm: np.ndarray, n_columns: int):
        self.sums, self.perm, self.n_columns = sums, perm, int(n_columns)
        self._factor = self._factor_gram = None

    def plus(self, other: "_GramFold", sign: float = 1.0) -> "_GramFold":
        """The fold ``self + sign · other`` (training data = total minus the held-out fold)."""
        return _GramFold(self.sums.plus(other.sums, sign), self.perm, self.n_columns + int(sign) * other.n_columns)

    @property
    def gram(self) -> np.ndarray:
        """``H Hᵀ`` in the row order ``[Up; Yp; Uf; Yf]``."""
        return self.gram_rows(0, self.perm.size)

    def gram_rows(self, r0: int, r1: int, fortran: bool = False, out: np.ndarray | None = None) -> np.ndarray:
        """Rows ``[r0, r1)`` of :attr:`gram` (the same numbers), assembled alone (Fortran-ordered with
        ``fortran``; into the front of the flat float64 ``out``, returned as a view of it, where given)."""
        index = np.empty_like(self.perm)
        index[self.perm] = np.arange(self.perm.size)
        return _lagged_gram(self.sums, index.reshape(self.sums.X.shape[0], -1), rows=(r0, r1), fortran=fortran,
                            out=out)

    def gram_diagonal(self) -> np.ndarray:
        """The diagonal of :attr:`gram` (the same numbers), from the sums alone."""
        return _lagged_diagonal(self.sums)[self.perm]

    @property
    def factor(self) -> np.ndarray:
        """A factor ``F`` with ``F Fᵀ = H Hᵀ``: the lower Cholesky factor (a symmetric square root where the Gram
        of a small fold is only semi-definite)."""
        if self._factor is None:
            try:  # in place: G is symmetric, so its transpose is the Fortran-ordered array LAPACK works on
                self._factor = sla.cholesky(self.gram.T, lower=True, check_finite=False, overwrite_a=True)
            except np.linalg.LinAlgError:
                d, V = np.linalg.eigh(self.gram)
                self._factor = V * np.sqrt(np.clip(d, 0.0, None))
        return self._factor

    def release(self) -> None:
        """Drop the cached factor (it is as large as the Gram), and the factor kept with the Gram's upper triangle."""
        self._factor = self._factor_gram = None


def gram_condition(F: np.ndarray, G: np.ndarray | None, norm: float | None = None) -> float:
    """Estimated 1-norm condition number of ``G = F Fᵀ`` from its Cholesky factor ``F`` (LAPACK ``pocon``);
    ``norm`` is ``||G||₁`` when ``G`` is not given. The same LAPACK routine with the GIL released where ``F`` is a
    square Fortran-ordered float64 array (:func:`._nogil_cholesky.pocon_lower`): other threads' Python work goes on.
    """
    norm = one_norm(G) if norm is None else norm
    rcond = pocon_lower(F, norm)
    if rcond is None:
        pocon, = sla.get_lapack_funcs(("pocon",), (F,))
        rcond, info = pocon(F, norm, uplo="L")
        rcond = rcond if info == 0 else 0.0
    return float(np.inf) if not rcond > 0 else float(1.0 / rcond)


def gram_condition_of(fold: "_GramFold", keep: bool = False, keep_gram: bool = False, begin=None) -> float:
    """Estimated ``κ₁`` of the fold's Gram (inf when it is not positive definite); with ``keep`` the Cholesky factor
    it was estimated from becomes the fold's :attr:`~_GramFold.factor` (the same numbers as computing it there).

    With ``keep_gram`` instead, the array is kept as LAPACK leaves it (``_factor_gram``): the factor in its lower
    triangle, the Gram's own entries still in its strict upper one (``potrf`` does not touch it). Together with
    the diagonal of the sums that is the whole Gram again (:func:`fitted_ridge_map`): the assembly is not repeated.
    ``begin()`` is called before the Gram is assembled (work to start beside the assembly and the factor: the
    assembly's Python work holds the GIL only in part, the factor not at all); if it returns ``run``, the factor
    is computed as ``run(task)`` (``task()`` on the caller's worker threads, which then share the cores with the
    work begun; the same call on the same array, so the same numbers). Where ``run`` has ``before_rows`` (as
    ``_hankel_folds._TotalRun`` has: the work begun assembles rows of its own first, and two assemblies at once
    hold the GIL in turns and each takes 2-3 times as long), the Gram's array is touched meanwhile
    (:func:`.._pages.touched`), ``before_rows()`` waits for those rows, and the Gram is assembled into the array
    after them.
    """
    run = begin() if begin is not None else None
    before, out = getattr(run, "before_rows", None), None
    if before is not None:  # the work begun assembles rows first: this array's first touch meanwhile (GIL-free)
        out = touched(fold.n_rows ** 2)
        before()
    G = fold.gram_rows(0, fold.n_rows, out=out)
    norm = one_norm(G)
    # in place (memory: one Gram-sized array); without clean the strict upper triangle keeps G's own entries
    task = functools.partial(potrf_lower, G, clean=not keep_gram)  # the GIL released: other threads work beside it
    F, info = task() if run is None else run(task)
    del task
    if info != 0:
        return float("inf")
    if keep_gram:
        fold._factor_gram = F
    elif keep:
        fold._factor = F
    return gram_condition(F, None, norm)


def collect_gram(source, pieces, n_folds: int, m: int, p: int, past: int, horizon: int):
    """One streamed pass: the :class:`_GramFold` of each fold and the outputs' sums over the pieces' samples.

    ``pieces`` are ``(a, b, fold)`` sample ranges (each at least ``past + horizon`` long); the windows of a piece
    are the lagged rows ``[a + L − 1, b)``.

    Returns
    -------
    folds : list of _GramFold
    y_sum, y_sq : ndarray, shape (p,)
        Sums of the outputs and of their squares over every sample of the pieces.
    n_y : int
    """
    L = past + horizon
    rows = [(a + L - 1, b, f) for a, b, f in pieces]
    total = sum(b - a for a, b, _f in rows)
    with progress(total, "Gram of the data", unit="sample") as bar:
        sums = _stream_lag_sums(source, rows, n_folds, L - 1, on_chunk=bar.update)
    perm = hankel_permutation(m, p, past, horizon)
    folds = [_GramFold(s, perm, s.n) for s in sums]
    y_sum, y_sq, n_y = np.zeros(p), np.zeros(p), 0
    for s in sums:
        y_sum += s.S[:p]
        y_sq += np.diagonal(s.X[0])[:p]
        n_y += s.n
        for sign, w in s.windows:
            if sign > 0:  # the L samples before a piece's first window end are the piece's first samples
                y_sum += w[:, :p].sum(axis=0)
                y_sq += (w[:, :p] ** 2).sum(axis=0)
                n_y += w.shape[0]
    return folds, y_sum, y_sq, n_y


def total_fold(folds) -> "_GramFold":
    """The sum of the folds (which knows them, :attr:`_GramFold.parts`, where there are two or more)."""
    out = folds[0]
    for f in folds[1:]:
        out = out.plus(f)
    if len(folds) > 1:
        out.parts = tuple(folds)
    return out


#: Regressor rows (``n_b``) from which a fold's held-out terms come from the total Gram's Cholesky factor (kept
#: from the condition check) instead of the held-out fold's own Gram (:func:`_heldout_from_total`): one Gram
#: assembly and one Cholesky factor fewer per fold (measured at past 100 / horizon 50, ``n_b`` = 2,450: 0.3 s and
#: 0.2 s of CPU per fold on one thread). Below it the SPC grid's held-out terms come from the validation fold's own
#: Gram, and its training rows from the kept total Gram (:func:`_training_rows`); the unregularised fold error
#: (:func:`unregularised_fold_error`) takes the total's factor at every size.
TOTAL_FACTOR_ROWS = 512


#: Score a large fold's ridge grid (from :data:`TOTAL_FACTOR_ROWS` regressor rows, with the total's factor) one
#: strength at a time, two at once (:mod:`._by_strength`), instead of one eigendecomposition per fold. Measured at
#: past 100 / horizon 50 (n = 2,450, pN = 1,000, 9 strengths): 0.73 s of CPU per strength against 4.2 s for the
#: fold's ``syevd`` plus ~1.5 s of its products, so ~20 % more CPU, but in pieces that keep both cores busy, where
#: ``syevd`` runs on one (benchmarks/README.md, s6-spc). The held-out errors agree with the eigen route's to ~1e-12.
BY_STRENGTH = True
#: Score the large folds' grids together at the first fold's call (:mod:`._eigen_folds`): two folds by their own
#: eigendecomposition side by side (one core each), any other by strength on both (:data:`BY_STRENGTH`'s route),
#: where their arrays fit ``_eigen_folds.MAX_BYTES`` (mid-sized Grams; measured there). False: fold by fold.
FOLDS_SIDE_BY_SIDE = True
#: Strengths scored at once (the machine's two cores; each worker but the first holds one n × n array).
STRENGTH_WORKERS = 2


def _total_factor(total: "_GramFold | None", n_b: int, any_size: bool = False) -> np.ndarray | None:
    """The total Gram's cached lower Cholesky factor where the held-out terms are to come from it (from
    :data:`TOTAL_FACTOR_ROWS` regressor rows on, or at ``any_size``), else None (its strict upper triangle may hold
    the Gram, ``_factor_gram``: the users read only the lower one)."""
    F = None if total is None else total._factor if total._factor is not None else total._factor_gram
    return F if F is not None and (any_size or n_b >= TOTAL_FACTOR_ROWS) else None


def ridge_grid_errors(train: _GramFold, val: _GramFold, n_b: int, alphas, weights, total=None) -> np.ndarray:
    """Weighted held-out squared errors of ``Θ(s) = G21 (G11 + s I)⁻¹`` for every ``s``, one ``eigh`` in all (on
    large problems one Cholesky factor per strength, two strengths side by side: :data:`BY_STRENGTH`; on mid-sized
    ones, every fold of ``total.parts`` at the first call, ``train`` = ``total`` − ``val``: :data:`FOLDS_SIDE_BY_SIDE`).
    ``s = alpha · tr(G) / n_rows`` (the data scale of the training Gram ``G``) for each ``alpha``. ``total``: the
    sum of the folds, whose cached Cholesky factor (:func:`gram_condition_of` with ``keep``) gives the validation
    terms on large problems (:data:`TOTAL_FACTOR_ROWS`).

    With ``G11 = V diag(d) Vᵀ`` (training) and ``A = G21 V``, ``Θ(s) = A diag(1/(d+s)) Vᵀ``; the held-out error
    ``tr(Ω (G22 − 2 Θ G12 + Θ G11 Θᵀ) Ω)`` (validation Grams, ``Ω`` = diag(weights)) is then a sum of ``O(n²)``
    terms per strength over matrices computed once.
    """
    scale = gram_scale(train)
    release_freed_memory()  # the previous fold's arrays, before this fold's peak
    F = _total_factor(total, n_b)
    if F is not None and FOLDS_SIDE_BY_SIDE:
        errors = _folds_side_by_side(total, val, n_b, alphas, weights,
                                        lambda t, v, s: _grid_by_strength(t, v, n_b, s, weights, F))
        if errors is not None:
            return errors
    if F is not None and BY_STRENGTH:
        errors = _grid_by_strength(train, val, n_b, np.asarray(alphas) * scale, weights, F)
        if errors is not None:
            return errors
    small = F is None and total is not None and total._factor_gram is not None and n_b < TOTAL_FACTOR_ROWS
    Gv = [val.gram_rows(0, n_b)] if small else []  # the validation rows first: the training ones from them
    # [G11 G12]: the rows of the outputs' block are never used (29 % of the Gram)
    Gt = _training_rows(total, Gv[0], n_b) if small else train.gram_rows(0, n_b)
    G11, G21 = np.asfortranarray(Gt[:, :n_b]), np.ascontiguousarray(Gt[:, n_b:].T)
    del Gt  # memory: at most one array of the Gram's first n_b rows and two of G11's size at any time
    # divide and conquer: 27 % less CPU than the default MRRR driver at n = 2450 on this machine (its workspace,
    # 2n² floats, stays under the validation step's peak below)
    d, V = sla.eigh(G11, overwrite_a=True, check_finite=False, driver="evd")
    del G11
    A = weights[:, None] * (G21 @ V)  # Ω G21 V
    del G21
    c0 = held_out_constant(val, n_b, weights)
    cross, M = _heldout_from_validation(Gv or [val.gram_rows(0, n_b)], n_b, V, A, weights) if F is None else \
        _heldout_from_total(F, n_b, V, d, A, weights)
    del V  # overwritten by the helpers
    quad = sla.blas.dsyrk(1.0, A, trans=1)  # AᵀA (upper triangle)
    quad *= M  # (AᵀA) ∘ (Vᵀ G11 V), upper triangle
    del M
    diag = np.diagonal(quad).copy()
    out = []
    for alpha in alphas:
        w = 1.0 / (d + alpha * scale)
        out.append(c0 - 2.0 * float(cross @ w) + 2.0 * float(w @ quad @ w) - float(diag @ (w * w)))
    return np.asarray(out)


def _grid_by_strength(train, val, n_b: int, strengths, weights, F) -> np.ndarray | None:
    """:func:`ridge_grid_errors` one strength at a time, two side by side (:mod:`._by_strength`), or None."""
    Gt = train.gram_rows(0, n_b, fortran=True)  # worked on in place: no copy of G11 or G12 (issue 14)
    c0 = held_out_constant(val, n_b, weights)
    return strength_errors(Gt, F, strengths, c0, weights, STRENGTH_WORKERS)


def _training_rows(total: "_GramFold", Gv: np.ndarray, n_b: int) -> np.ndarray:
    """The training Gram's first ``n_b`` rows as the total's minus the validation fold's ``Gv`` (those rows,
    assembled), from the Gram the total kept with the condition check's factor (``_factor_gram``: its strict
    upper triangle, the diagonal from the sums). Used on small problems (below :data:`TOTAL_FACTOR_ROWS`; above,
    the held-out terms come from the total's factor and no validation rows are assembled).

    One Gram assembly per fold instead of two: the assembly is Python work over ``L²`` lag blocks that dominates
    small fits (the demo's SPC fits at past 10 / horizon 20: 6 of 7 assemblies per fit were the folds'). Both
    ways difference the same data (total minus fold, here after the assembly instead of before it), so they agree
    to rounding; the condition check bounds how much rounding the fit can amplify."""
    G = np.array(total._factor_gram[:n_b])  # rows [0, n_b) of the kept array: G's own entries above the diagonal
    upper = np.triu(G[:, :n_b], 1)
    G[:, :n_b] = upper + upper.T  # below the diagonal lies the factor: G's entries by symmetry instead
    G[np.diag_indices(n_b)] = total.gram_diagonal()[:n_b]
    G -= Gv
    return G


def _heldout_from_validation(held: list, n_b: int, V: np.ndarray, A: np.ndarray, weights):
    """``diag(Vᵀ G12v Ω Ω G21 V)`` and the upper triangle of ``Vᵀ G11v V`` from the validation Gram's first
    ``n_b`` rows, ``held = [Gv]`` (emptied here, so the rows are freed once used; ``V`` is overwritten)."""
    Gv = held.pop()
    B = (V.T @ Gv[:, n_b:]) * weights[None, :]  # Vᵀ G12 Ω
    cross = np.einsum("ij,ji->i", B, A)  # diag(Vᵀ G12 Ω Ω G21 V)
    del B
    release_freed_memory()  # the peak of the fold: what was freed so far goes back first
    G11v = np.asfortranarray(Gv[:, :n_b])
    del Gv
    return cross, _congruence(V, G11v)  # Vᵀ G11 V of the validation Gram (upper triangle); V, G11v overwritten


def _heldout_from_total(F: np.ndarray, n_b: int, V: np.ndarray, d: np.ndarray, A: np.ndarray, weights):
    """The same two terms as :func:`_heldout_from_validation` from the total Gram's factor ``F = [C 0; L21 L22]``.

    The validation Gram is the total minus the training Gram, ``G_tot = F Fᵀ`` and ``Vᵀ G11 V = diag(d)``
    (training), so with ``P = Cᵀ V``: ``Vᵀ G11v V = PᵀP − diag(d)`` and ``Vᵀ G12v Ω = (Ω L21 P)ᵀ − Aᵀ``. No
    validation Gram is assembled or factored (``V`` is overwritten by ``P``). The differences lose about
    ``log10(G_tot / G_val)`` digits (half a digit for three folds) against the validation Gram's own terms.
    """
    P = _lower_t_times(F, n_b, V)  # Cᵀ V
    E = (weights[:, None] * F[n_b:, :n_b]) @ P  # Ω L21 Cᵀ V = (Vᵀ G12_tot Ω)ᵀ
    E -= A  # (Vᵀ G12v Ω)ᵀ
    cross = np.einsum("ki,ki->i", E, A)
    del E
    release_freed_memory()
    M = sla.blas.dsyrk(1.0, P, trans=1)  # Vᵀ G11_tot V (upper triangle)
    M[np.diag_indices_from(M)] -= d
    return cross, M


def _congruence(V: np.ndarray, G11v: np.ndarray) -> np.ndarray:
    """The upper triangle of ``Vᵀ G11v V`` (``G11v`` symmetric positive semi-definite, a validation Gram's block).

    With the Cholesky factor ``G11v = C Cᵀ`` it is ``PᵀP``, ``P = Cᵀ V`` (``n³/3 + n³ + n³`` flops: a triangular
    product and a symmetric rank-k update, against ``4n³`` for two general products); two general products where
    ``G11v`` is only semi-definite (a small fold). Memory: Fortran-ordered ``G11v`` and ``V`` are overwritten (the
    factor, then ``P``), so no array of their size is added.
    """
    diagonal = np.diagonal(G11v).copy()
    # LAPACK potrf overwrites the lower triangle only: the strict upper one and `diagonal` still hold G11v
    C, info = sla.lapack.dpotrf(G11v, lower=1, overwrite_a=int(G11v.flags.f_contiguous), clean=0)
    if info != 0:
        G = np.triu(G11v, 1)
        G += G.T
        G[np.diag_indices_from(G)] = diagonal
        return np.triu((V.T @ G) @ V)
    P = sla.blas.dtrmm(1.0, C, V, side=0, lower=1, trans_a=1, overwrite_b=1)  # Cᵀ V
    del C
    return sla.blas.dsyrk(1.0, P, trans=1)


def ridge_map(G: np.ndarray, n_b: int, strength: float) -> np.ndarray:
    """``Θ = G21 (G11 + s I)⁻¹`` by a Cholesky solve (the normal equations of the stacked least squares)."""
    K = np.asfortranarray(G[:n_b, :n_b])
    K[np.diag_indices_from(K)] += strength
    return _cholesky_solve(K, G[:n_b, n_b:])


def _cholesky_solve(K: np.ndarray, G12: np.ndarray) -> np.ndarray:
    """``(K⁻¹ G12)ᵀ`` from the lower triangle of the Fortran-ordered ``K`` (overwritten by its factor)."""
    C = sla.cholesky(K, lower=True, check_finite=False, overwrite_a=True)
    return sla.cho_solve((C, True), G12, check_finite=False).T


def _ridge_map_from_kept(total: "_GramFold", n_b: int, strength: float, rows=None) -> np.ndarray:
    """:func:`ridge_map` of the total Gram rebuilt from ``_factor_gram`` (:func:`gram_condition_of`): its strict
    upper triangle holds ``G``'s, so ``G11``'s lower triangle is its transpose, ``G12 = F[:n_b, n_b:]`` and the
    diagonal comes from the sums: the same numbers as the assembled rows (``G`` is exactly symmetric)."""
    F = total._factor_gram
    K = np.asfortranarray(F[:n_b, :n_b].T)  # lower triangle: G11's (by symmetry); the upper one is not read
    K[np.diag_indices_from(K)] = total.gram_diagonal()[:n_b]
    K[np.diag_indices_from(K)] += strength
    if F.shape[1] > n_b:
        return _cholesky_solve(K, F[:n_b, n_b:])
    del F  # kept without its last columns (lsq._compact_kept_factor): G12 assembled again, the factor dropped first
    total.release()
    rows = total.gram_rows(0, n_b, fortran=True) if rows is None else rows  # (or assembled beforehand)
    return _cholesky_solve(K, rows[:, n_b:])


def _lower_t_times(F: np.ndarray, n_b: int, X: np.ndarray, block: int = 256) -> np.ndarray:
    """``Cᵀ X`` in place of ``X`` (``n_b`` rows), ``C`` the lower triangle of ``F[:n_b, :n_b]`` (what lies above
    it is not read), by row blocks of the result (``(Cᵀ X)[I] = C[I0:, I]ᵀ X[I0:]``, top to bottom, so a block is
    overwritten after its last use): no copy of ``C`` (a BLAS ``trmm`` would copy the strided block of ``F``, one
    array of ``G11``'s size), only of one block column at a time, its diagonal block made lower triangular."""
    for i0 in range(0, n_b, block):
        i1 = min(i0 + block, n_b)
        B = np.array(F[i0:n_b, i0:i1], order="F")
        B[: i1 - i0] = np.tril(B[: i1 - i0])
        X[i0:i1] = B.T @ X[i0:]
    return X


def fitted_ridge_map(total: _GramFold, n_b: int, alpha: float, rows=None) -> tuple[np.ndarray, float]:
    """``(Θ, scale)``: :func:`ridge_map` of the whole data at ``alpha · scale``, ``scale = tr(G) / n_rows``
    (``rows``: the total's first ``n_b`` rows, Fortran-ordered, where they were assembled beforehand, or None).

    The trace comes from the diagonal of the sums (the same numbers as the assembled Gram's diagonal, in the
    same order: the same pairwise sum as ``np.trace``) and the Gram is the one the condition check kept with its
    factor (``_factor_gram``: no second assembly; the same numbers, as the assembled Gram is exactly symmetric).
    Without it, from :data:`TOTAL_FACTOR_ROWS` regressor rows on, its first ``n_b`` rows are assembled (the map
    uses no other; 71 % of the Gram at past 100 / horizon 50); below, the whole Gram, as it always was.
    """
    if n_b >= TOTAL_FACTOR_ROWS or total._factor_gram is not None:
        scale = gram_scale(total)
        if total._factor_gram is not None:
            theta = _ridge_map_from_kept(total, n_b, alpha * scale, rows)
            total.release()
            return theta, scale
    total.release()  # memory: the condition check's factor is not needed for the map
    release_freed_memory()
    if n_b < TOTAL_FACTOR_ROWS:
        G = total.gram
        scale = float(np.trace(G)) / G.shape[0]
    else:
        G = total.gram_rows(0, n_b)
    return ridge_map(G, n_b, alpha * scale), scale


def unregularised_fold_error(train: _GramFold, val: _GramFold, n_b: int, weights, total=None) -> float | None:
    """Weighted held-out squared error of ``Θ = G21 G11⁻¹`` (training Grams), or None where the training ``G11``
    is not positive definite or its estimated condition number exceeds :data:`GRAM_CONDITION_LIMIT` (the caller
    then takes the factor route).

    The error ``tr(Ω (G22 − 2 Θ G12 + Θ G11 Θᵀ) Ω)`` uses the validation Grams, as :func:`ridge_grid_errors`,
    through the factor of ``total`` where it has one (:func:`_fold_error_from_total`: no validation Gram is
    assembled), else the validation fold's own Gram.
    """
    release_freed_memory()  # the previous fold's arrays, before this fold's peak
    Gt = train.gram_rows(0, n_b)  # only the rows of [Up; Yp; Uf] are used (of the Grams and their memory: 71 %)
    norm = one_norm(Gt[:, :n_b])
    G11, G12 = np.asfortranarray(Gt[:, :n_b]), np.asfortranarray(Gt[:, n_b:])
    del Gt  # memory: the two blocks LAPACK works on in place, not the rows as well
    try:
        C = sla.cholesky(G11, lower=True, check_finite=False, overwrite_a=True)
    except np.linalg.LinAlgError:
        return None
    if not gram_condition(C, None, norm) <= GRAM_CONDITION_LIMIT:
        return None
    # at every size: on small problems (the demo's) the validation Gram's assembly is most of the fold's CPU
    F = _total_factor(total, n_b, any_size=True)
    if F is not None:
        return _fold_error_from_total(C, G12, F, n_b, val, weights)
    theta = sla.cho_solve((C, True), G12, overwrite_b=True, check_finite=False).T
    del G12, C
    Gv = val.gram_rows(0, n_b)
    w2 = weights ** 2
    quad = np.einsum("ij,ij->i", theta @ Gv[:, :n_b], theta)
    cross = np.einsum("ij,ji->i", theta, Gv[:, n_b:])
    return float(w2 @ (val.gram_diagonal()[n_b:] - 2.0 * cross + quad))


def _fold_error_from_total(C: np.ndarray, G12: np.ndarray, F: np.ndarray, n_b: int, val: _GramFold, weights):
    """:func:`unregularised_fold_error` from the training factor ``C`` (``G11 = C Cᵀ``), the training ``G12``
    (overwritten) and the total Gram's factor ``F = [Ct 0; L21 L22]``, with no validation Gram.

    With ``G11v = Ct Ctᵀ − G11``, ``G12v = Ct L21ᵀ − G12``, ``Θ G11 = G21`` and ``Z = Θ Ct``, the held-out
    residual Gram is ``G22v + (Z − L21)(Z − L21)ᵀ − L21 L21ᵀ + Θ G12``, and ``diag(Θ G12)`` is the column sums
    of squares of ``C⁻¹ G12``: two triangular solves (as ``cho_solve``) and one triangular product.
    """
    Y = sla.blas.dtrsm(1.0, C, G12, lower=1, overwrite_b=1)  # C⁻¹ G12
    own = np.einsum("ij,ij->j", Y, Y)  # diag(G21 G11⁻¹ G12) = diag(Θ G12)
    theta_t = sla.blas.dtrsm(1.0, C, Y, lower=1, trans_a=1, overwrite_b=1)  # G11⁻¹ G12 = Θᵀ
    del C, Y
    Zt = _lower_t_times(F, n_b, theta_t)  # Ctᵀ Θᵀ = Zᵀ
    L21t = F[n_b:, :n_b].T
    base = np.einsum("ij,ij->j", L21t, L21t)
    Zt -= L21t
    resid = np.einsum("ij,ij->j", Zt, Zt) - base + own
    return float(weights ** 2 @ (val.gram_diagonal()[n_b:] + resid))
