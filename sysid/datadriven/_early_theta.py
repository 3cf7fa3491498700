"""The projection predictor's closed form computed from the total Gram's Cholesky factor while the held-out folds
are scored (on the core a fold's serial step leaves free), instead of after them.

:func:`~stimsteer.sysid.datadriven.kkt._projection_closed_form` takes ``D1`` (the factor's leading ``n_b × n_b``
block, copied out of the row blocks) and ``Yf1`` and returns ``Θ = Yf1 D1⁻¹`` by LAPACK ``trcon`` and ``trtrs``
(f2py wrappers, which hold the GIL). :func:`projection_theta` makes the same two LAPACK calls on the factor's own
memory (leading dimension ``n``: no copy of ``D1``) through SciPy's exported C functions, the GIL released: the
same routines on the same numbers, so the same ``Θ`` bit for bit (``tests/sysid/test_early_theta.py``). Beside the
folds (:func:`theta_task`) the columns are solved in :data:`THETA_PIECES` pieces, each a task of its own: the same
numbers to rounding.
"""

from __future__ import annotations

import ctypes

import numpy as np

from .._lapack_nogil import _CHR, _DBL, _INT, int_ref, scipy_c_function

__all__: list = []

# norm, uplo, diag, n, a, lda, rcond, work, iwork, info
_DTRCON = scipy_c_function("lapack", "dtrcon", _CHR, _CHR, _CHR, _INT, _DBL, _INT, _DBL, _DBL, _INT, _INT)
# uplo, trans, diag, n, nrhs, a, lda, b, ldb, info
_DTRTRS = scipy_c_function("lapack", "dtrtrs", _CHR, _CHR, _CHR, _INT, _INT, _DBL, _INT, _DBL, _INT, _INT)


def available() -> bool:
    """Whether SciPy's exported ``dtrcon`` and ``dtrtrs`` were found."""
    return _DTRCON is not None and _DTRTRS is not None


def theta_ready(F: np.ndarray, n_b: int, limit: float) -> np.ndarray | None:
    """The right-hand sides ``Yf1ᵀ`` of :func:`projection_theta` (Fortran-ordered, ``n_b × (n − n_b)``), to be
    solved in place by :func:`solve_theta_columns`; None where ``_projection_closed_form`` returns none (estimated
    condition number of ``D1`` above ``limit``, or ``trcon`` failing) or the exported functions are missing."""
    n = F.shape[0]
    if not available() or F.dtype != np.float64 or not F.flags.f_contiguous or not 0 < n_b < n:
        return None
    rcond, info = ctypes.c_double(0.0), ctypes.c_int(0)
    work, iwork = np.empty(3 * n_b), np.empty(n_b, dtype=np.intc)
    _DTRCON(b"1", b"L", b"N", int_ref(n_b), F.ctypes.data_as(_DBL), int_ref(n), ctypes.byref(rcond),
            work.ctypes.data_as(_DBL), iwork.ctypes.data_as(_INT), ctypes.byref(info))
    if info.value != 0 or not rcond.value * limit >= 1.0:
        return None
    return np.asfortranarray(F[n_b:, :n_b].T)  # Yf1ᵀ, solved in place as the wrapper does


def solve_theta_columns(F: np.ndarray, rhs: np.ndarray, c0: int, c1: int) -> bool:
    """Solve columns ``[c0, c1)`` of :func:`theta_ready`'s right-hand sides in place (``D1⁻ᵀ``, LAPACK ``trtrs``);
    False where ``trtrs`` finds ``D1`` singular. Columns are independent: pieces can be solved side by side."""
    n, n_b, info = F.shape[0], rhs.shape[0], ctypes.c_int(0)
    if c1 > c0:
        _DTRTRS(b"L", b"T", b"N", int_ref(n_b), int_ref(c1 - c0), F.ctypes.data_as(_DBL), int_ref(n),
                ctypes.cast(rhs.ctypes.data + 8 * n_b * c0, _DBL), int_ref(n_b), ctypes.byref(info))
    return info.value == 0


