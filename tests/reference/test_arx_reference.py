"""Ridge ARX and its residual tests checked against outside references.

* numpy.linalg.lstsq and scikit-learn's Ridge on the same regression rows (the libraries' documented solvers);
* the materialised lagged design's Gram matrix (definition of the normal equations);
* the ARX transfer function B(q)/A(q) simulated by scipy.signal.lfilter (Ljung L. 1999, System Identification:
  Theory for the User, 2nd ed., section 4.2: the ARX model's input-output relation A(q) y = B(q) u + e);
* Ljung–Box on white noise keeps its nominal size (Ljung G.M., Box G.E.P. 1978, On a measure of lack of fit in
  time series models, Biometrika 65:297–303), and a hand-derived small example of its formula.

Tolerances: 1e-10 for coefficient agreement and 1e-12 relative for the Gram are the targets set in the project's
issue (float64 solves of well-conditioned systems, condition numbers below 1e2 here).
"""

import numpy as np
import pytest
import scipy.signal
from sklearn.linear_model import Ridge

from stimsteer.sysid._lagged import _stream_sums
from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.arx_regression import _pieces, _Problem
from stimsteer.sysid.metrics import ljung_box
from stimsteer.sysid.session import Session


def noisy_session(rng, n_trials=5, length=300, p=2, m=3, masked=(57, 58, 900)):
    """Invented MIMO data (random stable AR part + noise), several trials and a few masked NaN samples."""
    T = n_trials * length
    u = rng.standard_normal((T, m))
    y = np.zeros((T, p))
    A1 = 0.4 * np.eye(p) + 0.1 * rng.standard_normal((p, p))
    B0 = rng.standard_normal((p, m))
    for k in range(1, T):
        y[k] = A1 @ y[k - 1] + B0 @ u[k - 1] + 0.3 * rng.standard_normal(p)
    mask = np.ones(T, dtype=bool)
    mask[list(masked)] = False
    u[list(masked)] = np.nan
    return Session(u=u, y=y, sample_rate_hz=1000.0, trials=[(i * length, (i + 1) * length) for i in range(n_trials)],
                   mask=mask)


def regression_rows(s, na, nb, d):
    """The ARX rows built the obvious way: every k whose whole lag window lies in one valid segment."""
    L = max(na, d + nb - 1)
    X, Y = [], []
    for a, b in s.segments(min_length=L + 1):
        for k in range(a + L, b):
            X.append(np.concatenate([s.y[k - i] for i in range(1, na + 1)] + [s.u[k - d - j] for j in range(nb)]))
            Y.append(s.y[k])
    return np.array(X), np.array(Y)


@pytest.mark.parametrize("na, nb, d", [(2, 2, 1), (3, 1, 0), (1, 3, 2)])
def test_alpha_zero_equals_lstsq(rng, na, nb, d):
    s = noisy_session(rng)
    X, Y = regression_rows(s, na, nb, d)
    # numpy.linalg.lstsq: least squares by SVD (NumPy reference documentation)
    coef = np.linalg.lstsq(X, Y, rcond=None)[0].T
    est = RidgeArx(output_lags=na, input_lags=nb, delay_samples=d, alphas=[0.0], fit_intercept=False).fit(s)
    np.testing.assert_allclose(est.coef_, coef, rtol=0, atol=1e-10)
    X1 = np.hstack([X, np.ones((X.shape[0], 1))])
    sol = np.linalg.lstsq(X1, Y, rcond=None)[0].T
    est = RidgeArx(output_lags=na, input_lags=nb, delay_samples=d, alphas=[0.0], fit_intercept=True).fit(s)
    np.testing.assert_allclose(est.coef_, sol[:, :-1], rtol=0, atol=1e-10)
    np.testing.assert_allclose(est.intercept_, sol[:, -1], rtol=0, atol=1e-10)


@pytest.mark.parametrize("alpha", [1e-3, 0.1, 2.0])
@pytest.mark.parametrize("fit_intercept", [False, True])
def test_ridge_equals_sklearn_on_standardised_rows(rng, alpha, fit_intercept):
    s = noisy_session(rng)
    X, Y = regression_rows(s, 2, 2, 1)
    n = X.shape[0]
    est = RidgeArx(output_lags=2, input_lags=2, delay_samples=1, alphas=[alpha], fit_intercept=fit_intercept).fit(s)
    Xc = X - X.mean(0) if fit_intercept else X
    Yc = Y - Y.mean(0) if fit_intercept else Y
    scale = np.sqrt((Xc ** 2).mean(0))  # std with centring, RMS without (the documented standardisation)
    np.testing.assert_allclose(est.scale_, scale, rtol=1e-10)
    # scikit-learn Ridge minimises ||Y − X w||² + alpha ||w||² (scikit-learn user guide, "Ridge regression")
    ref = Ridge(alpha=alpha * n, fit_intercept=False, solver="cholesky").fit(Xc / scale, Yc)
    np.testing.assert_allclose(est.coef_, ref.coef_ / scale, rtol=0, atol=1e-10)
    if fit_intercept:
        np.testing.assert_allclose(est.intercept_, Y.mean(0) - est.coef_ @ X.mean(0), rtol=0, atol=1e-10)


