"""Lag products by short FFTs (``sysid._lag_spectra``): the same sums as the direct products, and the fits that take
them at long windows unchanged.

References: SciPy's ``scipy.signal.correlate`` with ``method="direct"`` (a plain sum per lag) for the products;
the definition ``X[δ] = Σ_t Z_t Z_{t-δ}ᵀ`` (Ljung 1999, "System identification", 2nd ed., sec. 7.3); the FFT's
normwise rounding bound, a small multiple of ``ε log₂ N`` times the norms of the two sequences (Higham 2002,
"Accuracy and stability of numerical algorithms", 2nd ed., sec. 24.1), for the tolerances.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from stimsteer.sysid import Session, _lag_spectra, _lagged
from stimsteer.sysid._lag_spectra import fft_length, spectral_products, uses_spectra
from stimsteer.sysid.datadriven.hankel_predictor import HankelPredictor
from stimsteer.sysid.arx import RidgeArx
from tests.sysid.simulated import state_space_session


def _by_scipy(B: np.ndarray, L: int) -> np.ndarray:
    """``X[δ][i, k] = Σ_τ B[L + τ, i] B[L + τ − δ, k]`` from SciPy's direct correlation: ``correlate(b, a,
    "valid")[ℓ] = Σ_τ b[τ + ℓ] a[τ]`` with ``a`` the chunk's rows of channel ``i``, ``b`` channel ``k`` with its
    lead-in and ``ℓ = L − δ``."""
    c = B.shape[1]
    X = np.empty((L + 1, c, c))
    for i in range(c):
        for k in range(c):
            z = signal.correlate(B[:, k], B[L:, i], mode="valid", method="direct")  # L + 1 values
            X[:, i, k] = z[::-1]
    return X


# rows: one; fewer than one segment; exactly two segments; two segments and a rest (N − L rows per segment)
@pytest.mark.parametrize("L, c, n", [(8, 3, 1), (8, 3, 20), (24, 4, 2 * (fft_length(24) - 24)),
                                     (24, 4, 2 * (fft_length(24) - 24) + 17), (60, 2, 1000)])
def test_spectral_products_equal_scipy_direct_correlation(L, c, n):
    rng = np.random.default_rng(L + n)
    B = rng.standard_normal((L + n, c)) + 0.5  # an offset, as raw recordings have
    X = spectral_products(B, L)
    ref = _by_scipy(B, L)
    # tolerance: the normwise FFT bound, eps · log2 N · |x| |y| with a margin of 10 (author's margin; measured
    # at most 7e-16 of the largest product, benchmarks/bench_lag_products.py)
    bound = 10 * np.finfo(float).eps * np.log2(fft_length(L)) * (B ** 2).sum(axis=0).max()
    np.testing.assert_allclose(X, ref, rtol=0, atol=bound)
    np.testing.assert_array_equal(X[0], X[0].T)  # exactly symmetric, as Zᵀ Z


def test_a_silent_channel_gives_exact_zeros():
    # the transform of zeros is zeros (linearity of the DFT, common practice, no source): an unstimulated site's
    # products stay exactly 0, so rank checks see them as such
    rng = np.random.default_rng(3)
    B = rng.standard_normal((40 + 3000, 15))
    B[:, 4] = 0.0
    X = spectral_products(B, 40)
    assert not X[:, 4, :].any() and not X[:, :, 4].any()


def test_chunk_products_take_the_fft_route_only_for_long_lagged_vectors(monkeypatch):
    rng = np.random.default_rng(5)
    long_, short = rng.standard_normal((30 + 5000, 20)), rng.standard_normal((6 + 5000, 20))
    assert uses_spectra(30, 20) and not uses_spectra(6, 20) and not uses_spectra(7, 100)
    S, X = _lagged._chunk_products(long_, 30)
    np.testing.assert_array_equal(X, spectral_products(long_, 30))
    np.testing.assert_array_equal(S, long_[30:].sum(axis=0))
    # the direct products of the same chunk agree to rounding (author's margin 1e-13 of the largest product)
    monkeypatch.setattr(_lag_spectra, "MIN_LAGGED_LENGTH", 10**9)
    _S, Xd = _lagged._chunk_products(long_, 30)
    np.testing.assert_allclose(X, Xd, rtol=0, atol=1e-13 * np.abs(Xd).max())
    # short windows never reach the FFT route
    monkeypatch.setattr(_lag_spectra, "MIN_LAGGED_LENGTH", 500)
    monkeypatch.setattr(_lagged, "spectral_products", lambda *a: pytest.fail("FFT route for a short window"))
    _lagged._chunk_products(short, 6)


def test_spectral_products_refuse_a_chunk_without_rows():
    with pytest.raises(ValueError, match="at least one row"):
        spectral_products(np.ones((8, 3)), 8)
    _S, X = _lagged._chunk_products(np.ones((30, 20)), 30)  # the caller's empty chunk: zeros, no FFT
    assert X.shape == (31, 20, 20) and not X.any()


def _session(seed=0, T=6000, n_trials=4, p=18, m=2):
    """A stable 4-state system with 2 inputs and 18 outputs in trials (20 channels), measurement noise 0.1."""
    rng = np.random.default_rng(seed)
    u = rng.standard_normal((T, m))
    A = np.diag([0.85, 0.6, -0.4, 0.2])
    B, C = rng.standard_normal((4, m)), rng.standard_normal((p, 4))
    return state_space_session(u, A, B, C, noise=0.1, rng=rng, n_trials=n_trials, sample_rate_hz=1000.0)


@pytest.fixture(scope="module")
def session():
    return _session()


@pytest.mark.parametrize("make", [
    lambda: RidgeArx(output_lags=25, input_lags=25),  # (25 + 1) · 20 = 520 lagged values: the FFT route
    lambda: HankelPredictor(past_steps=20, horizon_steps=10),  # 29 lags of 20 channels
], ids=["ridge ARX", "Hankel predictor"])
def test_fits_at_long_windows_predict_as_with_the_direct_products(session, make, monkeypatch):
    # issue 14: the same predictions as before to 1e-8 relative on well-conditioned data (here: 1e-9)
    rng = np.random.default_rng(1)
    u, y = session.u, session.y
    starts = rng.integers(40, u.shape[0] - 20, 5)

    def fitted_predictions():
        est = make().fit(session)
        return est, np.array([est.predict(u[t - 30:t], y[t - 30:t], u[t:t + 10]) for t in starts])

    est_fft, pred_fft = fitted_predictions()
    monkeypatch.setattr(_lag_spectra, "MIN_LAGGED_LENGTH", 10**9)  # the direct products, as before the FFT route
    est_direct, pred_direct = fitted_predictions()
    np.testing.assert_allclose(pred_fft, pred_direct, rtol=1e-9, atol=1e-9 * np.abs(pred_direct).max())
    # the same choices: grid values, times a data scale that the two routes' rounding moves by ~1e-15 (measured on
    # the benchmark session: lambda_g_ 5953996.368860314 against ...33); rel 1e-12 is the author's margin
    for name in ("alpha_", "lambda_g_"):
        if hasattr(est_direct, name):
            assert getattr(est_fft, name) == pytest.approx(getattr(est_direct, name), rel=1e-12)


def test_the_excitation_proof_keeps_the_direct_products(monkeypatch):
    # its rounding bound (γ_T per Gram entry, Higham 2002, sec. 3.1) is that of plain sums, not of the FFT's
    from stimsteer.sysid import excitation

    rng = np.random.default_rng(11)
    u = rng.standard_normal((4000, 5))
    assert uses_spectra(119, 5)  # (119 + 1) · 5 = 600 lagged values: long enough for the FFT route elsewhere
    monkeypatch.setattr(_lagged, "spectral_products", lambda *a: pytest.fail("FFT route in the excitation proof"))
    assert excitation._gram_proves_full_rank(u, [(0, 2000), (2000, 4000)], 120)


def test_near_the_condition_limit_the_fft_route_predicts_as_the_qr_route(session, monkeypatch):
    # One-signed inputs (pulse amplitudes are) make the lagged Gram ill-conditioned; the Gram route's stated
    # tolerance against QR is eps·κ (Golub & Van Loan 2013, "Matrix computations", 4th ed., sec. 5.3.8). The FFT
    # route's rounding is normwise like the direct products' (module docstring), so the same tolerance holds:
    # measured at κ = 7.6e7, 7.7e-11 against the QR route (the direct products: 1.3e-10).
    rng = np.random.default_rng(1)
    s = Session(u=300.0 + np.abs(rng.standard_normal(session.u.shape)), y=session.y, sample_rate_hz=1000.0,
                trials=session.trials)
    qr = HankelPredictor(past_steps=20, horizon_steps=10)
    qr._route = "qr"  # test hook of the direct predictors: the QR route whatever the conditioning
    qr.fit(s)
    calls = []
    monkeypatch.setattr(_lagged, "spectral_products", lambda B, L: calls.append(L) or spectral_products(B, L))
    fft = HankelPredictor(past_steps=20, horizon_steps=10).fit(s)
    assert calls and fft.factor_route_ == "gram" and fft.gram_condition_ > 1e7  # the FFT route, ill-conditioned
    windows = (300.0 + np.abs(rng.standard_normal((4, 20, 2))), rng.standard_normal((4, 20, 18)),
               300.0 + np.abs(rng.standard_normal((4, 10, 2))))
    a, b = qr.predict_many(*windows), fft.predict_many(*windows)
    assert np.abs(a - b).max() <= 1e-8 * np.abs(a).max()  # 1e-8: issue 14's "the same predictions" target
    # the held-out errors: rtol 1e-6, the margin test_hankel_folds' QR comparison uses at the same condition
    np.testing.assert_allclose(fft.cv_table_["validation_error"], qr.cv_table_["validation_error"], rtol=1e-6)
