"""The Gram route: lagged Grams from streamed lag products, the direct predictors fitted from them, the QR fallback
on ill-conditioned data, and the ridge grid from one eigendecomposition per fold."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid._lagged import _lagged_gram, _stream_lag_sums, _stream_sums
from stimsteer.sysid.datadriven import gram as gr
from stimsteer.sysid.datadriven.hankel_predictor import HankelPredictor
from stimsteer.sysid.datadriven.lsq import LsqPredictor
from tests.sysid.simulated import state_space_session


def _system(T=4000, noise=0.1, seed=0, n_trials=4):
    """A stable 3-state, 2-input, 3-output system in trials; measurement noise ``noise``."""
    rng = np.random.default_rng(seed)
    u = rng.standard_normal((T, 2))
    A, B = np.diag([0.8, 0.5, -0.3]), rng.standard_normal((3, 2))
    return state_space_session(u, A, B, noise=noise, rng=rng, n_trials=n_trials)


@pytest.fixture(scope="module")
def noisy():
    return _system()


def _lagged_design(Z, pieces, L):
    """Rows ``w_k = [Z_k; ...; Z_{k-L}]`` of the pieces' rows, materialised (the definition)."""
    return np.array([np.concatenate([Z[k - i] for i in range(L + 1)]) for a, b in pieces for k in range(a, b)])


# ------------------------------------------------------------------------------------------------ lagged Gram
def test_lagged_gram_is_the_gram_of_the_materialised_lagged_design(noisy):
    # definition of a Gram matrix (common practice, no source): Σ_k w_k w_kᵀ over the materialised rows
    L, Z = 6, np.hstack([noisy.y, noisy.u])
    pieces = [(0 + L, 1000, 0), (1000 + L, 2000, 1), (2000 + L, 3000, 0), (3000 + L, 4000, 1)]
    folds = _stream_lag_sums(noisy, pieces, 2, L, chunk_rows=300)  # several chunks per piece
    X0 = _lagged_design(Z, [p[:2] for p in pieces if p[2] == 0], L)
    X1 = _lagged_design(Z, [p[:2] for p in pieces if p[2] == 1], L)
    for got, X in ((_lagged_gram(folds[0]), X0), (_lagged_gram(folds[1]), X1)):
        np.testing.assert_allclose(got, X.T @ X, rtol=1e-12, atol=1e-9 * np.abs(X.T @ X).max())
    # a fold's Gram as a difference of sums: (fold 0 + fold 1) − fold 1 = fold 0
    diff = folds[0].plus(folds[1]).plus(folds[1], -1.0)
    np.testing.assert_allclose(_lagged_gram(diff), X0.T @ X0, rtol=1e-10, atol=1e-9 * np.abs(X0.T @ X0).max())
    # the moments ARX uses: sums and Gram of the shifted vectors
    shift = Z.mean(axis=0)
    (mom,), lo, hi = _stream_sums(noisy, pieces[:1], 1, L, 250, shift)
    Xs = _lagged_design(Z - shift, [pieces[0][:2]], L)
    m = mom.moments()
    np.testing.assert_allclose(m.s, Xs.sum(axis=0), atol=1e-9)
    np.testing.assert_allclose(m.W, Xs.T @ Xs, rtol=1e-12, atol=1e-9 * np.abs(Xs.T @ Xs).max())
    np.testing.assert_array_equal(lo, noisy.u[:1000].min(axis=0))


