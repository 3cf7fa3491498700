"""The band reduction behind ridge ARX's cross-validation: ``(R + α I)⁻¹ X`` for every strength from one orthogonal
reduction ``R = Q B Qᵀ``, against dense solves (NumPy) and the eigendecomposition (an internal equivalence).

Error bound: a backward-stable solve has relative error ``~ κ(R + α I) · eps`` (Golub & Van Loan 2013, Matrix
Computations, 4th ed., sec. 2.6 and 5.1); the tests allow a factor of 100 on it.
"""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid import arx_band
from stimsteer.sysid.arx_band import BandForm, band_betas


def _spd(d, seed=0, rows=None):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((rows or 3 * d, d))
    return X.T @ X / X.shape[0], rng.standard_normal((d, 3))


@pytest.mark.parametrize("d, b", [(1, 4), (7, 1), (10, 3), (50, 4), (33, 32), (34, 32), (35, 32), (50, 60)])
def test_band_solve_equals_the_dense_solve(d, b):
    R, X = _spd(d, seed=d + b)
    form = BandForm(R, np.empty(d * d), b)
    assert form.ab.shape == (b + 1, d)
    G = form.to_band(X)
    for alpha in (1e-6, 1.0):
        got = form.solve(G, alpha)
        want = np.linalg.solve(R + alpha * np.eye(d), X)
        np.testing.assert_allclose(got, want, rtol=1e-11, atol=1e-12 * np.abs(want).max())


def test_band_form_is_orthogonally_similar_and_leaves_r_unchanged():
    R, _X = _spd(23, seed=3)
    before = R.copy()
    form = BandForm(R, np.empty(23 * 23), 4)
    np.testing.assert_array_equal(R, before)
    B = np.zeros((23, 23))  # the band matrix from its lower band storage
    for i in range(5):
        B += np.diag(form.ab[i, : 23 - i], -i) + (np.diag(form.ab[i, : 23 - i], i) if i else 0)
    Q = form.from_band(np.eye(23))
    np.testing.assert_allclose(Q.T @ Q, np.eye(23), atol=1e-13)
    np.testing.assert_allclose(Q @ B @ Q.T, R, atol=1e-13)


def test_ill_conditioned_band_solve_is_as_accurate_as_the_eigen_route():
    # condition number 1e10 at the smallest strength: the error stays within 100 κ eps of the exact solution
    d = 40
    rng = np.random.default_rng(5)
    U, _ = np.linalg.qr(rng.standard_normal((d, d)))
    lam = np.logspace(0, -12, d)
    R = (U * lam) @ U.T
    R = 0.5 * (R + R.T)
    X = rng.standard_normal((d, 2))
    form = BandForm(R, np.empty(d * d), 5)
    G = form.to_band(X)
    for alpha in (1e-10, 1e-4):
        exact = U @ ((U.T @ X) / (lam + alpha)[:, None])
        kappa = (lam.max() + alpha) / (lam.min() + alpha)
        err = np.abs(form.solve(G, alpha) - exact).max() / np.abs(exact).max()
        assert err <= 100 * kappa * np.finfo(float).eps


def test_band_betas_with_extra_regressors_equal_the_dense_solves(monkeypatch):
    # two structures sharing a core of 12 regressors, with 2 and 1 extra ones (block elimination per structure)
    monkeypatch.setattr(arx_band, "BANDWIDTH", 3)
    R, _ = _spd(15, seed=7)
    r = np.random.default_rng(8).standard_normal((15, 2))
    extras = [np.array([12, 14]), np.array([13])]
    alphas = np.array([1e-6, 1e-2, 1.0])
    found = band_betas(R, r, 12, extras, [0, 1], alphas, np.empty(144))
    for i, e in enumerate(extras):
        idx = np.concatenate([np.arange(12), e])
        for alpha, beta in zip(alphas, found[i]):
            want = np.linalg.solve(R[np.ix_(idx, idx)] + alpha * np.eye(idx.size), r[idx])
            np.testing.assert_allclose(beta, want, rtol=1e-10, atol=1e-12)


def test_band_betas_refuse_strengths_at_the_rounding_level():
    # alpha = 0 on a singular core: no factor is attempted; the caller takes the eigen route (minimum norm)
    R, _ = _spd(6, seed=1)
    R = np.kron(np.ones((2, 2)), R)  # two copies of every regressor: singular
    r = np.ones((12, 1))
    found = band_betas(R, r, 12, [np.zeros(0, dtype=np.intp)], [0], np.array([0.0, 1.0]), np.empty(144))
    assert found == {0: None}


def test_a_panel_already_zero_below_the_band_is_kept():
    # a tridiagonal R reduced to half-bandwidth 1: every panel is zero below the band (reflectors with τ = 0, the
    # recurrence branch of the compact WY form)
    d = 9
    R = 2.0 * np.eye(d) + np.diag(np.full(d - 1, -0.5), 1) + np.diag(np.full(d - 1, -0.5), -1)
    X = np.arange(2.0 * d).reshape(d, 2)
    form = BandForm(R, np.empty(d * d), 1)
    got = form.solve(form.to_band(X), 0.1)
    np.testing.assert_allclose(got, np.linalg.solve(R + 0.1 * np.eye(d), X), rtol=1e-12)


@pytest.mark.skipif(not arx_band.in_place_available(), reason="SciPy's cython_blas pointers are not available")
@pytest.mark.parametrize("d, b", [(9, 1), (35, 32), (50, 4), (120, 16)])
def test_in_place_reduction_in_a_strided_view_equals_the_buffered_one_bit_for_bit(d, b):
    # issue 14: a fold's core is reduced in its own Gram (a view with a longer row stride), so the folds reduce side
    # by side without a core-sized buffer each; the lower triangle is kept, the upper one becomes its transpose
    R, X = _spd(d, seed=d)
    R = R + 1e-15 * np.triu(np.random.default_rng(d).standard_normal((d, d)), 1)  # not bitwise symmetric
    gram = np.full((d + 4, d + 7), 3.0)
    gram[:d, :d] = R
    outside = gram.copy()
    view = gram[:d, :d]
    buffered, in_place = BandForm(R, np.empty(d * d), b), BandForm(view, None, b)
    np.testing.assert_array_equal(in_place.ab, buffered.ab)
    for (r0, V0, T0), (r1, V1, T1) in zip(buffered._panels(), in_place._panels(), strict=True):
        assert r0 == r1
        np.testing.assert_array_equal(V1, V0)  # the reflectors held in the view, rebuilt
        np.testing.assert_array_equal(T1, T0)
    solved = in_place.solve(in_place.to_band(X), 1e-3)
    np.testing.assert_array_equal(solved, buffered.solve(buffered.to_band(X), 1e-3))
    in_place.release()
    with pytest.raises(RuntimeError, match="released"):
        in_place.to_band(X)
    np.testing.assert_array_equal(np.tril(view), np.tril(R))
    np.testing.assert_array_equal(view, view.T)
    outside[:d, :d] = view
    np.testing.assert_array_equal(gram, outside)  # nothing beyond the view was written
