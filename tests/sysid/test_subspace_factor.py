"""Subspace identification's factor route (one Cholesky factor of the Hankel Gram per projection) against the
covariance route it replaces for large Grams, and the pieces it is built from.

The reference of every equivalence here is the earlier route of this package (the covariance route of
``projection._Projection``, which remains in use for small and ill-conditioned Grams): an internal equivalence, not
an outside source. The block formulas are those of the LQ route, Van Overschee & De Moor (1996), Subspace
Identification for Linear Systems, Kluwer, sec. 4.3.
"""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid._lagged import _lagged_gram, blas_controller, blas_thread_count, blas_threads
from stimsteer.sysid._lapack_nogil import one_norm
from stimsteer.sysid.subspace import SubspaceId, factor, gram, heldout, prepare
from stimsteer.sysid.subspace import nested as nested_orders
from tests.sysid.simulated import state_space_session


def _session(noise, seed=1, T=6000, n_trials=6):
    rng = np.random.default_rng(seed)
    A = np.array([[0.8, 0.2, 0.0], [-0.2, 0.8, 0.0], [0.0, 0.0, 0.5]])
    B, C = rng.standard_normal((3, 2)), rng.standard_normal((4, 3))
    u = rng.standard_normal((T, 2))
    return state_space_session(u, A, B, C, noise=noise, rng=rng, n_trials=n_trials)


def _fit(monkeypatch, session, factor_from, **kw):
    monkeypatch.setattr(prepare, "_FACTOR_FROM", factor_from)
    return SubspaceId(**kw).fit(session)


def _windows(seed=2):
    rng = np.random.default_rng(seed)
    return rng.standard_normal((3, 6, 2)), rng.standard_normal((3, 6, 4)), rng.standard_normal((3, 8, 2))