def test_hankel_gram_is_that_of_the_hankel_matrix(noisy):
    # the data matrix [Up; Yp; Uf; Yf] written out with numpy slicing (Favoreel et al. 1999, "SPC: Subspace
    # predictive control", its definition of the past/future block-Hankel matrices)
    m, p, past, horizon = 2, 3, 3, 4
    L = past + horizon
    pieces = [(0, 1000, 0), (1000, 2000, 1), (2000, 3000, 0)]
    folds, y_sum, y_sq, n_y = gr.collect_gram(noisy, pieces, 2, m, p, past, horizon)

    def cols(a, b):
        u, y = noisy.u[a:b], noisy.y[a:b]
        win = lambda s, lo, hi: np.stack([s[j + lo: j + hi].reshape(-1) for j in range(b - a - L + 1)], axis=1)
        return np.vstack([win(u, 0, past), win(y, 0, past), win(u, past, L), win(y, past, L)])

    H = np.hstack([cols(a, b) for a, b, f in pieces if f == 0])
    assert folds[0].n_columns == H.shape[1]
    np.testing.assert_allclose(folds[0].gram, H @ H.T, rtol=1e-12, atol=1e-10 * np.abs(H @ H.T).max())
    F = folds[0].factor
    np.testing.assert_allclose(F @ F.T, H @ H.T, atol=1e-10 * np.abs(H @ H.T).max())
    # rows and diagonal assembled alone: the same numbers as the whole Gram's (rows that cut a time block too)
    G = folds[0].gram
    for r0, r1 in ((0, (m + p) * past + m * horizon), (7, 23), (3, 4), (30, G.shape[0])):
        np.testing.assert_array_equal(folds[0].gram_rows(r0, r1), G[r0:r1])
    np.testing.assert_array_equal(folds[0].gram_diagonal(), np.diagonal(G))
    used = np.concatenate([noisy.y[a:b] for a, b, _f in pieces])
    np.testing.assert_allclose(y_sum, used.sum(axis=0), rtol=1e-12)
    np.testing.assert_allclose(y_sq, (used ** 2).sum(axis=0), rtol=1e-12)
    assert n_y == used.shape[0]


def test_condition_estimate_is_that_of_the_gram():
    # LAPACK pocon estimates the 1-norm condition number within a small factor (Higham 2002, Accuracy and
    # Stability of Numerical Algorithms, ch. 15); numpy.linalg.cond(·, 1) is the exact value
    rng = np.random.default_rng(3)
    Q = np.linalg.qr(rng.standard_normal((40, 40)))[0]
    G = (Q * np.logspace(0, 9, 40)) @ Q.T
    G = (G + G.T) / 2
    est, exact = gr.gram_condition(sla.cholesky(G, lower=True), G), np.linalg.cond(G, 1)
    assert exact / 10 <= est <= exact * 1.01


# ------------------------------------------------------------------------------------------------ ridge grid
def test_ridge_grid_errors_equal_direct_solves_and_scikit_learn(noisy):
    m, p, past, horizon = 2, 3, 4, 6
    pieces = [(0, 1000, 0), (1000, 2000, 1), (2000, 3000, 2), (3000, 4000, 0)]
    folds, *_ = gr.collect_gram(noisy, pieces, 3, m, p, past, horizon)
    total = gr.total_fold(folds)
    train, val = total.plus(folds[1], -1.0), folds[1]
    n_b = (m + p) * past + m * horizon
    alphas = np.logspace(-8, 0, 9)
    w = np.linspace(0.5, 2.0, p * horizon)
    got = gr.ridge_grid_errors(train, val, n_b, alphas, w)
    Gt, Gv = train.gram, val.gram
    scale = np.trace(Gt) / Gt.shape[0]
    for a, e in zip(alphas, got):
        # direct solve of (G11 + s I) Θᵀ = G12 and the held-out error from the validation Gram
        theta = np.linalg.solve(Gt[:n_b, :n_b] + a * scale * np.eye(n_b), Gt[:n_b, n_b:]).T
        R = Gv[n_b:, n_b:] - theta @ Gv[:n_b, n_b:] - Gv[n_b:, :n_b] @ theta.T + theta @ Gv[:n_b, :n_b] @ theta.T
        assert e == pytest.approx(float(np.sum(w[:, None] * w[None, :] * R * np.eye(R.shape[0]))), rel=1e-10)
    # scikit-learn's Ridge on the materialised data (outside reference): the same ridge map
    from sklearn.linear_model import Ridge

    F = train.factor  # H Hᵀ = F Fᵀ, so F's columns are data columns of an equivalent problem
    s = 1e-3 * scale
    ref = Ridge(alpha=s, fit_intercept=False, solver="cholesky").fit(F[:n_b].T, F[n_b:].T).coef_
    np.testing.assert_allclose(gr.ridge_map(Gt, n_b, s), ref, rtol=1e-8, atol=1e-10 * np.abs(ref).max())


