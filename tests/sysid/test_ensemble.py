"""Bootstrap ensembles: prediction intervals that cover, the mean's linear maps, files, robust plans, bad input."""

import warnings

import numpy as np
import pytest

from stimsteer.control import LinearNetworkPlant, StimLimits, record_session
from stimsteer.control.mpc.robust import RobustPlanner
from stimsteer.sysid import InvalidParameterError, SessionError, load_predictor, save_predictor
from stimsteer.sysid.ensemble import BootstrapEnsemble, interval_coverage

ARX = {"output_lags": 2, "input_lags": 2, "delay_samples": 0, "alphas": (1e-3,)}


@pytest.fixture(scope="module")
def split():
    plant = LinearNetworkPlant(np.array([[0.9, 0.2], [-0.15, 0.75]]), np.array([[1.0], [0.5]]),
                               np.array([[1.0, 0.0]]), sample_rate_hz=100.0, process_noise_std=0.05,
                               measurement_noise_std=0.1)
    u = np.random.default_rng(1).normal(size=(14 * 200, 1))
    s = record_session(plant, u, trials=[(k * 200, (k + 1) * 200) for k in range(14)], seed=1)
    return s.select_trials(range(10)), s.select_trials(range(10, 14))


@pytest.fixture(scope="module")
def ensemble(split):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return BootstrapEnsemble(method="arx", method_settings=ARX, n_members=8, seed=2).fit(split[0])


def test_95_percent_intervals_cover_about_95_percent_of_held_out_samples(ensemble, split):
    coverage = interval_coverage(ensemble, split[1], horizon_steps=15, level=0.95)
    assert 0.88 <= coverage[0] <= 0.99
    narrow = interval_coverage(ensemble, split[1], horizon_steps=15, level=0.5)
    assert narrow[0] < coverage[0] - 0.2  # the level is honoured, not a fixed band


def test_the_mean_prediction_has_the_mean_of_the_members_maps(ensemble, split):
    test = split[1]
    up, yp, uf = test.u[:4], test.y[:4], test.u[4:14]
    assert ensemble.has_linear_maps
    np.testing.assert_allclose(ensemble.prediction_maps(4, 10).apply(up, yp, uf), ensemble.predict(up, yp, uf),
                               atol=1e-10)
    mean, lo, hi = ensemble.predict_interval(up, yp, uf)
    assert np.all(lo <= mean) and np.all(mean <= hi)


def test_a_saved_ensemble_gives_the_same_intervals(ensemble, split, tmp_path):
    save_predictor(ensemble, tmp_path / "ens.h5", provenance={})
    back, _ = load_predictor(tmp_path / "ens.h5")
    test = split[1]
    args = test.u[:4], test.y[:4], test.u[4:14]
    for a, b in zip(back.predict_interval(*args), ensemble.predict_interval(*args)):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("mode", ["worst", "average"])
def test_robust_plans_keep_the_hard_limits_and_rank_their_own_cost_first(ensemble, mode):
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.5, slew_max_ua=0.4, n_inputs=1)
    planner = RobustPlanner(ensemble=ensemble, limits=lim, horizon_steps=10, mode=mode).fit()
    assert planner.problem_.is_dpp()
    up, yp = ensemble.rest_window()
    plans = {m: RobustPlanner(ensemble=ensemble, limits=lim, horizon_steps=10, mode=m).fit()
             .plan(up, yp, target=np.array([2.0]), last_input=np.zeros(1)) for m in ("worst", "average")}
    plan = plans[mode]
    assert plan.ok and not any(lim.violations(plan.inputs, np.zeros(1)).values())
    other = plans["average" if mode == "worst" else "worst"]
    key = "worst_member_tracking" if mode == "worst" else "mean_member_tracking"
    # each plan is optimal for its own criterion (input effort is small next to tracking here)
    assert plan.cost_terms[key] <= other.cost_terms[key] + 1e-3 * abs(other.cost_terms[key])


def test_robust_plans_refuse_what_they_cannot_keep(ensemble):
    # energy budgets and output bounds are kept since issue 19's follow-up (tests/control/test_robust_limits.py)
    ok = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=1)
    with pytest.raises(InvalidParameterError, match="horizon_steps must be a positive integer"):
        RobustPlanner(ensemble=ensemble, limits=ok, horizon_steps=0).fit()
    with pytest.raises(InvalidParameterError, match="limits must be a StimLimits"):
        RobustPlanner(ensemble=ensemble, limits={"amplitude_max_ua": 1.0}, horizon_steps=5).fit()
    with pytest.raises(InvalidParameterError, match="worst case or average"):
        RobustPlanner(ensemble=ensemble, limits=ok, horizon_steps=5, mode="best").fit()


