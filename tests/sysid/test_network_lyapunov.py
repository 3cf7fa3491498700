"""Infinite-horizon Gramians by doubling (``sysid/network/lyapunov.py``) against SciPy's solver and the series."""

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid.network import lyapunov as ly
from stimsteer.sysid.network.systems import minimal_realisation
from stimsteer.sysid.statespace import StateSpaceModel


def _stable(rng, n, radius, normal=False):
    A = rng.standard_normal((n, n))
    if normal:  # symmetric: its spectral norm is its spectral radius
        A = A + A.T
    return A * (radius / np.max(np.abs(np.linalg.eigvals(A))))


@pytest.mark.parametrize("radius", [0.5, 0.95, 0.999])
def test_the_doubled_sum_solves_the_lyapunov_equation_as_scipy_does(rng, monkeypatch, radius):
    # scipy.linalg.solve_discrete_lyapunov (reference library) on the same A and Q; the doubling route taken at
    # this size by lowering its threshold
    n = 60
    A, B = _stable(rng, n, radius), rng.standard_normal((n, 3))
    Q = B @ B.T
    reference = sla.solve_discrete_lyapunov(A, Q)
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    W = ly.stable_gramian(A, Q)
    np.testing.assert_array_equal(W, W.T)
    scale = np.abs(reference).max()
    # the author's margins: the two agree to 1e-9 of the largest entry at radius 0.999 (the equation's condition
    # grows as 1 / (1 - radius²)), and the doubled sum satisfies the equation to rounding
    assert np.abs(W - reference).max() <= 1e-9 * scale
    assert np.abs(A @ W @ A.T - W + Q).max() <= 1e-12 * scale


def test_the_doubled_sum_equals_the_series_it_sums(rng, monkeypatch):
    # W = Σ_k A^k Q (A^k)ᵀ, written out term by term until the terms vanish (the definition)
    n = 20
    A, B = _stable(rng, n, 0.8, normal=True), rng.standard_normal((n, 2))
    series, M = np.zeros((n, n)), np.eye(n)
    for _ in range(400):  # 0.8^400 = 1e-39
        series += M @ B @ B.T @ M.T
        M = A @ M
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    # the same sum grouped otherwise: rounding, the author's margins (entries of order 1-10)
    np.testing.assert_allclose(ly.stable_gramian(A, B @ B.T), series, rtol=1e-12, atol=1e-14)


def test_small_models_keep_scipys_numbers(rng):
    A, B = _stable(rng, 30, 0.9), rng.standard_normal((30, 2))
    np.testing.assert_array_equal(ly.stable_gramian(A, B @ B.T), sla.solve_discrete_lyapunov(A, B @ B.T))


def test_the_minimal_realisation_of_a_large_lag_realisation_keeps_its_impulse_response(rng):
    # a 6-state system padded to 600 states (above DOUBLING_STATES) with delay lines no channel sees: the balanced
    # truncation by doubled Gramians finds the 6 states and keeps the Markov parameters (Ho & Kalman 1966)
    n_min, pad = 6, 594
    A6, B6, C6 = _stable(rng, n_min, 0.9), rng.standard_normal((n_min, 2)), rng.standard_normal((3, n_min))
    shift = np.eye(pad, k=-1) * 0.5
    A = sla.block_diag(A6, shift)
    B = np.vstack([B6, np.zeros((pad, 2))])
    B[n_min, 0] = 1.0  # the delay line is driven by the first input but seen by no channel
    C = np.hstack([C6, np.zeros((3, pad))])
    model = StateSpaceModel(A=A, B=B, C=C, sample_rate_hz=1000.0)
    assert model.n_states >= ly.DOUBLING_STATES
    reduced, _hsv = minimal_realisation(model)
    assert reduced.n_states == n_min
    np.testing.assert_allclose(reduced.impulse_response(40), model.impulse_response(40), atol=1e-9)


@pytest.mark.parametrize("radius", [0.5, 0.999])
def test_the_pair_of_gramians_solves_both_equations_as_scipy_does(rng, monkeypatch, radius):
    # scipy.linalg.solve_discrete_lyapunov (reference library) for W = A W Aᵀ + Q and V = Aᵀ V A + R; the pair
    # shares the powers of A and forms each term's lower block triangle only (blocks of 7 rows here, so the
    # triangle has many blocks); below DOUBLING_STATES it is SciPy's two solutions exactly
    n = 60
    A, B, C = _stable(rng, n, radius), rng.standard_normal((n, 3)), rng.standard_normal((4, n))
    Q, R = B @ B.T, C.T @ C
    small = ly.stable_gramian_pair(A, Q, R)
    np.testing.assert_array_equal(small[0], sla.solve_discrete_lyapunov(A, Q))
    np.testing.assert_array_equal(small[1], sla.solve_discrete_lyapunov(A.T, R))
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    monkeypatch.setattr(ly._symmetric_product, "__defaults__", (7,))
    W, V = ly.stable_gramian_pair(A, Q, R)
    for G, ref, M, S in ((W, small[0], A, Q), (V, small[1], A.T, R)):
        np.testing.assert_array_equal(G, G.T)
        scale = np.abs(ref).max()
        # the author's margins, as for stable_gramian above; against stable_gramian itself: rounding (measured
        # 2.5e-16 and 6e-17 of the largest entry on the 2,297-state ridge ARX of the benchmarks)
        assert np.abs(G - ref).max() <= 1e-9 * scale
        assert np.abs(M @ G @ M.T - G + S).max() <= 1e-12 * scale
        assert np.abs(G - ly.stable_gramian(M, S)).max() <= 1e-13 * scale