@pytest.mark.parametrize("rank", [12, 5])  # positive definite (Cholesky route) and semi-definite (two products)
def test_congruence_of_the_validation_gram_is_its_definition(rank):
    rng = np.random.default_rng(2)
    n_b, n = 8, 12
    X = rng.standard_normal((n, rank))
    Gv = (X @ X.T)[:n_b]  # rows [0, n_b) of a validation Gram
    V = np.linalg.qr(rng.standard_normal((n_b, n_b)))[0]
    expected = np.triu(V.T @ Gv[:, :n_b] @ V)  # the definition
    np.testing.assert_allclose(gr._congruence(V.copy(order="F"), np.asfortranarray(Gv[:, :n_b])), expected, atol=1e-12 * np.abs(expected).max())


# ------------------------------------------------------------------------------------------------ predictors
def _fit(cls, session, route, **kw):
    est = cls(**kw)
    est._route = route  # test hook: "qr" forces the QR route, "gram" the Gram route, "auto" is the default
    return est.fit(session)


def _windows(P, N, seed=5):
    rng = np.random.default_rng(seed)
    return rng.standard_normal((6, P, 2)), rng.standard_normal((6, P, 3)), rng.standard_normal((6, N, 2))


@pytest.mark.parametrize("cls", [LsqPredictor, HankelPredictor])
def test_gram_route_predicts_as_the_qr_route_on_well_conditioned_data(noisy, cls):
    P, N = 5, 8
    qr, gram = _fit(cls, noisy, "qr", past_steps=P, horizon_steps=N), _fit(cls, noisy, "auto", past_steps=P,
                                                                          horizon_steps=N)
    assert gram.factor_route_ == "gram" and qr.factor_route_ == "qr"
    assert 1.0 < gram.gram_condition_ < gr.GRAM_CONDITION_LIMIT
    a, b = qr.predict_many(*_windows(P, N)), gram.predict_many(*_windows(P, N))
    assert np.abs(a - b).max() <= 1e-8 * np.abs(a).max()
    np.testing.assert_allclose(gram.cv_table_["validation_error"], qr.cv_table_["validation_error"], rtol=1e-8)


def _one_signed(mean, T=4000, noise=0.1, seed=0):
    """The system of :func:`_system` driven by one-signed inputs (``mean`` + |N(0, 1)|), as pulse amplitudes are."""
    rng = np.random.default_rng(seed)
    u = mean + np.abs(rng.standard_normal((T, 2)))
    A, B = np.diag([0.8, 0.5, -0.3]), rng.standard_normal((3, 2))
    return state_space_session(u, A, B, noise=noise, rng=rng)


@pytest.mark.parametrize("mean", [5.0, 10.0])  # estimated conditions 2.6e7 and 9.1e7
@pytest.mark.parametrize("cls", [LsqPredictor, HankelPredictor])
def test_one_signed_inputs_keep_the_gram_route_with_the_qr_routes_predictions(cls, mean):
    # issue 14, found at the merge with the pulse-train demo: one-signed inputs raise the Gram's condition above the
    # old limit (1e7), and long-window fits fell to the QR route (24.7 s instead of ~1 s). Between 1e7 and 1e8 the
    # bound eps·κ (Golub & Van Loan 2013, section 5.3.8) stays near 1e-8, and the predictions agree far closer.
    s, P, N = _one_signed(mean), 5, 8
    auto, qr = _fit(cls, s, "auto", past_steps=P, horizon_steps=N), _fit(cls, s, "qr", past_steps=P, horizon_steps=N)
    assert auto.factor_route_ == "gram" and 1e7 < auto.gram_condition_ < gr.GRAM_CONDITION_LIMIT
    rng = np.random.default_rng(5)
    windows = (mean + np.abs(rng.standard_normal((6, P, 2))), rng.standard_normal((6, P, 3)),
               mean + np.abs(rng.standard_normal((6, N, 2))))
    a, b = qr.predict_many(*windows), auto.predict_many(*windows)
    assert np.abs(a - b).max() <= 1e-8 * np.abs(a).max()


