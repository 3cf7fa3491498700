"""Subspace identification at long windows: the B, D normal equations from the block-Toeplitz structure equal the
dense-basis ones, in bounded memory; the held-out error through the predictor's parts equals the dense map."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from stimsteer.sysid.subspace import gram, heldout, markov, projection


def _dense_normal_equations(proj, gamma, A, C, feedthrough):
    """The normal equations as built before (one dense (p f × m f) basis matrix per unknown)."""
    L, S = proj.layout, proj.S
    Hs = projection._toeplitz_basis(A, C, L, feedthrough)
    Q = np.linalg.qr(gamma)[0]
    P1 = Q @ Q.T
    S_uu, S_yu = S[np.ix_(L.Uf, L.Uf)], S[np.ix_(L.Yf, L.Uf)]
    Sc_uu, Sc_yu = proj.given_past
    target = S_yu + P1 @ (Sc_yu - S_yu)
    image = Hs @ S_uu + P1 @ (Hs @ (Sc_uu - S_uu))
    flat = Hs.reshape(Hs.shape[0], -1)
    return flat @ image.reshape(Hs.shape[0], -1).T, flat @ target.reshape(-1), Q, target


def _projection(past, future, m, p, T=3000, seed=0):
    rng = np.random.default_rng(seed)
    L = gram._Layout(past, future, m, p)
    z = rng.standard_normal((T, L.nz))
    return projection._Projection(z.T @ z / T, L, "n4sid"), rng


@pytest.mark.parametrize("feedthrough", [False, True])
def test_structured_normal_equations_equal_the_dense_basis(feedthrough):
    proj, rng = _projection(4, 6, 2, 3)
    n = 4
    A = 0.3 * rng.standard_normal((n, n))
    C = rng.standard_normal((3, n))
    gamma = proj.gamma(n)
    M_ref, rhs_ref, Q, target = _dense_normal_equations(proj, gamma, A, C, feedthrough)
    S = proj.S
    L = proj.layout
    S_uu = S[np.ix_(L.Uf, L.Uf)]
    M, rhs = markov.normal_equations(markov.pattern_blocks(A, C, L.f, feedthrough), Q, S_uu,
                                     proj.given_past[0] - S_uu, target, n, L.m, feedthrough)
    np.testing.assert_allclose(M, M_ref, rtol=1e-11, atol=1e-11 * np.abs(M_ref).max())
    np.testing.assert_allclose(rhs, rhs_ref, rtol=1e-11, atol=1e-11 * np.abs(rhs_ref).max())


def test_b_d_at_a_long_future_window_stays_small_in_memory():
    # f = 50 future blocks, 20 outputs, 3 inputs, order 10 with a direct term: the dense basis alone was
    # (3·10 + 20·3) x 1000 x 150 doubles = 108 MB, and three such arrays were live at once (over 300 MB).
    proj, rng = _projection(2, 50, 3, 20, T=4000)
    n = 10
    gamma = proj.gamma(n)
    A, C = projection._a_c(gamma, 20)
    _ = proj.given_past  # cached covariances, not part of the B, D step
    tracemalloc.start()
    try:
        projection._b_d(proj, gamma, A, C, feedthrough=True)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 80e6, f"{peak / 1e6:.0f} MB"  # the structured sums: ~40 MB here, growing as f² (n + p)²


def test_heldout_error_through_parts_equals_the_dense_error_map():
    proj, rng = _projection(5, 4, 2, 3)
    L = proj.layout
    n = 3
    mats = {"A": 0.5 * np.eye(n) + 0.1 * rng.standard_normal((n, n)), "B": rng.standard_normal((n, 2)),
            "C": rng.standard_normal((3, n)), "D": rng.standard_normal((3, 2)), "K": 0.2 * rng.standard_normal((n, 3))}
    E = L.select(L.Yf) - heldout._predictor_map(mats, L)
    S = proj.S
    dense = np.mean(np.maximum(np.sum((E @ S) * E, axis=1), 0.0) / np.diag(S)[L.Yf])
    assert heldout._heldout_error(mats, S, L) == pytest.approx(dense, rel=1e-11)
