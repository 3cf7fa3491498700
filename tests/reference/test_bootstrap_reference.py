"""The bootstrap over trials against the analytic interval of ordinary least squares on i.i.d. data.

Outside check: for i.i.d. data the percentile bootstrap interval of a regression slope agrees with the textbook
OLS interval ``β̂ ± t_{0.975, n−k} · se(β̂)`` (Efron B., Tibshirani R. J. 1993, "An Introduction to the Bootstrap",
ch. 9 and 13; the analytic interval from statsmodels' OLS as the reference implementation). Resampling whole
trials of i.i.d. samples is the pairs bootstrap.
"""

import numpy as np
import pytest
import statsmodels.api as sm

from stimsteer.sysid import Session
from stimsteer.sysid.ensemble import bootstrap_draws, resample_trials


@pytest.fixture(scope="module")
def data():
    rng = np.random.default_rng(12)
    n_trials, per = 120, 5
    u = rng.normal(size=(n_trials * per, 1))
    y = 1.0 + 2.0 * u + rng.normal(scale=0.8, size=u.shape)
    trials = [(k * per, (k + 1) * per) for k in range(n_trials)]
    return Session(u=u, y=y, sample_rate_hz=1.0, trials=trials)


def _slope(session):
    X = np.column_stack([np.ones(session.n_samples), session.u[:, 0]])
    return np.linalg.lstsq(X, session.y[:, 0], rcond=None)[0][1]


@pytest.mark.slow
def test_the_bootstrap_interval_of_a_slope_matches_the_ols_interval(data):
    slopes = [_slope(resample_trials(data, d)) for d in bootstrap_draws(data.n_trials, 1000, seed=3)]
    lo, hi = np.quantile(slopes, [0.025, 0.975])
    ols = sm.OLS(data.y[:, 0], sm.add_constant(data.u[:, 0])).fit()
    ref_lo, ref_hi = ols.conf_int(alpha=0.05)[1]
    width = ref_hi - ref_lo
    assert abs(lo - ref_lo) < 0.1 * width and abs(hi - ref_hi) < 0.1 * width
    assert abs((hi - lo) / width - 1.0) < 0.15


def test_a_resample_keeps_whole_trials_and_allows_repeats(data):
    draw = [3, 3, 7]
    s = resample_trials(data, draw)
    assert s.n_trials == 3 and s.metadata["bootstrap_trials"] == draw
    a, b = data.trials[3]
    np.testing.assert_array_equal(s.u[:5], data.u[a:b])
    np.testing.assert_array_equal(s.u[5:10], data.u[a:b])