@pytest.fixture(scope="module")
def ill():
    """Nearly noise-free outputs: the Hankel Gram of past 4 + horizon 8 is nearly singular (rank ≈ inputs·L +
    states), so the normal equations would lose about twice the digits of a QR."""
    return _system(noise=1e-7, seed=2)


@pytest.mark.filterwarnings("ignore:the Hankel predictor's KKT system")
@pytest.mark.parametrize("cls", [LsqPredictor, HankelPredictor])
def test_ill_conditioned_data_fall_back_to_the_qr_route(ill, cls):
    P, N = 4, 8
    auto, qr = _fit(cls, ill, "auto", past_steps=P, horizon_steps=N), _fit(cls, ill, "qr", past_steps=P,
                                                                         horizon_steps=N)
    assert auto.factor_route_ == "qr"
    assert auto.gram_condition_ > gr.GRAM_CONDITION_LIMIT  # recorded: why the Gram route was not taken
    np.testing.assert_array_equal(auto.predict_many(*_windows(P, N)), qr.predict_many(*_windows(P, N)))


def test_forced_gram_route_on_ill_conditioned_data_loses_accuracy_the_qr_route_keeps(ill):
    # The reason for the fallback (Golub & Van Loan 2013, Matrix Computations, section 5.3.8: the normal equations'
    # error grows with κ(A)², QR's with κ(A)): with the smallest strength the Gram route's fit is measurably worse.
    P, N = 4, 8
    kw = dict(past_steps=P, horizon_steps=N, alphas=[1e-12])
    qr, gram = _fit(LsqPredictor, ill, "qr", **kw), _fit(LsqPredictor, ill, "gram", **kw)
    assert gram.factor_route_ == "gram" and gram.gram_condition_ > 1e12
    a, b = qr.predict_many(*_windows(P, N)), gram.predict_many(*_windows(P, N))
    assert np.abs(a - b).max() > 1e-8 * np.abs(a).max()


# ------------------------------------------------------------------------------------------------ closed forms
def _earlier_hankel_route(monkeypatch):
    """The earlier Gram route of the projection Hankel predictor: one KKT solve per strength and fold, the projector
    from an SVD, the plan gaps over the null space (the reference of the closed forms below)."""
    from stimsteer.sysid.datadriven import hankel_predictor as hp

    monkeypatch.setattr(hp.HankelPredictor, "_score_projection_gram",
                        lambda self, tr, va, w, lambdas, lam_y, total=None: self._score_quadratic(tr, va, w, lambdas,
                                                                                                  lam_y))
    monkeypatch.setattr(hp, "_projection_closed_form", lambda *a, **k: (None, None))
    for name in ("_projection_map", "_projection_g"):
        monkeypatch.setattr(hp, name, lambda *a, **k: None)


@pytest.mark.parametrize("session, route", [("noisy", "auto"), ("one_signed", "auto"), ("noisy", "qr"),
                                            ("one_signed", "qr")])
