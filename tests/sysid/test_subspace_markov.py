"""Subspace identification at long windows: the B, D normal equations from the block-Toeplitz structure equal the
dense-basis ones, in bounded memory; the held-out error through the predictor's parts equals the dense map.

The reference is the dense-basis computation this replaces (an internal equivalence, not an outside source); the
block-Toeplitz map of Markov parameters is the standard one (Ho & Kalman 1966)."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from stimsteer.sysid.statespace import markov_toeplitz
from stimsteer.sysid.subspace import gram, heldout, markov, projection

from tests.sysid.test_subspace_factor import _session  # the simulated three-state session of the factor tests


def _toeplitz_basis(A, C, layout, feedthrough):
    """Basis ``H_k`` of the block-Toeplitz matrix of Markov parameters, linear in ``θ = [vec(B); vec(D)]``, shape
    (n_theta, p f, m f) (the dense basis the package used for small problems before)."""
    n, m, p, f = A.shape[0], layout.m, layout.p, layout.f
    CA = [C]
    for _ in range(f - 2):
        CA.append(CA[-1] @ A)
    Hs = np.zeros((n * m + (p * m if feedthrough else 0), p * f, m * f))
    for l in range(m):
        for j in range(n):
            h = np.zeros((f, p, m))  # Markov parameters of B = e_j e_lᵀ (D = 0): h[r] = C A^(r-1) B
            for r in range(1, f):
                h[r][:, l] = CA[r - 1][:, j]
            Hs[l * n + j] = markov_toeplitz(h)
    for l in range(m if feedthrough else 0):
        for a in range(p):
            h = np.zeros((f, p, m))  # D = e_a e_lᵀ (B = 0): only h[0]
            h[0][a, l] = 1.0
            Hs[n * m + l * p + a] = markov_toeplitz(h)
    return Hs


def _dense_normal_equations(proj, gamma, A, C, feedthrough):
    """The normal equations as built before (one dense (p f × m f) basis matrix per unknown)."""
    L, S = proj.layout, proj.S
    Hs = _toeplitz_basis(A, C, L, feedthrough)
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


@pytest.mark.parametrize("feedthrough", [False, True])
@pytest.mark.parametrize("shape", [(4, 6, 2, 3), (2, 3, 4, 2), (3, 12, 1, 2)])
def test_normal_equations_by_matrix_products_equal_the_dense_basis(feedthrough, shape):
    # (past, future, m, p): short futures with several inputs take the whole pattern Gram in _projected_gemm,
    # long ones the contraction through Φ first; both must give the dense basis's equations
    past, future, m, p = shape
    proj, rng = _projection(past, future, m, p)
    n = 3
    A, C = 0.3 * rng.standard_normal((n, n)), rng.standard_normal((p, n))
    M_ref, rhs_ref, Q, target = _dense_normal_equations(proj, proj.gamma(n), A, C, feedthrough)
    L, S = proj.layout, proj.S
    S_uu = S[np.ix_(L.Uf, L.Uf)]
    M, rhs = markov.normal_equations_gemm(markov.pattern_blocks(A, C, L.f, feedthrough), Q, S_uu,
                                          proj.given_past[0] - S_uu, target, n, m, feedthrough)
    np.testing.assert_allclose(M, M_ref, rtol=1e-11, atol=1e-11 * np.abs(M_ref).max())
    np.testing.assert_allclose(rhs, rhs_ref, rtol=1e-11, atol=1e-11 * np.abs(rhs_ref).max())


def test_terms_kept_for_every_candidate_order_give_the_equations_computed_afresh_bit_for_bit():
    # reference: normal_equations_gemm with every term computed for the order at hand (the route before the
    # order-free terms were kept on the projection); orders 2 and 3 read the terms order 1 kept
    proj, rng = _projection(4, 6, 2, 3)
    L = proj.layout
    (S_uu, S_yu), (Sc_uu, Sc_yu) = proj.future_cov, proj.given_past
    for n in (1, 2, 3):
        A, C = 0.3 * rng.standard_normal((n, n)), rng.standard_normal((L.p, n))
        Q = np.linalg.qr(proj.gamma(n))[0]
        for feedthrough in (True, False):
            M, rhs = projection._normal_equations(proj, A, C, Q, feedthrough)
            M_ref, rhs_ref = markov.normal_equations_gemm(
                markov.pattern_blocks(A, C, L.f, feedthrough), Q, S_uu, Sc_uu - S_uu,
                S_yu + Q @ (Q.T @ (Sc_yu - S_yu)), n, L.m, feedthrough)
            assert np.array_equal(M, M_ref) and np.array_equal(rhs, rhs_ref)
    assert proj._order_free[2] is projection._order_free_terms(proj)[2]  # computed once


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
        projection._b_d(proj, gamma, A, C, (True,))
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



def test_heldout_errors_of_a_batch_equal_each_candidate_and_the_dense_error_map(monkeypatch):
    # candidates of several orders scored together (their X S_PP, X S_{P Yf} from one product per batch, batches
    # split by the row budget) give each candidate's own error, and that is the dense map's
    proj, rng = _projection(5, 4, 2, 3)
    L, S = proj.layout, proj.S
    check = heldout._CheckCov.time_major(S, L)
    models = []
    for n in (1, 3, 2, 4):
        models.append({"A": 0.5 * np.eye(n) + 0.1 * rng.standard_normal((n, n)), "B": rng.standard_normal((n, 2)),
                       "C": rng.standard_normal((3, n)), "D": rng.standard_normal((3, 2)),
                       "K": 0.2 * rng.standard_normal((n, 3))})
    parts = [heldout.heldout_parts(mats, check, L) for mats in models]
    monkeypatch.setattr(heldout, "BATCH_ROWS", 5)
    groups = heldout.batches(parts)
    assert [len(g) for g in groups] == [2, 1, 1]  # 1 + 3 rows, then 2 (+ 4 > 5), then 4
    batched = [e for g in groups for e in heldout.heldout_errors(g, check)]
    alone = [heldout.heldout_errors([part], check)[0] for part in parts]
    np.testing.assert_allclose(batched, alone, rtol=1e-13)
    for mats, got in zip(models, batched):
        E = L.select(L.Yf) - heldout._predictor_map(mats, L)
        dense = np.mean(np.maximum(np.sum((E @ S) * E, axis=1), 0.0) / np.diag(S)[L.Yf])
        assert got == pytest.approx(dense, rel=1e-11)

def _fit_with_route(monkeypatch, session, chol_from, **kw):
    from stimsteer.sysid.subspace import SubspaceId

    monkeypatch.setattr(projection, "_CHOLESKY_FROM", chol_from)
    return SubspaceId(**kw).fit(session)


@pytest.mark.parametrize("weighting", ["n4sid", "moesp", "cva"])
def test_cholesky_route_predicts_as_the_eigen_route_on_well_conditioned_data(monkeypatch, weighting):
    session = _session(noise=0.3)
    kw = dict(past_steps=6, future_steps=5, weighting=weighting)
    eig = _fit_with_route(monkeypatch, session, 10**9, **kw)
    chol = _fit_with_route(monkeypatch, session, 0, **kw)
    assert chol.order_ == eig.order_
    rng = np.random.default_rng(2)
    args = (rng.standard_normal((3, 6, 2)), rng.standard_normal((3, 6, 4)), rng.standard_normal((3, 8, 2)))
    a, b = eig.predict_many(*args), chol.predict_many(*args)
    np.testing.assert_allclose(b, a, rtol=1e-8, atol=1e-8 * np.abs(a).max())


def test_singular_covariances_take_the_eigen_route(monkeypatch):
    # noise-free data of a 3-state system: the past covariance given the future inputs is singular, so no
    # Cholesky factor passes the condition check and the eigen route (with its cut-off) is used: same model
    session = _session(noise=0.0)
    kw = dict(past_steps=6, future_steps=5)
    eig = _fit_with_route(monkeypatch, session, 10**9, **kw)
    chol = _fit_with_route(monkeypatch, session, 0, **kw)
    inv = projection._PsdInverse(np.diag([1.0, 1.0, 0.0]))
    assert inv.L is None  # a singular covariance is never factored by Cholesky
    assert chol.order_ == eig.order_ == 3
    rng = np.random.default_rng(2)
    args = (rng.standard_normal((3, 6, 2)), rng.standard_normal((3, 6, 4)), rng.standard_normal((3, 8, 2)))
    np.testing.assert_allclose(chol.predict_many(*args), eig.predict_many(*args), rtol=1e-7, atol=1e-9)


def _old_fit_order(proj, n, feedthrough):
    """One candidate order as the covariance route computed it before: ``A`` by least squares on Γ, ``B, D`` from
    the dense basis, the state maps by pseudo-inverses, the Kalman gain by SciPy's QZ route (the reference)."""
    from stimsteer.sysid.statespace import kalman_gain

    L, gamma = proj.layout, proj.gamma(n)
    A, C = projection._a_c(gamma, L.p)
    M, rhs, _Q, _t = _dense_normal_equations(proj, gamma, A, C, feedthrough)
    theta = np.linalg.solve(0.5 * (M + M.T), rhs)
    B = theta[:n * L.m].reshape(n, L.m, order="F")
    D = theta[n * L.m:].reshape(L.p, L.m, order="F") if feedthrough else np.zeros((L.p, L.m))
    Q, R, S = projection._noise(proj, gamma, A, B, C, D)
    K, _P = kalman_gain(A, C, Q, R + projection._NOISE_FREE * np.eye(L.p), S)
    return {"A": A, "B": B, "C": C, "D": D, "K": K, "Q": Q, "R": R}