@pytest.mark.parametrize("weighting", ["n4sid", "moesp", "cva"])
@pytest.mark.parametrize("feedthrough", ["auto", True])
def test_factor_route_predicts_as_the_covariance_route_on_well_conditioned_data(monkeypatch, weighting, feedthrough):
    session = _session(noise=0.3)
    kw = dict(past_steps=6, future_steps=5, weighting=weighting, feedthrough=feedthrough)
    old = _fit(monkeypatch, session, 10**9, **kw)
    new = _fit(monkeypatch, session, 0, **kw)
    assert new.order_ == old.order_ and new.feedthrough_ == old.feedthrough_
    np.testing.assert_allclose(new.singular_values_, old.singular_values_, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(new.order_table_["heldout_error"], old.order_table_["heldout_error"], rtol=1e-9)
    a, b = old.predict_many(*_windows()), new.predict_many(*_windows())
    np.testing.assert_allclose(b, a, rtol=1e-8, atol=1e-8 * np.abs(a).max())
    np.testing.assert_allclose(new.model_.innovation_cov, old.model_.innovation_cov, rtol=1e-8, atol=1e-12)


def test_a_singular_gram_falls_back_to_the_covariance_route(monkeypatch):
    # noise-free data of a 3-state system: the past given the future inputs is singular, so the Gram has no
    # Cholesky factor within the condition limit and the covariance route (with its eigenvalue cut-off) is used
    session = _session(noise=0.0)
    L = gram._Layout(6, 5, 2, 4)
    (acc,) = gram._hankel_sums(session, [session.segments(min_length=L.width)], L)
    S = gram._gram_from_sums(acc, L, L.factor_order()) / acc.n
    assert factor.factor_projection(S, L, "n4sid") is None
    kw = dict(past_steps=6, future_steps=5)
    old = _fit(monkeypatch, session, 10**9, **kw)
    new = _fit(monkeypatch, session, 0, **kw)
    assert new.order_ == old.order_ == 3
    np.testing.assert_array_equal(new.predict_many(*_windows()), old.predict_many(*_windows()))


def test_cholesky_in_place_overwrites_the_gram_with_its_factor():
    rng = np.random.default_rng(0)
    Z = rng.standard_normal((400, 60))
    S = Z.T @ Z
    ref = np.linalg.cholesky(S)
    work = S.copy()
    assert factor.cholesky_in_place(work)
    np.testing.assert_allclose(work, ref, rtol=1e-12, atol=1e-12 * np.abs(ref).max())
    bad = np.diag([1.0, 1.0, 1e-12])  # condition 1e12: refused
    assert not factor.cholesky_in_place(bad)


def test_cholesky_in_place_equals_scipys_wrappers_bit_for_bit():
    # reference: SciPy's f2py wrappers of LAPACK dpotrf (upper, clean=1) and dpocon on the Fortran view (the route
    # cholesky_in_place took before it released the GIL); 700 rows: more than one band of _zero_upper
    import scipy.linalg as sla

    rng = np.random.default_rng(5)
    Z = rng.standard_normal((900, 700))  # 900 samples > 700 columns: a positive definite covariance
    S = Z.T @ Z / 900
    ref = S.copy()
    U, info = sla.lapack.dpotrf(ref.T, lower=0, clean=1, overwrite_a=1)
    assert info == 0 and np.shares_memory(U, ref)
    work = S.copy()
    assert factor.cholesky_in_place(work)
    assert np.array_equal(work, ref)
    rcond = sla.lapack.dpocon(ref.T, one_norm(S), uplo="U")[0]
    assert factor.pocon(work.T, one_norm(S), uplo="U") == rcond  # exact: the same dpocon call


def test_blocked_triangular_solve_equals_a_direct_solve():
    rng = np.random.default_rng(3)
    Lf = np.tril(rng.standard_normal((900, 900))) + 30 * np.eye(900)
    B = rng.standard_normal((700, 5))
    X = factor._solve_lower(Lf, 150, 850, B, band=128)
    np.testing.assert_allclose(Lf[150:850, 150:850] @ X, B, rtol=1e-10, atol=1e-10)


def test_rows_of_the_gram_and_its_diagonal_are_those_of_the_whole_symmetrised_gram():
    session = _session(noise=0.3, T=1500)
    L = gram._Layout(4, 3, 2, 4)
    (acc,) = gram._hankel_sums(session, [session.segments(min_length=L.width)], L)
    order = L.factor_order()
    G = gram._gram_from_sums(acc, L, order)
    np.testing.assert_array_equal(gram._gram_from_sums(acc, L, order, rows=(6, 30)), G[6:30])
    np.testing.assert_array_equal(gram._gram_diagonal(acc, L), np.diagonal(gram._gram_from_sums(acc, L)))
    np.testing.assert_array_equal(G, G.T)
    np.testing.assert_array_equal(G, gram._gram_from_sums(acc, L)[np.ix_(order, order)])
    assert _lagged_gram is not None


def test_the_gram_is_the_symmetrised_assembly_bit_for_bit_even_when_same_lag_blocks_are_not_symmetric():
    # the same-lag products made slightly asymmetric (as a general product Zᵀ Z may be): the Gram must still be
    # (W + Wᵀ) / 2 of the raw assembly W, exactly, in both row orders, and the scaling one division after the other
    session = _session(noise=0.3, T=1500)
    L = gram._Layout(4, 3, 2, 4)
    (acc,) = gram._hankel_sums(session, [session.segments(min_length=L.width)], L)
    acc.X[0] += 1e-9 * np.random.default_rng(0).standard_normal(acc.X[0].shape)
    for order in (None, L.factor_order()):
        W = _lagged_gram(acc, gram._lagged_index(L, order))
        assert not np.array_equal(W, W.T)
        G = gram._gram_from_sums(acc, L, order)
        np.testing.assert_array_equal(G, 0.5 * (W + W.T))
        s = np.linspace(0.5, 2.0, L.nz)
        np.testing.assert_array_equal(prepare.scaled(G.copy(), 7, s), G / 7 / np.outer(s, s))


def test_heldout_error_from_the_factor_order_rows_equals_the_time_major_one():
    session = _session(noise=0.3, T=1500)
    L = gram._Layout(4, 3, 2, 4)
    (acc,) = gram._hankel_sums(session, [session.segments(min_length=L.width)], L)
    order = L.factor_order()
    S = gram._gram_from_sums(acc, L) / acc.n
    b, e = L.m * L.f, L.m * L.f + len(L.P)
    Sf = S[np.ix_(order, order)]
    check = heldout._CheckCov.factor_rows(Sf[b:e], Sf[:b], np.diagonal(S)[L.Yf], L)
    rng = np.random.default_rng(4)
    n = 3
    mats = {"A": 0.5 * np.eye(n) + 0.1 * rng.standard_normal((n, n)), "B": rng.standard_normal((n, 2)),
            "C": rng.standard_normal((4, n)), "D": rng.standard_normal((4, 2)), "K": 0.2 * rng.standard_normal((n, 4))}
    assert heldout._heldout_error(mats, check, L) == pytest.approx(heldout._heldout_error(mats, S, L), rel=1e-12)


def test_the_blas_controller_is_created_once_and_limits_threads():
    assert blas_controller() is blas_controller()
    with blas_threads(1):
        assert blas_thread_count() == 1


def test_nested_orders_give_the_pseudo_inverse_estimates_and_fall_back_to_them(monkeypatch):
    # A = Γ₋⁺ Γ₊ and the state maps X0 = Γ⁺ Θ, X1 = Γ₋⁺ Θ₊ of every order as leading blocks of one QR; with the
    # condition limit out of reach every order takes the pseudo-inverses of before, and predicts the same
    session = _session(noise=0.3)
    kw = dict(past_steps=6, future_steps=5, feedthrough=True)
    nested = _fit(monkeypatch, session, 0, **kw)
    monkeypatch.setattr(nested_orders, "_NESTED_RCOND", 2.0)  # rcond <= 1: nested() always declines
    plain = _fit(monkeypatch, session, 0, **kw)
    assert nested.order_ == plain.order_
    np.testing.assert_allclose(nested.order_table_["heldout_error"], plain.order_table_["heldout_error"], rtol=1e-9)
    a, b = plain.predict_many(*_windows()), nested.predict_many(*_windows())
    np.testing.assert_allclose(b, a, rtol=1e-9, atol=1e-9 * np.abs(a).max())


def test_nested_pieces_equal_the_pseudo_inverses_for_each_order(monkeypatch):
    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)
    session = _session(noise=0.3)
    cfg = SubspaceId(past_steps=6, future_steps=5)._settings(session)
    proj = prepare.projections(session, cfg, "n4sid")[0]
    p = cfg["layout"].p
    for n in (1, 3, 6):
        gamma = proj.gamma(n)
        A, X0, X1 = proj.nested(n)
        np.testing.assert_allclose(A, np.linalg.lstsq(gamma[:-p], gamma[p:], rcond=None)[0], atol=1e-10)
        np.testing.assert_allclose(X0, np.linalg.pinv(gamma) @ proj.theta_rows, atol=1e-10)
        np.testing.assert_allclose(X1, np.linalg.pinv(gamma[:-p]) @ proj.theta_next_rows, atol=1e-10)
    cva = prepare.projections(session, cfg, "cva")[0]
    assert cva.nested(3) is None  # a weighted Γ: the pseudo-inverses of before


def test_orders_scored_together_and_on_threads_equal_one_setting_at_a_time(monkeypatch):
    # both direct-term settings of an order share one system (without D: the leading block and its Cholesky
    # factor), and orders fitted on two threads are each computed as on one: same scores, bit for bit across threads
    from stimsteer.sysid.subspace import selection

    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)
    session = _session(noise=0.3, T=3000)
    cfg = SubspaceId(past_steps=6, future_steps=5)._settings(session)
    _all, proj, check = prepare.projections(session, cfg, "n4sid")[:3]
    L, orders = cfg["layout"], range(1, 6)
    with blas_threads(1):  # as in the fit
        threaded = selection.score_orders(proj, check, L, orders, (False, True), workers=2)
        assert threaded == selection.score_orders(proj, check, L, orders, (False, True), workers=1)
    for ft in (False, True):
        alone = selection.score_orders(proj, check, L, orders, (ft,))
        np.testing.assert_allclose([e for e, _s in threaded[ft]], [e for e, _s in alone[ft]], rtol=1e-10)
        assert [s for _e, s in threaded[ft]] == [s for _e, s in alone[ft]]