@pytest.mark.parametrize("n_trials, chunk_rows", [(5, 61), (5, 1), (5, 10_000), (1, 7)])
def test_structured_gram_equals_materialised_gram(rng, n_trials, chunk_rows):
    # The streamed sums of every fold against the Gram of the materialised lagged rows (the definition of the
    # normal equations). Chunks of 61, 1 and 10,000 rows put chunk edges inside pieces, at every row, and nowhere;
    # one trial is folded into contiguous blocks, so pieces also start and end inside a segment.
    s = noisy_session(rng, n_trials=n_trials, length=1500 // n_trials)
    prob = _Problem(2, 3, 3, 2, 2, False)
    L = prob.L
    pieces, k, _scheme = _pieces(s, L, 5)
    shift = rng.standard_normal(prob.c)
    folds, lo, hi = _stream_sums(s, pieces, k, L, chunk_rows, shift)
    for f, acc in enumerate(folds):
        mom = acc.moments()
        rows = []
        for a, b, fold in pieces:
            if fold == f:
                for t in range(a, b):
                    rows.append(np.concatenate([np.concatenate([s.y[t - lag], s.u[t - lag]]) - shift
                                                for lag in range(L + 1)]))
        Z = np.array(rows)
        G = Z.T @ Z
        assert mom.n == Z.shape[0]
        assert np.abs(mom.W - G).max() <= 1e-12 * np.abs(G).max()
        np.testing.assert_allclose(mom.s, Z.sum(0), rtol=0, atol=1e-12 * np.abs(Z).sum())
    valid = s.mask & np.isfinite(s.u).all(1)
    np.testing.assert_array_equal(lo, s.u[valid].min(0))
    np.testing.assert_array_equal(hi, s.u[valid].max(0))


def test_state_space_realisation_equals_transfer_function(rng):
    # SISO ARX y_k = 1.2 y_{k-1} − 0.5 y_{k-2} + 0.8 u_{k-1} + 0.3 u_{k-2} (poles |z| = √0.5, stable; invented).
    # Its transfer function is (0.8 q⁻¹ + 0.3 q⁻²) / (1 − 1.2 q⁻¹ + 0.5 q⁻²); lfilter simulates it from rest.
    u = rng.standard_normal((400, 1))
    y = scipy.signal.lfilter([0.0, 0.8, 0.3], [1.0, -1.2, 0.5], u[:, 0])[:, None]
    est = RidgeArx(output_lags=2, input_lags=2, delay_samples=1, alphas=[0.0], fit_intercept=False).fit(
        Session(u=u, y=y, sample_rate_hz=1.0))
    np.testing.assert_allclose(est.coef_, [[1.2, -0.5, 0.8, 0.3]], atol=1e-10)
    np.testing.assert_allclose(est.model_.simulate(u), y, atol=1e-8)
    # and the realisation's k-step predictor is the ARX recursion on its own predictions
    np.testing.assert_allclose(est.model_.predict(u[:2], y[:2], u[2:]), y[2:], atol=1e-8)
    np.testing.assert_allclose(est.predict(u[:2], y[:2], u[2:]), y[2:], atol=1e-8)


def test_ljung_box_hand_example():
    # e = (1, −1, 1, −1): mean 0, Σe² = 4, ρ1 = (−1 −1 −1)/4 = −0.75, ρ2 = (1 + 1)/4 = 0.5;
    # Q = n(n+2) Σ ρ_k²/(n−k) = 4·6·(0.5625/3 + 0.25/2) = 7.5 (worked by hand from Ljung & Box 1978, eq. 2.1)
    assert ljung_box(np.array([1.0, -1.0, 1.0, -1.0]), 2).statistic[0] == pytest.approx(7.5, rel=1e-14)


def test_ljung_box_size_on_white_noise(rng):
    # 2000 independent white series of 500 samples, h = 10, level 5%. If the test keeps its nominal size the number
    # of rejections is Binomial(2000, 0.05): mean 100, sd √(2000·0.05·0.95) = 9.75, so a 99.9% interval
    # (± 3.29 sd) for the rate is [0.034, 0.066].
    res = ljung_box(rng.standard_normal((500, 2000)), 10)
    rate = res.rejects(0.05).mean()
    assert 0.034 <= rate <= 0.066
