"""Tests of stimsteer.sysid.hankel: block-Hankel, mosaic and Page matrices, and the streamed row-space factor.

Expected matrices are built here with explicit loops over columns (the definition, common practice, no source) and
compared with the strided constructions.
"""

import numpy as np
import pytest

from stimsteer.sysid import Session, SessionError
from stimsteer.sysid.hankel import (
    block_hankel,
    combine_factors,
    hankel_column_count,
    mosaic_hankel,
    mosaic_page,
    page_matrix,
    row_space_factor,
    session_hankel,
    session_page,
)


def _naive_hankel(w, L):
    return np.column_stack([w[j:j + L].reshape(-1) for j in range(w.shape[0] - L + 1)])


def test_block_hankel_matches_the_definition_time_major(rng):
    w = rng.standard_normal((23, 3))
    H = block_hankel(w, 5)
    assert H.shape == (15, 19) and H.dtype == np.float64
    np.testing.assert_array_equal(H, _naive_hankel(w, 5))
    # time block t holds channels of sample j + t: rows [t*c, (t+1)*c)
    np.testing.assert_array_equal(H[2 * 3:3 * 3, 7], w[9])
    assert H.flags.c_contiguous and H.flags.writeable


def test_block_hankel_of_a_one_dimensional_signal_is_the_scalar_hankel():
    H = block_hankel(np.arange(6.0), 3)
    np.testing.assert_array_equal(H, [[0, 1, 2, 3], [1, 2, 3, 4], [2, 3, 4, 5]])


def test_page_matrix_has_non_overlapping_columns_and_drops_the_tail():
    w = np.arange(14.0).reshape(7, 2)
    P = page_matrix(w, 3)
    assert P.shape == (6, 2)
    np.testing.assert_array_equal(P[:, 0], w[0:3].reshape(-1))
    np.testing.assert_array_equal(P[:, 1], w[3:6].reshape(-1))


def test_mosaic_concatenates_segments_and_skips_short_ones(rng):
    w = rng.standard_normal((40, 2))
    w[10] = np.nan  # a masked sample between two segments is never read
    segs = [(0, 10), (11, 14), (14, 40)]
    H = mosaic_hankel(w, 4, segs)
    expect = np.hstack([_naive_hankel(w[0:10], 4), _naive_hankel(w[14:40], 4)])
    np.testing.assert_array_equal(H, expect)
    assert H.shape[1] == hankel_column_count(segs, 4) == 7 + 0 + 23
    P = mosaic_page(w, 4, segs)
    assert P.shape[1] == hankel_column_count(segs, 4, page=True) == 2 + 0 + 6


def test_session_hankel_never_spans_a_trial_boundary_or_a_masked_sample(rng):
    u = rng.standard_normal((60, 1))
    y = rng.standard_normal((60, 2))
    mask = np.ones(60, bool)
    mask[25] = False
    u[25] = np.nan
    s = Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, 30), (30, 60)], mask=mask)
    H = session_hankel(s, 5, which="uy")
    # segments [0,25), [26,30), [30,60): 21 + 0 + 26 columns
    assert H.shape == (15, 47)
    w = np.hstack([u, y])
    np.testing.assert_array_equal(H, np.hstack([_naive_hankel(w[0:25], 5), _naive_hankel(w[30:60], 5)]))
    assert np.isfinite(H).all()
    assert session_hankel(s, 5).shape == (5, 47)
    assert session_hankel(s, 5, which="y").shape == (10, 47)
    assert session_page(s, 5).shape == (5, 5 + 6)


def test_row_space_factor_reproduces_the_gram_matrix_exactly(rng):
    u = rng.standard_normal((500, 2))
    y = rng.standard_normal((500, 3))
    segs = [(0, 120), (130, 500)]
    H = np.vstack([mosaic_hankel(u, 6, segs), mosaic_hankel(y, 6, segs)])
    F, k = row_space_factor([u, y], 6, segs, max_columns=37)  # many chunks, several combine steps
    assert k == H.shape[1] and F.shape == (30, 30)
    np.testing.assert_allclose(F @ F.T, H @ H.T, rtol=0, atol=1e-12 * np.abs(H @ H.T).max())
    np.testing.assert_allclose(np.linalg.svd(F, compute_uv=False), np.linalg.svd(H, compute_uv=False), rtol=1e-12)


@pytest.mark.parametrize("n_workers", [1, 2, 3])
def test_row_space_factor_is_the_same_with_any_number_of_workers(rng, n_workers):
    u, y = rng.standard_normal((400, 2)), rng.standard_normal((400, 1))
    segs = [(0, 150), (150, 151), (160, 400)]
    H = np.vstack([mosaic_hankel(u, 5, segs), mosaic_hankel(y, 5, segs)])
    F, k = row_space_factor([u, y], 5, segs, max_columns=23, n_workers=n_workers)  # chunks folded by tpqrt
    G = H @ H.T
    assert k == H.shape[1] and F.shape == (15, 15) and np.allclose(F, np.tril(F), rtol=0, atol=0)
    np.testing.assert_allclose(F @ F.T, G, rtol=0, atol=1e-13 * np.abs(G).max())
    R = np.linalg.qr(H.T, mode="r")  # the factor of one plain QR, up to the signs of its rows
    np.testing.assert_allclose(np.abs(F), np.abs(R.T), rtol=0, atol=1e-12 * np.abs(R).max())