def test_projection_closed_form_equals_the_earlier_kkt_route(noisy, session, route, monkeypatch):
    # on the QR route too (its merged factors are triangular in the Hankel order): the KKT solves and the SVD
    # projector gave 243 s of a 3-trial fit at past 100 / horizon 50 (benchmarks/README.md, sixteenth session).
    # Reference: the KKT system of the regularised problem solved per strength (Dörfler, Coulson & Markovsky 2023,
    # "Bridging direct and indirect data-driven control formulations via regularizations and relaxations", IEEE
    # Transactions on Automatic Control: the projection regulariser's equivalence with the least-squares predictor)
    from stimsteer.sysid.datadriven import hankel_predictor as hp

    s, P, N = (noisy if session == "noisy" else _one_signed(5.0)), 5, 8
    with monkeypatch.context() as mp:
        def no_kkt(*a, **k):
            raise AssertionError("a KKT solve was made although the closed form applies")

        mp.setattr(hp, "_kkt_predictor", no_kkt)
        mp.setattr(hp, "plan_gaps", no_kkt)
        new = _fit(HankelPredictor, s, route, past_steps=P, horizon_steps=N)
        a = new.predict_many(*_windows(P, N))
        g = new.solve_g(*(w[0] for w in _windows(P, N)))
    with monkeypatch.context() as mp:
        _earlier_hankel_route(mp)
        old = _fit(HankelPredictor, s, route, past_steps=P, horizon_steps=N)
        b = old.predict_many(*_windows(P, N))
        g_old = old.solve_g(*(w[0] for w in _windows(P, N)))
    assert new.factor_route_ == old.factor_route_ == ("gram" if route == "auto" else "qr")
    assert new.lambda_g_relative_ == old.lambda_g_relative_
    assert np.abs(a - b).max() <= 1e-8 * np.abs(b).max()
    Yf = old.blocks_.Yf
    assert np.abs(Yf @ (g - g_old)).max() <= 1e-8 * np.abs(Yf @ g_old).max()
    for col in ("validation_error", "fold_0", "fold_1", "fold_2", "plan_gap"):
        np.testing.assert_allclose(new.cv_table_[col], old.cv_table_[col], rtol=1e-8)
    np.testing.assert_allclose(new.reg_matrix_, old.reg_matrix_, atol=1e-10)



# ------------------------------------------------------------------------------------------------ QR route's grid
def _lsq_map(F, n_b, strength):
    """``argmin ||F2 − Θ F1||² + strength ||Θ||²`` by LAPACK's SVD-based least squares (gelsd) on the stacked
    system ``[F1ᵀ; √strength I] Θᵀ = [F2ᵀ; 0]``: the QR route's solve of each strength before its grid came from one
    SVD."""
    F1, F2 = F[:n_b], F[n_b:]
    A = np.vstack([F1.T, np.sqrt(strength) * np.eye(n_b)])
    B = np.vstack([F2.T, np.zeros((n_b, F2.shape[0]))])
    return sla.lstsq(A, B, lapack_driver="gelsd", check_finite=False)[0].T


def _stacked_fit(monkeypatch, session, **kw):
    """The QR route's fit with every strength (the grid's and the final map's) solved by its own SVD-based least
    squares on the stacked system (``_lsq_map``, LAPACK gelsd), as it was before the grid came from one SVD per
    fold, and each held-out error from its map (as before the errors came from the SVD's factors)."""
    from stimsteer.sysid.datadriven import lsq
    from stimsteer.sysid.datadriven.base import _validation_error

    with monkeypatch.context() as mp:
        mp.setattr(lsq, "_lsq_path", lambda F, n_b, strengths: [_lsq_map(F, n_b, s) for s in strengths])
        mp.setattr(lsq, "_lsq_one", lambda F, n_b, strength: _lsq_map(F, n_b, strength))  # the final map
        mp.setattr(lsq, "_lsq_errors", lambda F, n_b, strengths, F_val, w: [
            _validation_error(_lsq_map(F, n_b, s), F_val, w) for s in strengths])  # each map, then its residual
        return _fit(LsqPredictor, session, "qr", **kw)