@pytest.fixture(scope="module")
def noisy_session():
    return _session(noise=0.3, T=3000)


@pytest.mark.parametrize("weighting", ["n4sid", "moesp", "cva"])
def test_small_gram_orders_equal_the_route_of_before(weighting, noisy_session):
    # the covariance route's candidate orders (small Grams, fitting part) now take the structured sums, the doubling
    # Riccati solver and, unweighted, the nested orders' shared QR; its models (all data) the computations of before:
    # every order must give the model the dense basis, QZ and pseudo-inverses gave
    session = noisy_session
    from stimsteer.sysid.subspace import SubspaceId, prepare

    cfg = SubspaceId(past_steps=6, future_steps=5)._settings(session)
    proj_all, proj = prepare.projections(session, cfg, weighting)[:2]
    assert isinstance(proj, projection._Projection)
    assert (proj.nested(3) is None) == (weighting == "cva")  # CVA's weighted Γ keeps the pseudo-inverses
    assert proj_all.exact and proj_all.nested(3) is None  # the models handed out: the computations of before
    for n in (1, 3, 8):
        for feedthrough in (False, True):
            for p, tol in ((proj, 1e-9), (proj_all, 1e-11)):
                new, old = projection._fit_order(p, n, feedthrough), _old_fit_order(p, n, feedthrough)
                for key in "ABCDKQR":
                    np.testing.assert_allclose(new[key], old[key], rtol=tol, atol=tol * np.abs(old[key]).max(),
                                               err_msg=f"{key}, order {n}, direct term {feedthrough}")


@pytest.mark.parametrize("feedthrough", [False, True])
def test_pattern_term_skips_only_zero_blocks(feedthrough):
    # the sums over the non-zero pattern blocks equal the contraction over every block (_projected_gemm)
    rng = np.random.default_rng(5)
    f, m, p, n = 5, 3, 4, 6
    A, C = 0.4 * rng.standard_normal((n, n)), rng.standard_normal((p, n))
    h = markov.pattern_blocks(A, C, f, feedthrough)
    X4 = rng.standard_normal((f, m, f, m))
    ref = markov._projected_gemm(h, X4)
    np.testing.assert_allclose(markov._pattern_term(h, X4, n), ref, rtol=1e-13, atol=1e-13 * np.abs(ref).max())
