"""Recursive ridge ARX with a forgetting factor against the batch solutions it must equal.

Outside check (Ljung L. 1999, "System Identification: Theory for the User", 2nd ed., ch. 11, eqs. 11.13-11.15 and
the weighted criterion they minimise): recursive least squares started at ``P0 = I/α`` with forgetting ``λ = 1``
equals the batch ridge solution ``(αI + XᵀX)⁻¹XᵀY``; with ``λ < 1`` it equals the exponentially weighted ridge
solution ``(λ^N αI + Σ λ^{N−t} φφᵀ)⁻¹ Σ λ^{N−t} φ yᵀ``. The batch side is scikit-learn's Ridge (no intercept
fitted; the constant regressor is a column, penalised like the others) and a direct numpy solve.
"""

import numpy as np
import pytest
from sklearn.linear_model import Ridge

from stimsteer.control import LinearNetworkPlant, random_network, record_session
from stimsteer.sysid import InvalidParameterError
from stimsteer.sysid.recursive import RecursiveRidgeArx, arx_rows


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(21)
    plant = LinearNetworkPlant(random_network(3, density=0.6, seed=21), B=rng.normal(size=(3, 2)) * 0.3,
                               C=np.eye(2, 3), measurement_noise_std=0.05, sample_rate_hz=100.0)
    return record_session(plant, rng.normal(size=(900, 2)), trials=[(k * 150, (k + 1) * 150) for k in range(6)],
                          seed=21)


def _rows(session, na, nb):
    parts = [arx_rows(*session.read(a, b)[:2], na, nb) for a, b in session.segments(min_length=max(na, nb - 1) + 1)]
    return np.vstack([x for x, _ in parts]), np.vstack([y for _, y in parts])


def test_forgetting_one_equals_the_batch_ridge_solution(session):
    est = RecursiveRidgeArx(output_lags=2, input_lags=3, alpha=0.5, forgetting=1.0).fit(session)
    X, Y = _rows(session, 2, 3)
    ref = Ridge(alpha=0.5, fit_intercept=False, solver="cholesky").fit(X, Y).coef_.T
    np.testing.assert_allclose(est.coef_, ref, rtol=0, atol=1e-10)


def test_forgetting_below_one_equals_the_weighted_ridge_solution(session):
    lam, alpha = 0.99, 0.5
    est = RecursiveRidgeArx(output_lags=1, input_lags=1, alpha=alpha, forgetting=lam).fit(session)
    X, Y = _rows(session, 1, 1)
    N = len(X)
    w = lam ** (N - 1 - np.arange(N))
    ref = np.linalg.solve(lam ** N * alpha * np.eye(X.shape[1]) + (X * w[:, None]).T @ X, (X * w[:, None]).T @ Y)
    np.testing.assert_allclose(est.coef_, ref, rtol=1e-8, atol=1e-10)


def test_the_model_sequence_holds_one_model_per_trial_ending_with_the_final_one(session):
    est = RecursiveRidgeArx(output_lags=2, input_lags=2).fit(session)
    assert est.coef_path_.shape[0] == session.n_trials and list(est.path_trials_) == list(range(session.n_trials))
    np.testing.assert_array_equal(est.coef_path_[-1], est.coef_)
    up, yp, uf = session.u[:3], session.y[:3], session.u[3:12]
    np.testing.assert_allclose(est.prediction_maps(3, 9).apply(up, yp, uf), est.predict(up, yp, uf), atol=1e-10)


@pytest.mark.parametrize("value", [0.0, -0.5, 1.01, float("nan")])
def test_a_forgetting_factor_outside_zero_one_is_refused(session, value):
    with pytest.raises(InvalidParameterError, match=r"forgetting must be in \(0, 1\]"):
        RecursiveRidgeArx(forgetting=value).fit(session)


def _ljung_rls(X, Y, alpha, lam):
    """Ljung (1999) eqs. 11.13-11.15 row by row, written out here: the recursion the fit's information form equals."""
    theta, P = np.zeros((X.shape[1], Y.shape[1])), np.eye(X.shape[1]) / alpha
    for phi, y in zip(X, Y):
        Pphi = P @ phi
        k = Pphi / (lam + phi @ Pphi)
        theta = theta + np.outer(k, y - phi @ theta)
        P = (P - np.outer(k, Pphi)) / lam
    return theta