def test_the_bootstrap_needs_two_trials_and_a_known_method(split):
    one = split[0].select_trials([0])
    with pytest.raises(SessionError, match="at least 2 trials"):
        BootstrapEnsemble(method="arx", method_settings=ARX, n_members=3).fit(one)
    with pytest.raises(InvalidParameterError, match="registered method"):
        BootstrapEnsemble(method="nope").fit(split[0])


def test_the_members_show_their_progress_on_a_terminal(split, capsys, monkeypatch):
    monkeypatch.setenv("STIMSTEER_PROGRESS", "1")
    BootstrapEnsemble(method="arx", method_settings=ARX, n_members=3, seed=2).fit(split[0])
    err = capsys.readouterr().err
    assert "stimsteer bootstrap members (indirect/arx)" in err and "/3 " in err


# ---------------------------------------------------------------------------------------------- interval arithmetic
# Reference: numpy.quantile, its default "linear" method (Hyndman R. J., Fan Y. (1996), Sample quantiles in
# statistical packages, The American Statistician 50(4):361-365, definition 7). The intervals take order statistics
# of sums out of short sorted runs; they must be NumPy's numbers exactly.
@pytest.mark.parametrize("case", range(60))
def test_the_interval_quantiles_are_numpys_quantiles_of_every_sum(case):
    from stimsteer.sysid.ensemble import _sum_quantiles

    rng = np.random.default_rng(case)
    rows, members, pool = rng.integers(1, 12), rng.integers(1, 25), rng.integers(1, 70)
    a = rng.normal(scale=[0.01, 1.0, 100.0][case % 3], size=(rows, members))  # narrow, even and wide spreads
    e = np.sort(rng.standard_t(3, size=(rows, pool)), axis=1)
    if case % 4 == 0:  # ties among the sums
        a, e = np.round(a, 1), np.round(e, 1)
    if case == 5:
        a[0, 0] = np.nan  # NumPy's NaN rule kept
    level = [0.5, 0.8, 0.9, 0.95, 0.99, 0.999][case % 6]
    q = np.array([(1 - level) / 2, (1 + level) / 2])
    expected = np.quantile((a[:, :, None] + e[:, None, :]).reshape(rows, -1), q, axis=-1)
    for got, want in zip(_sum_quantiles(a, e, q), expected):
        np.testing.assert_array_equal(got, want)


def test_the_intervals_are_quantiles_of_member_predictions_plus_pooled_errors(ensemble, split):
    # the definition written out the long way (the module docstring; Efron & Tibshirani 1993, ch. 13 and 17): per
    # step, a fixed subsample (seed 0, drawn step by step) of at most 400 complete out-of-bag error vectors
    test = split[1]
    up, yp, uf = test.u[:4], test.y[:4], test.u[4:64]
    preds = ensemble.member_predictions(up[None], yp[None], uf[None])[:, 0]
    rng, H = np.random.default_rng(0), ensemble.errors_.shape[1]
    q = [(1.0 - 0.95) / 2.0, (1.0 + 0.95) / 2.0]  # the level's tails as the ensemble computes them (0.025 + 2e-17)
    assert ensemble.errors_.shape[0] > 400  # the subsample is exercised (400: the module's _MAX_POOL)
    lo, hi = np.empty((60, 1)), np.empty((60, 1))
    for h in range(60):  # beyond the errors' horizon the last step's errors
        e = ensemble.errors_[:, min(h, H - 1)]
        e = e[np.all(np.isfinite(e), axis=1)]
        e = e[rng.choice(e.shape[0], 400, replace=False)] if e.shape[0] > 400 else e
        lo[h], hi[h] = np.quantile((preds[:, h][:, None, :] + e[None]).reshape(-1, 1), q, axis=0)
    _, got_lo, got_hi = ensemble.predict_interval(up, yp, uf)
    np.testing.assert_array_equal(got_lo, lo)
    np.testing.assert_array_equal(got_hi, hi)


def test_coverage_counts_each_windows_own_interval(ensemble, split):
    # the same windows (120, evenly strided) window by window; a share of counts: equal up to the division's rounding
    test, P, H = split[1], ensemble.past_steps_, 15
    inside, total = 0.0, 0
    starts = [t for a, b in test.segments(min_length=P + H) for t in range(a + P, b - H + 1)]
    for k in np.linspace(0, len(starts) - 1, 120).astype(int):
        u, y, _ = test.read(starts[k] - P, starts[k] + H)
        _, lo, hi = ensemble.predict_interval(u[:P], y[:P], u[P:])
        inside += np.sum((y[P:] >= lo) & (y[P:] <= hi))
        total += H
    assert interval_coverage(ensemble, test, horizon_steps=H, max_windows=120)[0] == pytest.approx(inside / total,
                                                                                                abs=1e-12)