@pytest.mark.parametrize("data", ["noisy", "ill"])
def test_the_qr_routes_strength_grid_from_one_svd_is_the_stacked_least_squares(data, request, monkeypatch):
    # reference: LAPACK's SVD-based least squares (gelsd) of each strength's stacked system; the filter-factor form
    # of the same minimiser (Hansen 1998, section 5.1) from one SVD per fold
    session = request.getfixturevalue(data)
    kw = dict(past_steps=4, horizon_steps=8, alphas=[1e-12, 1e-8, 1e-4, 1.0])
    path = _fit(LsqPredictor, session, "qr", **kw)
    stacked = _stacked_fit(monkeypatch, session, **kw)
    # measured: 6.2e-16 ("noisy") and 1.6e-9 ("ill": the Gram route refuses it, condition above 1e8) relative at
    # most; 2.8e-10 on "ill" when the folds' factors were merged by a QR of the stack instead of tpqrt, whose factors
    # are as accurate here (F Fᵀ within 1e-15 of H Hᵀ, the 10 smallest singular values within 1.3-4.8e-9 either way)
    np.testing.assert_allclose(path.cv_table_["validation_error"], stacked.cv_table_["validation_error"], rtol=5e-9)
    a, b = path.predict_many(*_windows(4, 8)), stacked.predict_many(*_windows(4, 8))
    assert path.alpha_ == stacked.alpha_ and np.abs(a - b).max() <= 1e-8 * np.abs(b).max()


@pytest.mark.parametrize("cond", [1e2, 1e7])
def test_the_final_map_by_one_qr_is_the_stacked_least_squares(cond):
    # reference: LAPACK's SVD-based least squares of the stacked system (gelsd, _lsq_map above); a lower-triangular
    # factor whose square block has condition `cond`, three strengths; another factor (not triangular) and s = 0
    # take the SVD route (the same numbers as _lsq_path)
    from stimsteer.sysid.datadriven.lsq import _lsq_one, _lsq_path

    rng = np.random.default_rng(4)
    n_b, n = 12, 20
    U, _ = np.linalg.qr(rng.standard_normal((n, n)))
    F = np.linalg.qr((U * np.geomspace(1.0, 1.0 / cond, n)) @ rng.standard_normal((n, n)), mode="r").T
    for strength in (1e-10, 1e-4, 1.0):
        ref = _lsq_map(F, n_b, strength)
        # measured: 1.5e-15 and 4.4e-15 relative at most (square blocks of condition 35 and 4.1e4)
        assert np.abs(_lsq_one(F, n_b, strength) - ref).max() <= 1e-9 * np.abs(ref).max()
    scrambled = F[::-1].copy()
    np.testing.assert_array_equal(_lsq_one(scrambled, n_b, 1e-4), _lsq_path(scrambled, n_b, [1e-4])[0])
    np.testing.assert_array_equal(_lsq_one(F, n_b, 0.0), _lsq_path(F, n_b, [0.0])[0])


def _formed_errors(F, n_b, strengths, F_val, w):
    """Each strength's held-out error with its residual formed (``Θ`` by the SVD's filter factors, then
    ``||Ω (F2v − Θ F1v)||²``): the QR route's errors before the expansion, written out."""
    from stimsteer.sysid.datadriven.base import _validation_error
    from stimsteer.sysid.datadriven.lsq import _lsq_path

    return [_validation_error(G, F_val, w) for G in _lsq_path(F, n_b, strengths)]


