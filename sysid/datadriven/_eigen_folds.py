"""The SPC ridge grid of large folds from one eigendecomposition per fold, two folds side by side.

For a training Gram ``[G11 G12; G21 G22]`` with ``G11 = V diag(d) Vᵀ``, ``A = Ω G21 V`` and the total Gram's
Cholesky factor ``F = [Ct 0; L21 L22]`` (the validation Gram is the total minus the training Gram), ``P = Ctᵀ V``:

    error(s) = c0 − 2 Σ_i w_i cross_i + wᵀ Q w,   w_i = 1 / (d_i + s),   c0 = tr(Ω G22v Ω)
    cross_i  = ((Ω L21 P − A) ∘ A) column sums        (diag(Vᵀ G12v Ω Ω G21 V))
    Q        = (AᵀA) ∘ (PᵀP − diag(d))                 ((AᵀA) ∘ (Vᵀ G11v V))

(the arithmetic of ``gram.ridge_grid_errors``' eigen route, ``gram._heldout_from_total``). Per fold: one
eigendecomposition, ``G21 V`` (``2 n_b² pN`` flops), ``Ctᵀ V`` (``n_b³``), ``PᵀP`` and ``AᵀA`` (``n_b³`` and
``n_b² pN``, upper triangles); then each strength is ``O(n_b²)``. The alternative scores each strength by one
Cholesky factor, two triangular solves and one triangular product (``_by_strength``).

The eigenvalue routine runs on one core (three quarters of it is the tridiagonal reduction, memory-bound
matrix-vector work that a second BLAS thread barely speeds up, and a second OpenBLAS thread spins on a busy
machine), so two folds run side by side, one per worker thread with one BLAS thread each, the GIL released
(LAPACK/BLAS through SciPy's exported functions, ``_lapack_nogil``; NumPy's products release it); any further fold
is scored by the caller's route (``third``: by strength on both workers). Memory per fold in flight: the assembled
``n_b × n`` rows and the ``n_b × n_b`` eigenvectors (MRRR: ``O(n)`` workspace, where divide and conquer needs
``2 n_b²`` more), then ``A`` and the eigenvectors; ``PᵀP`` and ``AᵀA`` are formed a block column at a time and
never held whole. That is why the route is taken only up to :data:`MAX_BYTES` (measured there).

References
----------
Golub G.H., Van Loan C.F. (2013), Matrix Computations, 4th ed., sections 8.3 (tridiagonal reduction) and 8.4.
Dhillon I.S., Parlett B.N., Vömel C. (2006), The design and implementation of the MRRR algorithm, ACM TOMS 32:533.
Hoerl A.E., Kennard R.W. (1970), Ridge regression, Technometrics 12:55.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .._lapack_nogil import eigh_lower, eigh_nogil_available, trmm_lower_t
from ._by_strength import gram_scale, held_out_constant

__all__: list = []

#: Folds scored at once by their eigendecomposition (one per worker; the machine's two cores).
EIGEN_WORKERS = 2
#: Columns of ``PᵀP`` and ``AᵀA`` formed at a time.
BLOCK = 256
#: Largest memory of the two folds' arrays in flight (``2 × 8 n_b (n + n_b)`` bytes: each fold's assembled rows and
#: eigenvectors) for which the folds are scored side by side. Measured (benchmarks/README.md, s10-spc, load 10-15),
#: the grids against fold by fold: at past 25 / horizon 25 (``n_b`` = 650) 0.7x the wall and the CPU; at past 50 /
#: horizon 25 (``n_b`` = 1,225: 58 MB) 0.80x the wall and 0.84x the CPU, peak 268 MB against 236; at past 100 /
#: horizon 50 (``n_b`` = 2,450: 231 MB) 0.95x the CPU and 0.96x the wall, but peak 539-554 MB against 438, over the
#: 500 MB target: there the folds stay fold by fold. 160 MB is what the by-strength route's arrays take there.
MAX_BYTES = 160e6


def fits_in_memory(n_b: int, n: int) -> bool:
    """Whether two folds' rows and eigenvectors (``n_b`` regressors, Gram of ``n`` rows) fit :data:`MAX_BYTES`."""
    return 2 * 8 * n_b * (n + n_b) <= MAX_BYTES


def eigen_fold_errors(train, val, n_b: int, strengths, weights, F: np.ndarray) -> np.ndarray | None:
    """Weighted held-out squared errors of ``Θ(s) = G21 (G11 + s I)⁻¹`` at each absolute strength (module
    docstring), from the training fold ``train``'s first ``n_b`` Gram rows and the total's factor ``F``
    (Fortran-ordered, its lower triangle); None where the eigenvalue routine fails."""
    Gt = train.gram_rows(0, n_b)  # C-ordered n_b × n: the column-major panel [G11; G21], leading dimension n
    n = Gt.shape[1]
    eig = eigh_lower(Gt, n_b, n)
    if eig is None:
        return None
    d, V = eig
    weights = np.asarray(weights, dtype=np.float64)
    At = _omega_g21_v_t(Gt, n_b, V, weights)  # (Ω G21 V)ᵀ, n_b × pN
    del Gt
    c0 = held_out_constant(val, n_b, weights)
    P = trmm_lower_t(F, n_b, F.shape[0], V)  # Ctᵀ V, in place of V
    cross = _cross(F, n_b, P, At, weights)
    W = 1.0 / (d[:, None] + np.asarray(strengths, dtype=np.float64)[None, :])  # n_b × strengths
    quad, diag = _quadratic(P, At, d, W)
    return c0 - 2.0 * (cross @ W) + 2.0 * quad - diag @ (W * W)


