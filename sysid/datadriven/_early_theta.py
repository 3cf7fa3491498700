"""The projection predictor's closed form computed from the total Gram's Cholesky factor while the held-out folds
are scored (on the core a fold's serial step leaves free), instead of after them.

:func:`~stimsteer.sysid.datadriven.kkt._projection_closed_form` takes ``D1`` (the factor's leading ``n_b × n_b``
block, copied out of the row blocks) and ``Yf1`` and returns ``Θ = Yf1 D1⁻¹`` by LAPACK ``trcon`` and ``trtrs``
(f2py wrappers, which hold the GIL). :func:`projection_theta` makes the same two LAPACK calls on the factor's own
memory (leading dimension ``n``: no copy of ``D1``) through SciPy's exported C functions, the GIL released: the
same routines on the same numbers, so the same ``Θ`` bit for bit (``tests/sysid/test_early_theta.py``).
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


def projection_theta(F: np.ndarray, n_b: int, limit: float):
    """``Θ`` of ``_projection_closed_form`` for the row blocks of the lower Cholesky factor ``F`` (Fortran-ordered,
    ``n × n``, strict upper triangle zero), or None where it returns none (estimated condition number of ``D1``
    above ``limit``, or ``trcon`` failing) or the exported functions are missing: the caller then takes that route.

    Returns
    -------
    theta : ndarray, shape (n − n_b, n_b)
        A C-ordered view of the Fortran-ordered solution, as ``_projection_closed_form`` returns it.
    """
    n = F.shape[0]
    if not available() or F.dtype != np.float64 or not F.flags.f_contiguous or not 0 < n_b < n:
        return None
    rcond, info = ctypes.c_double(0.0), ctypes.c_int(0)
    work, iwork = np.empty(3 * n_b), np.empty(n_b, dtype=np.intc)
    _DTRCON(b"1", b"L", b"N", int_ref(n_b), F.ctypes.data_as(_DBL), int_ref(n), ctypes.byref(rcond),
            work.ctypes.data_as(_DBL), iwork.ctypes.data_as(_INT), ctypes.byref(info))
    if info.value != 0 or not rcond.value * limit >= 1.0:
        return None
    rhs = np.asfortranarray(F[n_b:, :n_b].T)  # Yf1ᵀ, solved in place as the wrapper does
    _DTRTRS(b"L", b"T", b"N", int_ref(n_b), int_ref(n - n_b), F.ctypes.data_as(_DBL), int_ref(n),
            rhs.ctypes.data_as(_DBL), int_ref(n_b), ctypes.byref(info))
    return rhs.T if info.value == 0 else None


#: The results computed beside the folds, set on the predictor and each taken once (:func:`taken`).
EARLY = ("_theta_early", "_gaps_early", "_map_early", "_scale_early")


def taken(owner, name: str):
    """``owner.<name>``, one of :data:`EARLY` (None where it was not computed), set back to None: each result is
    taken once, and a fit that fails midway leaves none for the next one."""
    value = getattr(owner, name, None)
    setattr(owner, name, None)
    return value


def theta_task(owner, total, n_b: int, limit: float, gaps=None, unscaled=None):
    """Tasks that set ``owner._theta_early`` to :func:`projection_theta` of the total's kept factor ``F`` (run while
    the folds are scored; the Hankel predictor's ``_blocks`` takes it), then, side by side (a tuple: both workers,
    ``_hankel_folds._chain``), ``owner._gaps_early = gaps(theta, F)`` and ``owner._map_early = (theta, unscaled(theta))``
    for those given; None where there is no such factor."""
    F = getattr(total, "_factor", None)
    owner._theta_early = owner._gaps_early = owner._map_early = None
    if F is None or not available():
        return None

    def first():
        owner._theta_early = projection_theta(F, n_b, limit)

    def second():
        if owner._theta_early is not None:
            owner._gaps_early = gaps(owner._theta_early, F)

    def third():
        if owner._theta_early is not None:
            owner._map_early = (owner._theta_early, unscaled(owner._theta_early))
    after = tuple(task for task, given in ((second, gaps), (third, unscaled)) if given is not None)
    return [first, after] if after else [first]
