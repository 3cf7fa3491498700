"""The lifted predictor's regression from moments: the same ridge fits, scores and models as the materialised design.

Outside checks: scikit-learn's ``Ridge`` (the penalised least-squares solution on the standardised design; Hoerl A. E.,
Kennard R. W. (1970), Ridge regression: biased estimation for nonorthogonal problems, Technometrics 12(1):55-67),
and the cross-validation written out the way the lifted predictor defined it before its moments route (the design
materialised, one eigendecomposition of its standardised Gram per fold and dictionary, the dense lifted ``A``
stepped): the same table and the same choice. The window and dictionary definitions are the module's own
(:mod:`stimsteer.sysid._lift_features`).
"""

import numpy as np
import pytest
from sklearn.linear_model import Ridge

import stimsteer.sysid.lifted as lifted
from stimsteer.control import SaturatingRateNetworkPlant, random_network, record_session
from stimsteer.sysid._lift_features import draw_dictionary, windows
from stimsteer.sysid._lift_moments import (Candidate, FoldSystem, LiftMoments, eigen_path, fitted_rows, simulate_rows,
                                           solve_blocks, stacked_qr_ridge)
from stimsteer.sysid.lifted import LiftedPredictor


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(8)
    plant = SaturatingRateNetworkPlant(random_network(3, density=0.6, seed=8), B=np.abs(rng.normal(size=(3, 2))),
                                       C=np.eye(2, 3), measurement_noise_std=0.01, sample_rate_hz=100.0)
    u = np.repeat(rng.uniform(-3, 3, size=(120, 2)), 10, axis=0)
    s = record_session(plant, u, trials=[(k * 150, (k + 1) * 150) for k in range(8)], seed=8)
    mask = s.mask.copy()
    mask[400:405] = False  # a gap: a trial of two segments
    return type(s)(**{**s.__dict__, "mask": mask})


def _materialised(per_trial, trials, T):
    """The regression rows of ``trials``, stacked: previous raw window and source, input, output, next source."""
    parts = []
    for i in trials:
        for u, y in per_trial[i]:
            raw, src = windows(u, y, T)
            parts.append((raw[:-1], src[:-1], u[T:], y[T:], src[1:]))
    return tuple(np.concatenate(c) for c in zip(*parts))