def _omega_g21_v_t(Gt: np.ndarray, n_b: int, V: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """``(Ω G21 V)ᵀ`` computed in place of ``G21`` in the panel a block of its rows at a time (row ``k`` of
    ``G21`` is the panel's column ``n_b + k``, ``Gt[:, n_b + k]``), then copied out."""
    pN = Gt.shape[1] - n_b
    for k0 in range(0, pN, BLOCK):
        cols = Gt[:, n_b + k0:n_b + min(k0 + BLOCK, pN)]  # (G21[k0:k1])ᵀ
        cols[...] = (V.T @ cols) * weights[None, k0:k0 + cols.shape[1]]
    return np.array(Gt[:, n_b:])


def _cross(F: np.ndarray, n_b: int, P: np.ndarray, At: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """``diag(Vᵀ G12v Ω Ω G21 V)`` = column sums of ``(Ω L21 P − A) ∘ A``, a block of columns of ``P`` at a time."""
    L21 = F[n_b:, :n_b]
    out = np.empty(n_b)
    for j0 in range(0, n_b, BLOCK):
        j1 = min(j0 + BLOCK, n_b)
        Et = (L21 @ P[:, j0:j1]).T * weights[None, :]  # rows j of (Ω L21 P)ᵀ
        Et -= At[j0:j1]
        out[j0:j1] = np.einsum("jk,jk->j", Et, At[j0:j1])
    return out


def _quadratic(P: np.ndarray, At: np.ndarray, d: np.ndarray, W: np.ndarray):
    """``(w_sᵀ U w_s for each strength's column w_s of W, diag(U))`` with ``U`` the upper triangle of
    ``(AᵀA) ∘ (PᵀP − diag(d))``, formed a block column at a time (``U[:j1, J]``)."""
    n_b = P.shape[1]
    quad, diag = np.zeros(W.shape[1]), np.empty(n_b)
    for j0 in range(0, n_b, BLOCK):
        j1 = min(j0 + BLOCK, n_b)
        U = P[:, :j1].T @ P[:, j0:j1]  # (PᵀP)[:j1, J]
        U *= At[:j1] @ At[j0:j1].T  # (AᵀA)[:j1, J]; diag(d) ∘ (AᵀA) taken off the diagonal below
        corner = U[j0:j1]
        corner -= np.diag(d[j0:j1] * np.einsum("jk,jk->j", At[j0:j1], At[j0:j1]))
        corner[np.tril_indices(j1 - j0, -1)] = 0.0
        diag[j0:j1] = np.diagonal(corner)
        quad += np.einsum("js,js->s", U.T @ W[:j1], W[j0:j1])
    return quad, diag


def scored_parts(total) -> list:
    """The folds of ``total.parts`` with windows in them and in their training data (the folds scored)."""
    return [f for f in total.parts if f.n_columns and total.n_columns - f.n_columns]


def side_by_side(total, n_b: int, alphas, weights, third) -> dict:
    """``{id(fold): errors or None}`` for every fold of ``total.parts`` with windows in it and in its training
    data: the first :data:`EIGEN_WORKERS` by :func:`eigen_fold_errors`, one per worker thread; the others by
    ``third(train, val, strengths)`` (the caller's route, e.g. by strength on both workers)."""
    F = total._factor if total._factor is not None else total._factor_gram
    todo = scored_parts(total)
    trains = {id(f): total.plus(f, -1.0) for f in todo}
    strengths = {id(f): np.asarray(alphas) * gram_scale(trains[id(f)]) for f in todo}
    eigen, rest = todo[:EIGEN_WORKERS], todo[EIGEN_WORKERS:]
    with ThreadPoolExecutor(max_workers=EIGEN_WORKERS, thread_name_prefix="stimsteer-ridge-folds") as pool:
        futures = {id(f): pool.submit(eigen_fold_errors, trains[id(f)], f, n_b, strengths[id(f)], weights, F)
                   for f in eigen}
        out = {k: fut.result() for k, fut in futures.items()}
    for f in rest:
        out[id(f)] = third(trains[id(f)], f, strengths[id(f)])
    return out


def errors_for(total, val, n_b: int, alphas, weights, third) -> np.ndarray | None:
    """The errors of fold ``val`` from :func:`side_by_side`, computed for every fold of ``total`` at the first
    call and kept on ``total`` for the next (keyed by the grid and weights); None where ``val`` is not one of
    ``total.parts``, the calls cannot release the GIL, the arrays would not fit :data:`MAX_BYTES`, or the fold could
    not be scored this way."""
    if not eigh_nogil_available() or not any(f is val for f in getattr(total, "parts", ())) or \
            not fits_in_memory(n_b, val.n_rows):
        return None
    key = (int(n_b), tuple(float(a) for a in alphas), np.asarray(weights, dtype=np.float64).tobytes())
    memo = total.__dict__.setdefault("_grid_memo", {})
    if key not in memo:
        memo.clear()  # one grid at a time (a refit with other settings replaces it)
        memo[key] = side_by_side(total, n_b, alphas, weights, third)
    return memo[key].get(id(val))
