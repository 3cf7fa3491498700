"""The ridge ARX's prediction maps, built as the recursion runs (``arx_statespace.arx_maps``): against the difference
equation written out, against SciPy's ``lfilter`` and in memory of the maps' own size at realistic windows."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
import scipy.signal

from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.arx_statespace import arx_maps
from stimsteer.sysid.session import Session
from tests.sysid.test_arx import _reference_prediction, multi_trial_session


def _random_arx(rng, na, nb, p, m):
    """Coefficients small enough for a stable recursion over a short horizon (their sizes do not matter here)."""
    return 0.3 / max(na, 1) * rng.standard_normal((na, p, p)), rng.standard_normal((nb, p, m)), \
        rng.standard_normal(p)


# (na, nb, d, T): the past window as long as the lags, or longer (older samples get zero columns); no output lags;
# direct feed-through (d = 0); an input delay reaching into the future inputs only from step d on.
@pytest.mark.parametrize("na, nb, d, T", [(3, 2, 1, 3), (3, 2, 1, 7), (0, 3, 0, 4), (4, 1, 3, 5), (2, 5, 0, 6)])
def test_the_maps_equal_the_difference_equation_written_out(rng, na, nb, d, T):
    p, m, N = 3, 2, 9
    A, B, c = _random_arx(rng, na, nb, p, m)
    P, F, c_map = arx_maps(A, B, d, T, N, c)
    assert P.shape == (N * p, T * (m + p)) and F.shape == (N * p, N * m) and c_map.shape == (N * p,)

    class Coefs:  # what _reference_prediction reads
        ar_coefs_, input_coefs_, intercept_, delay_samples_ = A, B, c, d
    for _ in range(4):
        up, yp, uf = rng.standard_normal((T, m)), rng.standard_normal((T, p)), rng.standard_normal((N, m))
        got = P @ np.concatenate([up.reshape(-1), yp.reshape(-1)]) + F @ uf.reshape(-1) + c_map
        expected = _reference_prediction(Coefs, up, yp, uf).reshape(-1)
        # rounding only (the same sums in another order): the author's margin, 1e-12 of the largest prediction
        np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12 * np.abs(expected).max())
    # the samples older than every lag have zero columns
    oldest = T - max(na, d + nb - 1)
    assert not P[:, :oldest * m].any() and not P[:, T * m:T * m + oldest * p].any()


def test_a_single_channel_maps_future_inputs_as_scipys_lfilter():
    # one input, one output: F's column of u_T is the impulse response of b(z)/a(z), which scipy.signal.lfilter
    # gives for the difference equation a[0] y[n] = Σ b[j] x[n-j] - Σ a[i] y[n-i] (SciPy documentation, lfilter)
    A = np.array([0.5, -0.3, 0.1]).reshape(3, 1, 1)
    B = np.array([1.0, 0.4]).reshape(2, 1, 1)
    d, T, N = 1, 3, 12
    _P, F, _c = arx_maps(A, B, d, T, N, np.zeros(1))
    a = np.concatenate([[1.0], -A.reshape(-1)])
    b = np.concatenate([np.zeros(d), B.reshape(-1)])
    impulse = np.zeros(N)
    impulse[0] = 1.0
    # rounding only: the author's margins (responses of order 1)
    np.testing.assert_allclose(F[:, 0], scipy.signal.lfilter(b, a, impulse), rtol=1e-13, atol=1e-15)


def test_the_fitted_maps_reproduce_predict_many(rng):
    est = RidgeArx(output_lags=3, input_lags=2, delay_samples=2, alphas=[1e-3]).fit(
        multi_trial_session(rng, noise=0.2, c=np.array([0.5, -1.0])))
    maps = est.prediction_maps(8, 6)
    up, yp, uf = rng.standard_normal((5, 8, 2)), rng.standard_normal((5, 8, 2)), rng.standard_normal((5, 6, 2))
    many = est.predict_many(up, yp, uf)
    for w in range(5):
        # rounding only, outputs of order 1: the author's margins
        np.testing.assert_allclose(maps.apply(up[w], yp[w], uf[w]), many[w], rtol=1e-12, atol=1e-12)


def test_maps_at_a_long_window_need_memory_of_their_own_size(rng):
    # 40 lags of 2 inputs and 12 outputs, horizon 30: the maps are 360 × 620 (1.8 MB). The responses to unit windows
    # of before held 560 windows × 30 steps × 80 lagged inputs (10.8 MB) at once, besides the maps.
    m, p, L, N = 2, 12, 40, 30
    u = rng.standard_normal((4 * 400, m))
    y = np.cumsum(rng.standard_normal((4 * 400, p)), axis=0) * 0.01 + u @ rng.standard_normal((m, p))
    s = Session(u=u, y=y, sample_rate_hz=1000.0, trials=[(k * 400, (k + 1) * 400) for k in range(4)])
    est = RidgeArx(output_lags=L, input_lags=L, delay_samples=1, alphas=[1.0]).fit(s)
    size = N * p * (L * (m + p) + N * m) * 8
    tracemalloc.start()
    maps = est.prediction_maps(L, N)
    _now, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert peak <= 1.5 * size, (peak, size)  # the maps and small terms (measured 1.11; before, 11.0)
    up, yp, uf = u[:L], y[:L], u[L:L + N]
    # rounding over 40 lags and 30 steps: the author's margin, 1e-10 of the outputs' largest value
    np.testing.assert_allclose(maps.apply(up, yp, uf), est.predict(up, yp, uf), rtol=1e-10,
                               atol=1e-10 * np.abs(y).max())