def test_row_space_factor_with_fewer_columns_than_rows(rng):
    w = rng.standard_normal((8, 3))
    H = block_hankel(w, 4)  # 12 rows, 5 columns
    F, k = row_space_factor([w], 4)
    assert F.shape == (12, 5) and k == 5
    np.testing.assert_allclose(F @ F.T, H @ H.T, atol=1e-12)
    assert combine_factors([], 7).shape == (7, 0)


@pytest.mark.parametrize("n_columns", [200, 9])  # streamed chunks (tpqrt) and fewer columns than rows (one QR)
def test_row_space_factor_in_a_row_order_is_the_triangular_factor_of_the_reordered_matrix(rng, n_columns):
    u, y = rng.standard_normal((n_columns + 5, 2)), rng.standard_normal((n_columns + 5, 1))
    H = np.vstack([block_hankel(u, 6), block_hankel(y, 6)])
    order = np.concatenate([np.arange(4), 12 + np.arange(2), np.arange(4, 12), 12 + np.arange(2, 6)])  # [Up; Yp; ..]
    F, k = row_space_factor([u, y], 6, max_columns=17, row_order=order)
    R = np.linalg.qr(H[order].T, mode="r")  # reference: NumPy's QR of the reordered matrix, up to row signs
    assert k == H.shape[1] and np.array_equal(F, np.tril(F))
    # rounding, the author's margin (measured 2.5e-16 of the largest entry at most, seed 0)
    np.testing.assert_allclose(np.abs(F), np.abs(R.T), rtol=0, atol=1e-12 * np.abs(R).max())
    with pytest.raises(ValueError, match="permutation"):
        row_space_factor([u, y], 6, row_order=order[:-1])


@pytest.mark.parametrize("widths, scrambled", [((12, 12, 12), False), ((7, 9), False), ((12, 3), False),
                                               ((3, 4), False), ((12, 12), True)])
def test_combining_triangular_and_trapezoidal_factors_is_the_qr_of_the_stack(rng, widths, scrambled):
    # lower trapezoidal factors (n × k) are folded in by tpqrt; fewer columns than rows in all, or a factor that is
    # not triangular (rows reordered), take the stacked QR.
    # Reference: NumPy's QR of the stacked transposed factors (Golub & Van Loan 2013, section 5.2), up to row signs
    factors = [np.linalg.qr(rng.standard_normal((k, 12)), mode="r").T for k in widths]
    for f in factors:
        f[:, :] = np.tril(f)  # exactly lower trapezoidal, as the factors are
    if scrambled:
        factors[1] = factors[1][::-1].copy()
    kept = [f.copy() for f in factors]
    F = combine_factors(factors, 12)
    R = np.linalg.qr(np.vstack([f.T for f in factors]), mode="r")
    assert F.shape == (12, min(12, sum(widths))) and np.array_equal(F, np.tril(F))
    # rounding, the author's margin (measured 2.2e-16 of the largest entry at most, seed 0)
    np.testing.assert_allclose(np.abs(F), np.abs(R.T), rtol=0, atol=1e-12 * np.abs(R).max())
    assert all(np.array_equal(a, b) for a, b in zip(factors, kept))  # inputs are not modified


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: block_hankel(np.zeros((3, 1)), 4), "needs at least 4 samples; got 3"),
        (lambda: block_hankel(np.zeros((5, 1)), 0), "depth must be a whole number"),
        (lambda: block_hankel(np.zeros((5, 1)), 2.5), "depth must be a whole number"),
        (lambda: block_hankel(np.zeros((2, 2, 2)), 1), "must be a 2-D time-major array"),
        (lambda: block_hankel(np.array([0.0, np.nan, 1.0]), 2), "NaN or infinite values at sample 1"),
        (lambda: page_matrix(np.zeros((3, 1)), 4), "needs at least 4 samples"),
        (lambda: mosaic_hankel(np.zeros((10, 1)), 4, [(0, 3), (5, 8)]), "the longest is 3"),
        (lambda: mosaic_hankel(np.zeros((10, 1)), 2, [(5, 12)]), r"segment \[5, 12\) is empty or outside"),
        (lambda: mosaic_hankel(np.r_[np.zeros(5), np.nan], 2, [(0, 6)]), "at sample 5"),
        (lambda: row_space_factor([np.zeros((5, 1)), np.zeros((6, 1))], 2), "same number of samples"),
        (lambda: row_space_factor([np.zeros((5, 1))], 6), "the longest is 5"),
        (lambda: session_hankel(Session(u=np.zeros((5, 1)), y=np.zeros((5, 1)), sample_rate_hz=1.0), 2,
                                which="x"), "which must be 'u', 'y' or 'uy'"),
    ],
)
def test_bad_input_raises_a_clear_error(call, match):
    with pytest.raises(SessionError, match=match):
        call()


def test_inputs_are_not_modified(rng):
    w = rng.standard_normal((30, 2))
    before = w.copy()
    block_hankel(w, 4)
    page_matrix(w, 4)
    mosaic_hankel(w, 4, [(0, 12), (12, 30)])
    row_space_factor([w], 4, [(0, 30)])
    np.testing.assert_array_equal(w, before)