def theta_pieces(n_columns: int, pieces: int = 2) -> list:
    """Column ranges of :func:`solve_theta_columns`: ``pieces`` of them, cut at multiples of 16 columns."""
    cuts = [16 * round(n_columns * k / pieces / 16) for k in range(pieces)] + [n_columns]
    return [(a, b) for a, b in zip(cuts[:-1], cuts[1:]) if b > a]


def projection_theta(F: np.ndarray, n_b: int, limit: float):
    """``Θ`` of ``_projection_closed_form`` for the row blocks of the lower Cholesky factor ``F`` (Fortran-ordered,
    ``n × n``, strict upper triangle zero), or None where it returns none (estimated condition number of ``D1``
    above ``limit``, or ``trcon`` failing) or the exported functions are missing: the caller then takes that route.
    One ``trtrs`` for every column (the numbers of the closed form, bit for bit).

    Returns
    -------
    theta : ndarray, shape (n − n_b, n_b)
        A C-ordered view of the Fortran-ordered solution, as ``_projection_closed_form`` returns it.
    """
    rhs = theta_ready(F, n_b, limit)
    if rhs is None or not solve_theta_columns(F, rhs, 0, rhs.shape[1]):
        return None
    return rhs.T


#: The results computed beside the folds, set on the predictor and each taken once (:func:`taken`).
EARLY = ("_theta_early", "_gaps_early", "_map_early", "_scale_early")


def clear_early(owner) -> None:
    """Set every result of :data:`EARLY` on ``owner`` to None (none left by an earlier fit that failed midway)."""
    for name in EARLY:
        setattr(owner, name, None)


def taken(owner, name: str):
    """``owner.<name>``, one of :data:`EARLY` (None where it was not computed), set back to None: each result is
    taken once, and a fit that fails midway leaves none for the next one."""
    value = getattr(owner, name, None)
    setattr(owner, name, None)
    return value


#: Pieces of ``Θ``'s columns solved as separate tasks beside the folds (:func:`theta_task`). One solve of all
#: 1,000 columns (past 100 / horizon 50) took 0.16-0.19 s on one worker: begun while a fold's factor ran, it held
#: that worker when the fold's two solves came due, and the chain of folds waited (the lead's trace, 0.13 s). Two
#: pieces of 0.065 s each; the numbers move by rounding (4e-17 of entries of order 1), no longer bit for bit
#: those of one solve.
THETA_PIECES = 2


def theta_task(owner, total, n_b: int, limit: float, gaps=None, unscaled=None):
    """Tasks that set ``owner._theta_early`` to ``Θ`` of the total's kept factor ``F`` (:func:`projection_theta`'s
    numbers to rounding; run while the folds are scored, the Hankel predictor's ``_blocks`` takes it): the
    condition check and right-hand sides, then :data:`THETA_PIECES` column pieces side by side (a tuple: both
    workers, ``_hankel_folds._chain``), then, side by side, ``owner._gaps_early = gaps(theta, F)`` and
    ``owner._map_early = (theta, unscaled(theta))`` for those given; None where there is no such factor."""
    F = getattr(total, "_factor", None)
    clear_early(owner)
    if F is None or not available():
        return None
    state = {}

    def first():
        state["rhs"] = theta_ready(F, n_b, limit)
        state["ok"] = [True] * THETA_PIECES

    def piece(k):
        def run():
            rhs = state.get("rhs")
            if rhs is not None:
                ranges = theta_pieces(rhs.shape[1], THETA_PIECES)
                if k < len(ranges):
                    state["ok"][k] = solve_theta_columns(F, rhs, *ranges[k])
        return run

    def second():
        if owner._theta_early is not None:
            owner._gaps_early = gaps(owner._theta_early, F)

    def third():
        if owner._theta_early is not None:
            owner._map_early = (owner._theta_early, unscaled(owner._theta_early))

    def collect():
        rhs = state.pop("rhs", None)
        owner._theta_early = rhs.T if rhs is not None and all(state["ok"]) else None
    after = tuple(task for task, given in ((second, gaps), (third, unscaled)) if given is not None)
    return [first, tuple(piece(k) for k in range(THETA_PIECES)), collect] + ([after] if after else [])