@pytest.mark.parametrize("noise", [1e-1, 1e-6])
def test_the_qr_routes_held_out_errors_by_their_expansion_are_the_formed_residuals(noise, monkeypatch):
    # reference: the residual formed for each strength's map (the definition of the held-out error). The expansion
    # ||T||² − 2 dᵀc + dᵀ((BΩ²Bᵀ) ∘ (XXᵀ)) d is exact algebra (Hansen 1998, Rank-Deficient and Discrete Ill-Posed
    # Problems, section 5.1: the filter-factor form of the ridge map); with noise 1e-6 the outputs are the
    # regressors times one map almost exactly, so the small strengths' errors are tiny differences of large terms
    # (1e-13 of them), which the guard hands to the formed residual (measured there: 1.3e-10 relative with the
    # guard, where the formed residuals only associate their products differently; 3.5e-3 without it)
    from stimsteer.sysid.datadriven import lsq

    rng = np.random.default_rng(8)
    n_b, pN, r_t, r_v = 14, 6, 60, 30
    Theta = rng.standard_normal((pN, n_b))

    def data(r):  # regressors and the outputs they predict through Theta, plus noise
        X = rng.standard_normal((n_b, r))
        return np.vstack([X, Theta @ X + noise * rng.standard_normal((pN, r))])
    F = np.linalg.qr(data(r_t).T, mode="r").T  # the training data's lower-triangular row-space factor
    F_val = data(r_v)
    w = rng.uniform(0.5, 2.0, pN)
    strengths = [1e-14, 1e-9, 1e-4, 1.0, 30.0]
    ref = _formed_errors(F, n_b, strengths, F_val, w)
    np.testing.assert_allclose(lsq._lsq_errors(F, n_b, strengths, F_val, w), ref, rtol=1e-9)
    if noise < 1e-3:  # the guard's work: without it the smallest strengths' errors lose their digits
        monkeypatch.setattr(lsq, "EXPANSION_GUARD", 0.0)
        unguarded = lsq._lsq_errors(F, n_b, strengths, F_val, w)
        assert abs(unguarded[0] - ref[0]) > 1e-6 * ref[0]


def test_the_qr_routes_final_factor_is_one_merge_onto_the_last_training_factor(noisy, monkeypatch):
    # reference: the final map from every fold merged afresh (the route before); the last fold's training factor
    # (the other folds merged) with that fold folded in has the same Gram F Fᵀ (Golub & Van Loan 2013, Matrix
    # Computations, section 6.5.5: updating a QR factorisation by rows), made by one tpqrt instead of two; the
    # folds' own factors are left as they were
    from stimsteer.sysid import _lapack_nogil
    from stimsteer.sysid.datadriven import base

    kw = dict(past_steps=4, horizon_steps=8, alphas=[1e-6, 1e-3, 1.0], n_splits=3)
    calls, real = [], _lapack_nogil.tpqrt_inplace
    monkeypatch.setattr(_lapack_nogil, "tpqrt_inplace", lambda *a: calls.append(a[0].shape) or real(*a))
    seen, total = [], base._DirectPredictor._total

    def spy(self, folds):
        before = [f.factor.copy() for f in folds]
        out = total(self, folds)
        seen.append(all(np.array_equal(a, f.factor) for a, f in zip(before, folds)))
        return out
    monkeypatch.setattr(base._DirectPredictor, "_total", spy)
    merged_once = _fit(LsqPredictor, noisy, "qr", **kw)
    n_once = len(calls)
    monkeypatch.setattr(base._DirectPredictor, "_total", lambda self, folds: base._merge(folds, folds[0].n_rows))
    calls.clear()
    merged_all = _fit(LsqPredictor, noisy, "qr", **kw)
    assert seen == [True] and n_once == len(calls) - 1
    a, b = merged_once.predict_many(*_windows(4, 8)), merged_all.predict_many(*_windows(4, 8))
    # measured: equal (the same tpqrt updates in the same order, fold 0, 1, then 2; the margin allows another order)
    assert np.abs(a - b).max() <= 1e-10 * np.abs(b).max()
    pd_cols = ["validation_error"]
    np.testing.assert_array_equal(merged_once.cv_table_[pd_cols], merged_all.cv_table_[pd_cols])


def test_the_svd_path_drops_what_gelsd_drops_on_a_rank_deficient_factor():
    from stimsteer.sysid.datadriven.lsq import _lsq_path

    rng = np.random.default_rng(3)
    F = rng.standard_normal((10, 30))
    F[3] = F[1] + F[2]  # F1 (the first 6 rows) has rank 5
    # unregularised (strength 0, a case the predictors refuse but the helper keeps): the null direction dropped, as
    # gelsd drops it; at 1e-6 that direction's computed singular value (1.8e-15, rounding noise) weighs 1.8e-9 and
    # the two solvers round it differently: 4e-9 measured
    for s, G, tol in zip([0.0, 1e-6], _lsq_path(F, 6, [0.0, 1e-6]), [1e-12, 1e-8]):
        np.testing.assert_allclose(G, _lsq_map(F, 6, s), atol=tol)


