"""The fitting part's projection decomposed through the eigendecomposition of its Gram (``_gram_pairs``).

References: NumPy's SVD (LAPACK ``dgesdd``) for the pairs themselves, with the identity "the left singular vectors of
``M`` are the eigenvectors of ``M Mᵀ``, its singular values the square roots of their eigenvalues" (Golub & Van Loan
2013, Matrix Computations, 4th ed., sec. 8.6.1); for the fit, the same estimator with the route switched off (the
QR and SVD of before): the models handed out come from all data, so they must not move at all.
"""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid.subspace import SubspaceId, factor, prepare
from stimsteer.sysid.subspace import _gram_pairs
from stimsteer.sysid._lapack_nogil import eigh_nogil_available

from tests.sysid.test_subspace_factor import _session, _windows

pytestmark = pytest.mark.skipif(not eigh_nogil_available(), reason="the route needs SciPy's exported dsyevr")


def _wide(k, nc, decay, seed=0):
    rng = np.random.default_rng(seed)
    left, _ = np.linalg.qr(rng.standard_normal((k, k)))
    right, _ = np.linalg.qr(rng.standard_normal((nc, k)))
    return (left * decay) @ right.T, decay


@pytest.mark.parametrize("count", [20, 60, 100])
def test_the_pairs_are_numpys_svd_to_rounding(count):
    mat, _ = _wide(60, 150, np.geomspace(10.0, 0.05, 60))
    U, s, floor = _gram_pairs.pairs_from_gram(mat, count)
    U_ref, s_ref, _ = np.linalg.svd(mat, full_matrices=False)
    held = min(count, 60)
    assert U.shape == (60, held) and s.shape == (held,) and U.flags.c_contiguous
    np.testing.assert_allclose(s, s_ref[:held], rtol=1e-9)  # the smallest: eps k (s₁/s_k)² ≈ 5e-10 at most
    lead = 20  # gaps of 9 % between neighbours: each leading vector is determined to rounding, up to its sign
    np.testing.assert_allclose(np.abs(np.sum(U[:, :lead] * U_ref[:, :lead], axis=0)), 1.0, atol=1e-12)
    np.testing.assert_allclose(U.T @ U, np.eye(held), atol=1e-12)
    # a lower bound of every singular value, above the rank cut-off 1e-8 max(s₁, 1) of SubspaceId._supported
    assert 1e-8 * max(s_ref[0], 1.0) < floor <= s_ref[-1]


@pytest.mark.parametrize("smallest", [1e-5, 1e-9])
def test_a_matrix_with_a_value_near_the_rank_cut_off_is_left_to_the_svd(smallest):
    decay = np.geomspace(1.0, 0.1, 40)
    decay[-1] = smallest  # 1e-5: below the route's floor 1e-4 of the largest; 1e-9: below the rank cut-off 1e-8
    mat, _ = _wide(40, 90, decay, seed=1)
    assert _gram_pairs.pairs_from_gram(mat, 10) is None
    assert _gram_pairs.pairs_from_gram(mat.T, 10) is None  # (tall: the route is for wide matrices)


@pytest.mark.parametrize("weighting", ["n4sid", "moesp", "cva"])
@pytest.mark.parametrize("pairs_first", [64, 3])
def test_the_model_is_that_of_the_svd_bit_for_bit_and_the_table_equal_to_rounding(monkeypatch, weighting,
                                                                                    pairs_first):
    """With 3 pairs taken first, the orders up to 10 ask for more (``_enough``): the scores stay those of the SVD."""
    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)  # 0: the factor route at this small size
    monkeypatch.setattr(factor, "SCORING_PAIRS", pairs_first)
    session = _session(noise=0.3, seed=4)
    kw = dict(past_steps=6, future_steps=5, weighting=weighting)
    calls = []
    pairs = _gram_pairs.pairs_from_gram
    monkeypatch.setattr(factor, "pairs_from_gram", lambda mat, n: calls.append(pairs(mat, n)) or calls[-1])
    got = SubspaceId(**kw).fit(session)
    assert calls and all(c is not None for c in calls)  # taken, for the fitting part only (all data's: the SVD)
    assert len(calls) == (1 if pairs_first == 64 else 2)  # (the second: more pairs for the larger orders)
    monkeypatch.setattr(factor, "pairs_from_gram", lambda mat, n: None)
    ref = SubspaceId(**kw).fit(session)
    assert got.order_ == ref.order_ and got.feedthrough_ == ref.feedthrough_
    for name in ("A", "B", "C", "D", "K", "innovation_cov"):
        np.testing.assert_array_equal(getattr(got.model_, name), getattr(ref.model_, name))
    np.testing.assert_array_equal(got.predict_many(*_windows()), ref.predict_many(*_windows()))
    np.testing.assert_array_equal(got.singular_values_, ref.singular_values_)
    np.testing.assert_allclose(got.order_table_["heldout_error"], ref.order_table_["heldout_error"], rtol=1e-10)
    assert (got.order_table_["stable"] == ref.order_table_["stable"]).all()


def test_orders_scored_again_after_forget_orders_give_the_numbers_of_a_first_scoring(monkeypatch):
    """More pairs taken for a large order are dropped by ``forget_orders`` (as the nested orders' QR is): a round
    scored again is computed from the pairs it was first computed from."""
    import contextlib

    from stimsteer.sysid.subspace import selection

    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)
    monkeypatch.setattr(factor, "SCORING_PAIRS", 3)
    est = SubspaceId(past_steps=6, future_steps=5)
    session = _session(noise=0.3, seed=4)
    cfg = est._settings(session)
    with contextlib.ExitStack() as stack:
        _all, proj, check, *_rest = prepare.projections(session, cfg, "n4sid", stack)
    L = cfg["layout"]
    first = selection.score_orders(proj, check, L, range(1, 3), (False,))
    assert proj.U.shape[1] == 8  # 3 taken first; order 2 reads 4 columns: max(4 n, 3) = 8 taken
    selection.score_orders(proj, check, L, range(3, 6), (False,))
    assert proj.U.shape[1] == 20  # order 5 reads 10: all 20 (p f) taken
    proj.forget_orders()
    assert proj.U.shape[1] == 3
    assert selection.score_orders(proj, check, L, range(1, 3), (False,)) == first
