"""The total Gram's Cholesky factor with the GIL released, so that other work runs beside it.

SciPy's f2py wrapper ``scipy.linalg.lapack.dpotrf`` holds the GIL for the whole call: at past 100 / horizon 50 the
condition check's factor of the 3,450-row Gram (0.3 s, one BLAS thread) ran alone while the Hankel predictor's
first held-out fold waited. The same LAPACK routine through SciPy's exported C function
(:func:`~stimsteer.sysid._lapack_nogil.potrf_block`, ``pocon_block``) gives the same numbers with the GIL
released.
"""

from __future__ import annotations

import numpy as np

from .._lapack_nogil import _DPOCON, _DPOTRF, pocon_block, potrf_block

__all__: list = []


def potrf_lower(G: np.ndarray, clean: bool):
    """``(F, info)`` as ``scipy.linalg.lapack.dpotrf(G.T, lower=1, overwrite_a=1, clean=clean)`` for the C-ordered
    symmetric ``G`` (the same LAPACK routine, in ``G``'s memory; ``F`` is ``G.T``), with the GIL released where
    SciPy's exported function is found. ``clean`` zeroes the strict upper triangle (by column blocks: no temporary
    of ``G``'s size); without it, ``G``'s own entries stay there."""
    n = G.shape[0]
    if _DPOTRF is None or not G.flags.c_contiguous or G.dtype != np.float64 or G.shape != (n, n):
        import scipy.linalg as sla

        return sla.lapack.dpotrf(G.T, lower=1, overwrite_a=1, clean=1 if clean else 0)
    F = G.T
    info = potrf_block(F)
    if clean:  # as f2py's clean=1: the strict upper triangle zeroed
        for j0 in range(0, n, 256):
            j1 = min(j0 + 256, n)
            F[:j0, j0:j1] = 0.0
            F[j0:j1, j0:j1] = np.tril(F[j0:j1, j0:j1])
    return F, info


def pocon_lower(F: np.ndarray, norm: float) -> float | None:
    """LAPACK ``pocon``'s reciprocal condition estimate (0.0 where it fails) of ``F Fᵀ`` from the lower triangle of the
    square Fortran-ordered ``F``, the GIL released; None where that call cannot be made here (the caller takes
    SciPy's wrapper, the same routine)."""
    n = F.shape[0]
    if _DPOCON is None or F.ndim != 2 or F.shape != (n, n) or not F.flags.f_contiguous or F.dtype != np.float64:
        return None
    return pocon_block(F, norm)