def test_the_qr_routes_algebra_runs_on_the_blas_threads_the_process_had(noisy, monkeypatch):
    # the fits limit BLAS to one thread for the Gram route's own workers; the QR route's folds run one after another
    # (a 2,450-row SVD: 7.8 s on one thread, 4.0 s on two; benchmarks/README.md, sixteenth session)
    threadpoolctl = pytest.importorskip("threadpoolctl")
    from stimsteer.sysid._blas_threads import _one_blas_thread, blas_thread_count, fit_blas_threads
    from stimsteer.sysid.datadriven import lsq

    seen, svd = [], lsq._lsq_svd
    monkeypatch.setattr(lsq, "_lsq_svd", lambda *a: seen.append(blas_thread_count()) or svd(*a))
    with threadpoolctl.threadpool_limits(limits=2, user_api="blas"):
        _fit(LsqPredictor, noisy, "qr", past_steps=4, horizon_steps=8, alphas=[1e-4, 1.0])
        assert seen and set(seen) == {2} and blas_thread_count() == 2

        @_one_blas_thread
        def outer():
            return blas_thread_count(), inner()

        @_one_blas_thread
        def inner():  # nested (the excitation check inside a fit): the count before the outermost one is kept
            with fit_blas_threads():
                return blas_thread_count()

        assert outer() == (1, 2) and blas_thread_count() == 2
        with fit_blas_threads():
            assert blas_thread_count() == 2  # outside any fit: left as it is


def test_fewer_training_columns_than_regressor_rows_score_one_strength_per_fold(monkeypatch):
    # two short trials (38 windows each against 41 regressor rows): each training fold's D has full column rank, so
    # I − Π = 0 and no strength enters the minimiser (an equality-constrained least squares whose stacked matrix has
    # full column rank has one minimiser: Golub & Van Loan 2013, Matrix Computations, section 6.2); one KKT solve per fold instead of one per strength (a 2-trial
    # fit at past 100 / horizon 50: 33 s -> 15 s; benchmarks/README.md, sixteenth session). Reference: the earlier
    # per-strength KKT solves with the projector I − V Vᵀ formed from the SVD (rounding-level, not zero)
    from stimsteer.sysid.datadriven import hankel_predictor as hp
    from stimsteer.sysid.excitation import rank_tolerance

    s, P, N = _system(T=100, n_trials=2), 5, 8
    calls, kkt = [], hp._kkt_predictor
    monkeypatch.setattr(hp, "_kkt_predictor", lambda *a: calls.append(1) or kkt(*a))
    new = _fit(HankelPredictor, s, "qr", past_steps=P, horizon_steps=N)

    def formed(D, n_columns):  # the projector as written before: I − V Vᵀ, whatever the rank
        _u, sv, Vt = np.linalg.svd(D, full_matrices=False)
        V = Vt[sv > rank_tolerance(sv, (D.shape[0], n_columns))].T
        return np.eye(V.shape[0]) - V @ V.T

    monkeypatch.setattr(hp, "_projection_complement", formed)
    n_new, calls[:] = len(calls), []
    old = _fit(HankelPredictor, s, "qr", past_steps=P, horizon_steps=N)
    n_lambdas = len(old.cv_table_)
    assert new.factor_route_ == "qr" and n_new == 2 and len(calls) == 2 * n_lambdas
    for col in ("validation_error", "fold_0", "fold_1"):  # measured: 4.5e-12 relative at most
        np.testing.assert_allclose(new.cv_table_[col], old.cv_table_[col], rtol=1e-8)
    a, b = new.predict_many(*_windows(P, N)), old.predict_many(*_windows(P, N))  # measured equal (the same map)
    assert new.lambda_g_relative_ == old.lambda_g_relative_ and np.abs(a - b).max() <= 1e-8 * np.abs(b).max()
