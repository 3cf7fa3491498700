"""The total Gram's Cholesky factor with the GIL released (``datadriven._nogil_cholesky``) against SciPy's LAPACK
wrapper ``scipy.linalg.lapack.dpotrf`` (the reference: the same routine, so the same numbers bit for bit), and the
Hankel predictor's first held-out fold begun beside it (``_hankel_folds.start_first_fold``): the same errors."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid.datadriven import _hankel_folds as hf
from stimsteer.sysid.datadriven import _nogil_cholesky as nc
from stimsteer.sysid.datadriven import gram as gr


@pytest.mark.parametrize("clean", [True, False])
@pytest.mark.parametrize("n", [7, 300, 600])  # a tiny matrix and two above LAPACK's usual block of 64 (from memory)
def test_potrf_lower_equals_scipys_dpotrf_bit_for_bit(n, clean):
    X = np.random.default_rng(n).standard_normal((n, n + 40))  # 40 more columns than rows: X Xᵀ positive definite
    G = X @ X.T
    ref, info_ref = sla.lapack.dpotrf(G.copy().T, lower=1, overwrite_a=0, clean=1 if clean else 0)
    F, info = nc.potrf_lower(G, clean=clean)
    assert info == info_ref == 0
    assert np.shares_memory(F, G)  # in place
    np.testing.assert_array_equal(F, ref)


def test_potrf_lower_reports_a_matrix_that_is_not_positive_definite():
    G = np.diag([1.0, -1.0, 2.0])
    _ref, info_ref = sla.lapack.dpotrf(G.copy().T, lower=1)
    # 2: LAPACK's info, the order of the first leading minor not positive (LAPACK Users' Guide, dpotrf)
    assert nc.potrf_lower(G, clean=True)[1] == info_ref == 2


@pytest.mark.parametrize("n", [7, 300, 600])
def test_pocon_lower_equals_scipys_dpocon(n):
    X = np.random.default_rng(n).standard_normal((n, n + 40))
    X[:, :n] *= np.logspace(0, -3, n)[:, None]  # rows of unequal scale: a condition number well above 1
    G = X @ X.T
    F = np.asfortranarray(np.linalg.cholesky(G))
    norm = float(np.abs(G).sum(axis=0).max())
    ref, info = sla.lapack.dpocon(F, norm, uplo="L")  # the reference: SciPy's wrapper of the same routine
    # to rounding, not bit for bit: equal in isolation (300 calls each, with and without a busy core), but one of
    # five full runs of a fresh clone found them apart at n = 300 (pocon's estimate goes through BLAS calls whose
    # rounding may follow the threads at hand); 1e-12 is our margin
    assert info == 0 and nc.pocon_lower(F, norm) == pytest.approx(ref, rel=1e-12)
    assert gr.gram_condition(F, G) == pytest.approx(1.0 / ref, rel=1e-12)
    assert nc.pocon_lower(np.ascontiguousarray(F), norm) is None  # C-ordered: the wrapper's route


def test_the_first_fold_begun_before_the_check_gives_the_same_errors(monkeypatch):
    # reference: the same fold errors with the first fold begun after the check (an internal equivalence)
    from tests.sysid.test_hankel_folds import _session

    m, p, past, horizon = 1, 2, 5, 4  # the sizes and pieces of test_hankel_folds.folds_setup (chosen for speed)
    pieces = [(0, 600, 0), (600, 1200, 1), (1200, 1800, 2), (1800, 2400, 0)]
    n_b, w = (m + p) * past + m * horizon, np.linspace(0.5, 2.0, 8)  # 8 weights: p · horizon outputs
    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)  # 1 row: the small session takes the large folds' route
    out = []
    for early in (False, True):
        fs, *_ = gr.collect_gram(_session(), pieces, 3, m, p, past, horizon)
        folds = type("F", (list,), {"total": None, "first_fold": None})(fs)
        folds.total = gr.total_fold(folds)
        started = []

        def begin():
            folds.first_fold = hf.start_first_fold(folds, n_b)
            started.append(folds.first_fold is not None)
        gr.gram_condition_of(folds.total, keep=True, begin=begin if early else None)
        assert started == ([True] if early else [])
        out.append(hf.fold_errors(folds, folds.total, n_b, w))
        assert folds.first_fold is None
    assert out[0] == out[1]