@pytest.mark.parametrize("kind, n_features", [("rff", 12), ("rbf", 9), ("poly2", None), ("rff", 0)])
def test_the_moments_give_scikit_learns_ridge_on_the_standardised_design(session, kind, n_features):
    T, m, p = 3, session.n_inputs, session.n_outputs
    per_trial, positions = lifted._trial_segments(session, T, with_positions=True)
    moments = LiftMoments(session, positions, per_trial, [i % 3 for i in range(len(per_trial))], T, m, p)
    trials = moments.trials_except(1)  # a fold's training trials: the sums of the other parts
    sums = moments.shared(1)
    dic = moments.dictionary(kind, sums, trials, n_features, 1.0, 3)
    rows = _materialised(per_trial, trials, T)
    ref_dic = draw_dictionary(kind, rows[1], n_features, 1.0, 3)  # drawn from the materialised sources
    # measured at most (four dictionaries): means 3.2e-15, scales 1.3e-15, frequencies/centres 1.2e-15 relative,
    # coefficients 1.2e-11 of their largest, intercepts 5.5e-14; the bounds are these with margin, 1e-8 the issue's
    # "same predictions" bound
    np.testing.assert_allclose(dic.mean, ref_dic.mean, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(dic.scale, ref_dic.scale, rtol=1e-10)
    if ref_dic.omega is not None:
        np.testing.assert_allclose(dic.omega, ref_dic.omega, rtol=1e-10, atol=1e-12)
    X = np.hstack([rows[0], dic(rows[1]), rows[2]])
    Y = np.hstack([rows[3], dic(rows[4])])
    mx, sx = X.mean(0), X.std(0)
    sx = np.where(sx > 1e-12, sx, 1.0)
    system = FoldSystem(sums, moments.nr, moments.shift_b, moments.shift_y)
    cand = Candidate(system, moments.feature_sums(trials, [dic]), slice(0, dic.n_features))
    for alpha in (1e-4, 1e-2, 1.0):
        ref = Ridge(alpha=alpha * X.shape[0], solver="svd").fit((X - mx) / sx, Y)
        ref_theta = ref.coef_.T / sx[:, None]
        ref_b = ref.intercept_ - mx @ ref_theta
        for beta in (solve_blocks(cand, alpha, system.factor(alpha)), eigen_path(cand, [alpha])[0]):
            theta, b = cand.coefficients(beta)
            scale = np.abs(ref_theta).max()
            np.testing.assert_allclose(theta, ref_theta, atol=1e-8 * scale)
            np.testing.assert_allclose(b, ref_b, atol=1e-8 * max(scale, np.abs(ref_b).max()))


def _old_cv_table(est, session, combos, alphas):
    """The cross-validation as the lifted predictor ran it on the materialised design (see the module docstring)."""
    T, H, m, p = est.past_steps, est.cv_horizon_steps, session.n_inputs, session.n_outputs
    per_trial = lifted._trial_segments(session, T)
    folds = est._folds(per_trial, min(est.n_folds, len(per_trial)))
    out = []
    for n, w in combos:
        scores, counted = np.zeros((len(folds), len(alphas))), np.zeros(len(folds), bool)
        for k, fold in enumerate(folds):
            train = _materialised(per_trial, [i for i in range(len(per_trial)) if i not in fold], T)
            valid = [s for i in sorted(fold) for s in per_trial[i] if len(s[0]) >= T + H]
            dic = draw_dictionary(est.dictionary, train[1], n, w, est.seed)
            X, Y = np.hstack([train[0], dic(train[1]), train[2]]), np.hstack([train[3], dic(train[4])])
            mx, my, sx = X.mean(0), Y.mean(0), X.std(0)
            sx = np.where(sx > 1e-12, sx, 1.0)
            Xs = (X - mx) / sx
            lam, V = np.linalg.eigh(Xs.T @ Xs)
            VtXY = V.T @ (Xs.T @ (Y - my))
            raw0, src0, uf, yt = lifted._validation_windows(valid, T, H)
            z = np.hstack([raw0, dic(src0), np.ones((raw0.shape[0], 1))])
            counted[k] = True
            for j, a in enumerate(alphas):
                d = lam + a * Xs.shape[0]
                d = np.where(d > 1e-12 * max(lam[-1], 1e-300), d, np.inf)
                theta = (V @ (VtXY / d[:, None])) / sx[:, None]
                A, B, C = lifted._lifted_matrices(theta, my - mx @ theta, T, m, p, dic.n_features)
                zz, err = z.copy(), np.empty_like(yt)
                for h in range(H):  # the dense lifted dynamics, stepped
                    zz = zz @ A.T + uf[:, h] @ B.T
                    err[:, h] = zz @ C.T - yt[:, h]
                var = np.var(yt.reshape(-1, p), axis=0)
                scores[k, j] = np.mean(np.mean(err ** 2, axis=(0, 1)) / np.where(var > 0, var, 1.0))
        out += [float(np.mean(scores[counted, j])) for j in range(len(alphas))]
    return np.array(out)


@pytest.mark.parametrize("settings", [
    dict(past_steps=3, feature_grid=(0, 5, 20), bandwidths=(0.5, 2.0), alphas=(1e-8, 1e-4, 1.0)),
    dict(past_steps=2, dictionary="rbf", feature_grid=(0, 10, 30), bandwidths=(1.0,), alphas=(1e-6, 1e-2)),
    dict(past_steps=2, dictionary="poly2", alphas=(0.0, 1e-6, 1e-2)),
    dict(past_steps=1, feature_grid=(0, 6), bandwidths=(1.0,), alphas=(1e-6, 1e-2)),  # a window of one sample
])
def test_the_cross_validation_table_is_that_of_the_materialised_design(session, settings):
    est = LiftedPredictor(cv_horizon_steps=12, **settings).fit(session)
    table = est.cv_table_
    combos = list(dict.fromkeys(zip(table["n_features"], table["bandwidth"])))
    old = _old_cv_table(est, session, [(int(n), float(w)) for n, w in combos], settings["alphas"])
    # measured: at most 1.2e-11 relative on these cases; 1e-8 (the "same predictions") is the bound
    np.testing.assert_allclose(table["cv_nmse"].to_numpy(), old, rtol=1e-8)
    assert int(np.argmin(old)) == int(np.flatnonzero(table["selected"])[0])


def test_stepping_the_fitted_rows_is_stepping_the_dense_lifted_dynamics(session):
    est = LiftedPredictor(past_steps=3, n_features=15, bandwidths=(1.0,), alphas=(1e-3,)).fit(session)
    rng = np.random.default_rng(2)
    z0, uf = est.lift(rng.normal(size=(7, 3, 2)), rng.normal(size=(7, 3, 2))), rng.normal(size=(7, 25, 2))
    z, dense = z0.copy(), np.empty((7, 25, 2))
    for h in range(25):
        z = z @ est.A_.T + uf[:, h] @ est.B_.T
        dense[:, h] = z @ est.C_.T
    Ar, Br = lifted._fitted_rows_of(est.A_, est.B_, 3, 2, 2)
    # measured: equal (the shifted entries are copies; the fitted rows the same products); 1e-11 a margin for BLAS
    np.testing.assert_allclose(simulate_rows(Ar, Br, 3, 2, 2, z0, uf), dense, rtol=1e-11, atol=1e-11)
    np.testing.assert_array_equal(Ar, fitted_rows(*_coefs(est), 3, 2, 2, 15)[0])


def _coefs(est):
    """The fitted rows' coefficients over ``[z_prev; u]`` and intercepts, read back out of ``A`` and ``B``."""
    Ar, Br = lifted._fitted_rows_of(est.A_, est.B_, est.past_steps_, est.n_inputs_, est.n_outputs_)
    return np.hstack([Ar[:, :-1], Br]).T, Ar[:, -1]


def test_the_final_fit_solves_its_moments_and_never_materialises_the_design(session, monkeypatch):
    settings = dict(past_steps=3, n_features=15, bandwidths=(1.0,), alphas=(1e-2,))
    reference = LiftedPredictor(**settings)
    monkeypatch.setattr(lifted, "_GRAM_COND_MAX", 0.0)  # the stacked least-squares route, forced
    reference.fit(session)
    monkeypatch.undo()

    def refuse(*_args):
        raise AssertionError("the design was materialised")

    monkeypatch.setattr(lifted, "_transitions", refuse)
    lean = LiftedPredictor(**settings).fit(session)
    # measured: 7.8e-14 (A) and 3e-16 (B) of their largest entries; the condition bound (k + α)/α = 2.9e3 (k = 29)
    # times rounding, with margin
    np.testing.assert_allclose(lean.A_, reference.A_, atol=1e-9 * np.abs(reference.A_).max())
    np.testing.assert_allclose(lean.B_, reference.B_, atol=1e-9 * np.abs(reference.B_).max())


@pytest.fixture(scope="module")
def collinear():
    """A session whose standardised design has condition number 1.4e9 (measured): two outputs that differ by 1e-6 of
    a state, held inputs, almost no noise."""
    rng = np.random.default_rng(8)
    plant = SaturatingRateNetworkPlant(random_network(3, density=0.6, seed=8), B=np.abs(rng.normal(size=(3, 2))),
                                       C=np.array([[1.0, 0, 0], [1.0, 1e-6, 0]]), measurement_noise_std=1e-9,
                                       sample_rate_hz=100.0)
    u = np.repeat(rng.uniform(-3, 3, size=(60, 2)), 20, axis=0)
    return record_session(plant, u, trials=[(k * 150, (k + 1) * 150) for k in range(8)], seed=8)


def test_on_ill_conditioned_data_the_gram_loses_accuracy_and_the_streamed_qr_keeps_it(collinear):
    # reference: LAPACK's SVD-based least squares on the materialised stacked design (lifted._ridge)
    T = 8
    per_trial, positions = lifted._trial_segments(collinear, T, with_positions=True)
    moments = LiftMoments(collinear, positions, per_trial, [0] * len(per_trial), T, 2, 2)
    trials = moments.trials_except(None)
    dic = moments.dictionary("rff", moments.shared(None), trials, 10, 1.0, 0)
    rows = _materialised(per_trial, trials, T)
    X, Y = np.hstack([rows[0], dic(rows[1]), rows[2]]), np.hstack([rows[3], dic(rows[4])])
    errors = {}
    for alpha in (1e-6, 1e-10):
        ref = lifted._ridge(X, Y, alpha)[0]
        system = FoldSystem(moments.shared(None), moments.nr, moments.shift_b, moments.shift_y)
        cand = Candidate(system, moments.feature_sums(trials, [dic]), slice(0, 10))
        gram = cand.coefficients(solve_blocks(cand, alpha, system.factor(alpha)))[0]
        qr = cand.coefficients(stacked_qr_ridge(moments, trials, dic, alpha, cand.mx, cand.sx, cand.my))[0]
        errors[alpha] = [np.abs(t - ref).max() / np.abs(ref).max() for t in (gram, qr)]
    # measured: 4.2e-10 and 1.5e-12 at 1e-6 (bound (k + α)/α = 4.4e7: the moments are kept); 7.8e-6 and 2.5e-9 at
    # 1e-10 (bound 4.4e11: the fit takes the QR)
    assert errors[1e-6][0] < 1e-8 and errors[1e-6][1] < 1e-10
    assert errors[1e-10][0] > 1e-6 and errors[1e-10][1] < 1e-8


def test_a_weak_strength_is_fitted_by_the_streamed_qr_and_matches_least_squares(collinear, monkeypatch):
    calls = []
    real = lifted.stacked_qr_ridge
    monkeypatch.setattr(lifted, "stacked_qr_ridge", lambda *a: calls.append(1) or real(*a))
    weak = LiftedPredictor(past_steps=8, n_features=10, bandwidths=(1.0,), alphas=(1e-10,), seed=0).fit(collinear)
    assert calls
    per_trial = lifted._trial_segments(collinear, 8)
    rows = _materialised(per_trial, range(len(per_trial)), 8)
    dic = weak.dictionary_
    theta, b = lifted._ridge(np.hstack([rows[0], dic(rows[1]), rows[2]]), np.hstack([rows[3], dic(rows[4])]), 1e-10)
    A = lifted._lifted_matrices(theta, b, 8, 2, 2, 10)[0]
    np.testing.assert_allclose(weak.A_, A, atol=1e-8 * np.abs(A).max())
    calls.clear()
    LiftedPredictor(past_steps=8, n_features=10, bandwidths=(1.0,), alphas=(1e-6,)).fit(collinear)  # bound 4.4e7
    assert not calls