@pytest.mark.parametrize("lam, block", [(1.0, 7), (0.97, 7), (0.9, 64)])
def test_the_model_after_each_trial_minimises_the_weighted_criterion(session, monkeypatch, lam, block):
    # rows weighed in by blocks (here shorter than a trial, so that the forgetting crosses block edges); the model
    # after each trial is the weighted ridge solution of the rows so far (Ljung 1999, the criterion of eq. 11.15)
    import stimsteer.sysid.recursive as recursive

    monkeypatch.setattr(recursive, "_BLOCK_ROWS", block)
    est = RecursiveRidgeArx(output_lags=2, input_lags=2, alpha=0.3, forgetting=lam).fit(session)
    done = []
    for t, (a, b) in enumerate(session.trials):
        done.append(arx_rows(*session.read(a, b)[:2], 2, 2))
        X, Y = np.vstack([x for x, _ in done]), np.vstack([y for _, y in done])
        w = lam ** (len(X) - 1 - np.arange(len(X)))
        ref = np.linalg.solve(lam ** len(X) * 0.3 * np.eye(X.shape[1]) + (X * w[:, None]).T @ X,
                              (X * w[:, None]).T @ Y)
        # tolerances: the author's margins over rounding (coefficients of about 0.5; the row-by-row recursion adds
        # a rounding per row over up to 900 rows)
        np.testing.assert_allclose(est.coef_path_[t], ref, rtol=0, atol=1e-12)
        if lam == 1.0:  # the row-by-row recursion itself, where it keeps its accuracy (see below)
            np.testing.assert_allclose(est.coef_path_[t], _ljung_rls(X, Y, 0.3, lam), rtol=0, atol=1e-9)


def test_the_row_by_row_recursion_loses_accuracy_that_the_information_form_keeps(session):
    # with strong forgetting, P = R⁻¹ of the row-by-row recursion grows by 1/λ per row in the directions the rows
    # do not excite, and its rounding grows with it (common practice, no source): after three trials at λ = 0.9 it
    # is off the criterion's minimiser by far more than the information form the fit uses
    est = RecursiveRidgeArx(output_lags=2, input_lags=2, alpha=0.3, forgetting=0.9).fit(session)
    X, Y = (np.vstack(parts) for parts in zip(*[arx_rows(*session.read(a, b)[:2], 2, 2) for a, b in session.trials[:3]]))
    w = 0.9 ** (len(X) - 1 - np.arange(len(X)))
    ref = np.linalg.solve(0.9 ** len(X) * 0.3 * np.eye(X.shape[1]) + (X * w[:, None]).T @ X, (X * w[:, None]).T @ Y)
    # 1e-6: the author's line between rounding and drift (the drift measured once here: 0.24)
    assert np.abs(est.coef_path_[2] - ref).max() < 1e-12 < 1e-6 < np.abs(_ljung_rls(X, Y, 0.3, 0.9) - ref).max()


def test_an_unexcited_direction_after_strong_forgetting_gives_the_least_norm_model():
    # λ^N α underflows (λ = 0.5 over 1,200 rows) and the second input never moves: R is singular, and the model is
    # the least-squares solution of least norm (numpy's lstsq, the outside reference) instead of an error
    from stimsteer.sysid import Session

    rng = np.random.default_rng(4)
    u = np.column_stack([rng.normal(size=1200), np.zeros(1200)])
    y = np.convolve(u[:, 0], [0.0, 0.5, 0.2])[:1200, None] + 0.01 * rng.normal(size=(1200, 1))
    session = Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, 600), (600, 1200)])
    est = RecursiveRidgeArx(output_lags=1, input_lags=2, alpha=1e-3, forgetting=0.5).fit(session)
    X, Y = (np.vstack(parts) for parts in zip(*[arx_rows(*session.read(a, b)[:2], 1, 2) for a, b in session.trials]))
    w = 0.5 ** (len(X) - 1 - np.arange(len(X)))
    R, r = (X * w[:, None]).T @ X, (X * w[:, None]).T @ Y
    np.testing.assert_allclose(est.coef_, np.linalg.lstsq(R, r, rcond=None)[0], atol=1e-8)  # author's margin
    assert np.all(np.isfinite(est.coef_path_))
