"""Metrics: normalisations, held-out k-step and free-run scores inside segments, residual tests."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.metrics import (
    Scores,
    freerun_scores,
    input_residual_xcorr,
    kstep_scores,
    ljung_box,
    nrmse,
    r2,
    vaf,
)
from stimsteer.sysid.session import Session
from stimsteer.sysid.statespace import StateSpaceModel

# An invented stable 2-state SISO system used as a perfect predictor of its own noise-free data.
TRUE = StateSpaceModel(A=[[0.8, 0.3], [0.0, 0.5]], B=[[0.0], [1.0]], C=[[1.0, 0.5]])


def exact_session(rng, n_trials=4, length=120):
    u = rng.standard_normal((n_trials * length, 1))
    y = np.concatenate([TRUE.simulate(u[i * length:(i + 1) * length]) for i in range(n_trials)])
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=[(i * length, (i + 1) * length) for i in range(n_trials)])


# ------------------------------------------------------------------------------------------------ plain metrics
def test_perfect_and_mean_predictions(rng):
    y = rng.standard_normal((200, 3))
    np.testing.assert_allclose(r2(y, y), 1.0)
    np.testing.assert_allclose(nrmse(y, y), 0.0)
    np.testing.assert_allclose(vaf(y, y), 100.0)
    mean = np.tile(y.mean(0), (200, 1))
    # predicting the mean: SSE = SST, RMSE = std (definitions in the module docstring)
    np.testing.assert_allclose(r2(y, mean), 0.0, atol=1e-12)
    np.testing.assert_allclose(nrmse(y, mean), 1.0, rtol=1e-12)


def test_bias_is_ignored_by_vaf_but_not_by_r2(rng):
    y = rng.standard_normal((500, 1))
    b = 0.3
    # e = −b everywhere: var(e) = 0 so VAF = 100; SSE = n b², so R² = 1 − b² / var(y)
    np.testing.assert_allclose(vaf(y, y + b), 100.0)
    np.testing.assert_allclose(r2(y, y + b), 1 - b ** 2 / y.var(), rtol=1e-12)
    np.testing.assert_allclose(r2(y, y + b), 1 - nrmse(y, y + b) ** 2, rtol=1e-12)


def test_constant_channel_scores_nan():
    y = np.ones((10, 1))
    assert np.isnan(r2(y, y)).all() and np.isnan(nrmse(y, y)).all()


@pytest.mark.parametrize("a, b, pattern", [(np.zeros((5, 2)), np.zeros((5, 3)), "same shape"),
                                           (np.zeros((1, 2)), np.zeros((1, 2)), "at least 2 samples"),
                                           (np.full((4, 1), np.nan), np.zeros((4, 1)), "NaN or infinite")])
def test_metric_bad_input(a, b, pattern):
    with pytest.raises(SessionError, match=pattern):
        r2(a, b)


# ------------------------------------------------------------------------------------------------ k-step
class _Recorder:
    """Predicts zeros and records every window it is given (to check where windows come from)."""

    past_steps_ = 3
    max_horizon_steps_ = None

    def __init__(self):
        self.seen = []

    def predict(self, u_past, y_past, u_future):
        self.seen.append((np.array(u_past), np.array(y_past), np.array(u_future)))
        return np.zeros((u_future.shape[0], y_past.shape[1]))


def test_kstep_windows_stay_inside_segments(rng):
    s = exact_session(rng)
    u, y, mask = np.array(s.u), np.array(s.y), np.array(s.mask)
    mask[50] = False
    u[50], y[50] = np.nan, np.nan
    s = s.replace(u=u, y=y, mask=mask)
    rec = _Recorder()
    sc = kstep_scores(rec, s, horizon_steps=4)
    segs = s.segments(min_length=7)
    assert sc.n_windows == sum(e - a - 7 + 1 for a, e in segs) == len(rec.seen)
    assert all(np.isfinite(w).all() for window in rec.seen for w in window)


def test_kstep_pools_per_step_exactly(rng):
    # predicting zeros: the step-h score is r2(y at step h of every window, 0), computed here directly
    s = exact_session(rng, n_trials=2, length=40)
    sc = kstep_scores(_Recorder(), s, horizon_steps=2, stride_steps=3)
    truth = {1: [], 2: []}
    for a, e in s.segments(min_length=5):
        for t in range(a + 3, e - 2 + 1, 3):
            truth[1].append(s.y[t])
            truth[2].append(s.y[t + 1])
    for h in (1, 2):
        yt = np.array(truth[h])
        row = sc.kstep[sc.kstep["step"] == h].iloc[0]
        assert row["r2"] == pytest.approx(r2(yt, 0 * yt)[0], rel=1e-10)
        assert row["vaf"] == pytest.approx(vaf(yt, 0 * yt)[0], rel=1e-10)
        assert row["nrmse"] == pytest.approx(nrmse(yt, 0 * yt)[0], rel=1e-10)
        assert row["n_samples"] == len(truth[h])


def test_kstep_with_blanked_outputs_and_a_stride_pools_only_the_scored_samples(rng):
    # windows come from strided views of each segment; the pooled step-h scores must be r2/vaf of the unblanked
    # measured samples at step h of every window against the predictions, computed here directly per window
    s = exact_session(rng, n_trials=3, length=70)
    blank = np.ones(s.y.shape[0], dtype=bool)
    blank[rng.choice(s.y.shape[0], 40, replace=False)] = False
    s = s.replace(output_mask=blank)
    est = RidgeArx(output_lags=1, input_lags=1, alphas=[0.0]).fit(exact_session(rng))  # imperfect here
    H, stride, P = 4, 3, est.past_steps_
    sc = kstep_scores(est, s, horizon_steps=H, stride_steps=stride)
    truth = {h: ([], []) for h in range(1, H + 1)}
    for a, e in s.segments(min_length=P + H):
        for t in range(a + P, e - H + 1, stride):
            pred = est.predict(s.u[t - P:t], s.y[t - P:t], s.u[t:t + H])
            for h in range(1, H + 1):
                if blank[t + h - 1]:
                    truth[h][0].append(s.y[t + h - 1])
                    truth[h][1].append(pred[h - 1])
    for h in range(1, H + 1):
        yt, yp = np.array(truth[h][0]), np.array(truth[h][1])
        row = sc.kstep[sc.kstep["step"] == h].iloc[0]
        assert row["n_samples"] == yt.shape[0] < sc.n_windows
        assert row["r2"] == pytest.approx(r2(yt, yp)[0], rel=1e-10)
        assert row["vaf"] == pytest.approx(vaf(yt, yp)[0], rel=1e-10)


def test_kstep_of_the_true_model_is_perfect(rng):
    s = exact_session(rng)
    sc = kstep_scores(TRUE, s, horizon_steps=5)  # a StateSpaceModel is a predictor (past_steps = n_states)
    np.testing.assert_allclose(sc.metric("r2").to_numpy(), 1.0, atol=1e-9)
    assert list(sc.metric("r2").index) == [1, 2, 3, 4, 5]


def test_kstep_uses_predict_many_when_available(rng):
    s = exact_session(rng)
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[0.0]).fit(s)

    class _LoopOnly:
        past_steps_, max_horizon_steps_ = est.past_steps_, None
        predict = staticmethod(est.predict)

    fast = kstep_scores(est, s, horizon_steps=6)
    slow = kstep_scores(_LoopOnly(), s, horizon_steps=6)
    pd.testing.assert_frame_equal(fast.kstep, slow.kstep, rtol=1e-10)


def _maps_only(est, max_horizon=None):
    """``est`` with its prediction maps but no predict_many: scoring it must go through the maps alone."""

    class _MapsOnly:
        past_steps_, max_horizon_steps_, has_linear_maps = est.past_steps_, max_horizon, True
        prediction_maps = staticmethod(est.prediction_maps)

        def predict_many(self, *args):
            raise AssertionError("a predictor with linear maps is scored by one product of its maps")

        def predict(self, u_past, y_past, u_future):  # only where a test asks it (reference values)
            return est.predict(u_past, y_past, u_future)

    return _MapsOnly()


def test_kstep_of_a_linear_predictor_is_one_product_of_its_maps_per_run(rng):
    # windows scored through [P F] and the window rows of each run (never predict_many), with a stride and
    # blanked outputs; the same scores as every window predicted on its own (to rounding)
    s = exact_session(rng, n_trials=3, length=70)
    blank = np.ones(s.y.shape[0], dtype=bool)
    blank[rng.choice(s.y.shape[0], 30, replace=False)] = False
    s = s.replace(output_mask=blank)
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[1e-3]).fit(exact_session(rng))

    class _LoopOnly:
        past_steps_, max_horizon_steps_ = est.past_steps_, None
        predict = staticmethod(est.predict)

    for stride in (1, 4):
        fast = kstep_scores(_maps_only(est), s, horizon_steps=5, stride_steps=stride)
        slow = kstep_scores(_LoopOnly(), s, horizon_steps=5, stride_steps=stride)
        pd.testing.assert_frame_equal(fast.kstep, slow.kstep, rtol=1e-10)
        assert fast.n_windows == slow.n_windows


def test_window_rows_are_the_stacked_windows_the_maps_multiply(rng):
    from stimsteer.sysid._windows import window_rows
    from stimsteer.sysid.protocols import past_vector

    u, y, P, H = rng.standard_normal((40, 2)), rng.standard_normal((40, 3)), 4, 5
    for rows in (slice(None), slice(3, 29, 5)):
        got = window_rows(u, y, P, H, rows)
        starts = range(P, 40 - H + 1)[rows]
        want = np.stack([np.concatenate([past_vector(u[t - P:t], y[t - P:t]), u[t:t + H].reshape(-1)])
                         for t in starts])
        np.testing.assert_array_equal(got, want)


def test_window_predictions_refuse_non_finite_samples(rng):
    from stimsteer.sysid._windows import stacked_maps, window_predictions

    est = RidgeArx(output_lags=1, input_lags=1, alphas=[0.0]).fit(exact_session(rng))
    u, y = rng.standard_normal((30, 1)), rng.standard_normal((30, 1))
    y[12] = np.nan
    maps = stacked_maps(est, est.past_steps_, 3, 1, 1)
    with pytest.raises(SessionError, match="NaN or infinite"):
        window_predictions(est, maps, u, y, est.past_steps_, 3, slice(None))
    assert np.isfinite(window_predictions(est, maps, u, y, est.past_steps_, 3, slice(13, None))).all()


class _Limited:
    """The true model, but declared to predict at most 3 steps (as a direct-route predictor would)."""

    past_steps_ = 2
    max_horizon_steps_ = 3

    def predict(self, u_past, y_past, u_future):
        assert u_future.shape[0] <= 3
        return TRUE.predict(u_past, y_past, u_future)


def test_kstep_bad_arguments(rng):
    s = exact_session(rng)
    with pytest.raises(SessionError, match="at most 3 steps ahead; got horizon_steps=4"):
        kstep_scores(_Limited(), s, horizon_steps=4)
    with pytest.raises(SessionError, match="horizon_steps must be a whole number >= 1"):
        kstep_scores(TRUE, s, horizon_steps=0)
    with pytest.raises(SessionError, match="stride_steps must be a whole number >= 1"):
        kstep_scores(TRUE, s, horizon_steps=2, stride_steps=0)
    with pytest.raises(SessionError, match="no valid segment .* holds past_steps \\+ horizon_steps = 502"):
        kstep_scores(TRUE, s, horizon_steps=500)
    with pytest.raises(SessionError, match="expected a fitted predictor"):
        kstep_scores(object(), s, horizon_steps=2)


def test_kstep_rejects_wrong_prediction_shape(rng):
    class _Bad(_Recorder):
        def predict(self, u_past, y_past, u_future):
            return np.zeros((1, 1))

    with pytest.raises(SessionError, match="returned shape"):
        kstep_scores(_Bad(), exact_session(rng), horizon_steps=3)


# ------------------------------------------------------------------------------------------------ free run
def test_freerun_of_the_true_model_is_perfect(rng):
    sc = freerun_scores(TRUE, exact_session(rng))
    assert sc.n_segments == 4 and sc.kstep.empty
    np.testing.assert_allclose(sc.freerun["r2"], 1.0, atol=1e-9)
    assert int(sc.freerun["n_samples"].iloc[0]) == 4 * (120 - 2)


def test_freerun_chains_limited_horizon_predictors(rng):
    # Chaining 3-step blocks on own predictions equals one free run of the same (exact) model.
    s = exact_session(rng, n_trials=2)
    chained = freerun_scores(_Limited(), s, max_steps=50)
    assert int(chained.freerun["n_samples"].iloc[0]) == 2 * 50
    np.testing.assert_allclose(chained.freerun["r2"], 1.0, atol=1e-9)


@pytest.mark.parametrize("batch_samples", [1 << 18, 250])
def test_freerun_in_batches_of_equal_runs_is_each_run_alone(rng, monkeypatch, batch_samples):
    # runs of equal length are predicted together (one predict_many per block): the pooled scores must be those of
    # every segment's own free run, r2/vaf/nrmse computed here directly on the concatenated samples; lengths
    # 120, 120, 90, 120, 120 and a batch budget of 250 samples make batches of 2, 1, 2 runs, and of 1 each
    import stimsteer.sysid.metrics as metrics

    monkeypatch.setattr(metrics, "_FREERUN_BATCH_SAMPLES", batch_samples)
    edges = np.cumsum([0, 120, 120, 90, 120, 120])
    u = rng.standard_normal((edges[-1], 1))
    y = np.concatenate([TRUE.simulate(u[a:b]) for a, b in zip(edges[:-1], edges[1:])])
    y = y + 0.3 * rng.standard_normal(y.shape)
    s = Session(u=u, y=y, sample_rate_hz=100.0, trials=list(zip(edges[:-1], edges[1:])))
    est = RidgeArx(output_lags=1, input_lags=1, alphas=[0.0]).fit(s)  # imperfect: the scores are not all 1
    for predictor, limit in ((est, None), (_LimitedOf(est), 3)):
        sc = freerun_scores(predictor, s)
        yt = np.concatenate([y[a + est.past_steps_:b] for a, b in s.segments()])
        yp = np.concatenate([metrics._free_run(predictor, u[a:b], y[a:b], est.past_steps_, limit)
                             for a, b in s.segments()])
        assert sc.n_segments == 5 and int(sc.freerun["n_samples"].iloc[0]) == yt.shape[0]
        assert 0.1 < sc.freerun["r2"].iloc[0] < 0.99
        assert sc.freerun["r2"].iloc[0] == pytest.approx(r2(yt, yp)[0], rel=1e-10)
        assert sc.freerun["vaf"].iloc[0] == pytest.approx(vaf(yt, yp)[0], rel=1e-10)
        assert sc.freerun["nrmse"].iloc[0] == pytest.approx(nrmse(yt, yp)[0], rel=1e-10)


def test_freerun_of_a_limited_linear_predictor_chains_products_of_its_maps(rng):
    # blocks of 3 steps (the last one shorter) each one product of the block's maps, never predict_many; the same
    # free run as chaining predict block by block
    import stimsteer.sysid.metrics as metrics

    s = exact_session(rng, n_trials=2, length=60)
    y = s.y + 0.2 * rng.standard_normal(s.y.shape)
    s = s.replace(y=y)
    est = RidgeArx(output_lags=2, input_lags=1, alphas=[1e-3]).fit(s)
    fast, slow = _maps_only(est, max_horizon=3), _LimitedOf(est)
    for a, b in s.segments():
        np.testing.assert_allclose(metrics._free_run(fast, s.u[a:b], y[a:b], est.past_steps_, 3),
                                   metrics._free_run(slow, s.u[a:b], y[a:b], est.past_steps_, 3), rtol=1e-10)
    pd.testing.assert_frame_equal(freerun_scores(fast, s).freerun, freerun_scores(slow, s).freerun, rtol=1e-10)


class _LimitedOf:
    """A fitted predictor declared to predict at most 3 steps; no predict_many (windows one at a time)."""

    max_horizon_steps_ = 3

    def __init__(self, inner):
        self.inner, self.past_steps_ = inner, inner.past_steps_

    def predict(self, u_past, y_past, u_future):
        assert u_future.shape[0] <= 3
        return self.inner.predict(u_past, y_past, u_future)


def test_freerun_bad_arguments(rng):
    s = exact_session(rng, n_trials=2, length=3)
    with pytest.raises(SessionError, match="longer than past_steps \\+ 1 = 3"):
        freerun_scores(TRUE, s)
    with pytest.raises(SessionError, match="max_steps must be a whole number >= 1"):
        freerun_scores(TRUE, exact_session(rng), max_steps=0)


# ------------------------------------------------------------------------------------------------ Scores
def test_scores_round_trip_merge_and_band(rng):
    s = exact_session(rng)
    est = RidgeArx(output_lags=1, input_lags=1, alphas=[1e-2]).fit(s)
    sc = kstep_scores(est, s, horizon_steps=3).merged(freerun_scores(est, s))
    back = Scores.from_dict(sc.to_dict())
    pd.testing.assert_frame_equal(back.kstep, sc.kstep)
    pd.testing.assert_frame_equal(back.freerun, sc.freerun)
    assert (back.horizon_steps, back.n_windows, back.n_segments) == (3, sc.n_windows, 4)
    band = sc.error_band(5)
    np.testing.assert_allclose(band[:3, 0], sc.metric("rmse")["y0"].to_numpy())
    np.testing.assert_allclose(band[3:, 0], sc.freerun["rmse"].iloc[0])
    summ = sc.summary()
    assert list(summ["prediction"]) == ["1-step", "2-step", "3-step", "free run"]
    assert "free run" in sc.to_text()


def test_scores_band_without_freerun_repeats_last_step(rng):
    sc = kstep_scores(TRUE, exact_session(rng), horizon_steps=2)
    band = sc.error_band(4)
    np.testing.assert_allclose(band[2:], band[1:2].repeat(2, axis=0))


def test_scores_errors():
    sc = Scores(("a",))
    with pytest.raises(SessionError, match="unknown metric 'mse'"):
        sc.metric("mse")
    with pytest.raises(SessionError, match="different output channels"):
        sc.merged(Scores(("b",)))
    assert sc.to_text() == "(no scores)"


# ------------------------------------------------------------------------------------------------ residual tests
def test_ljung_box_matches_its_formula(rng):
    e = rng.standard_normal((60, 2))
    res = ljung_box(e, 4)
    for j in range(2):
        x = e[:, j] - e[:, j].mean()
        rho = [np.dot(x[k:], x[:-k]) / np.dot(x, x) for k in range(1, 5)]
        q = 60 * 62 * sum(r ** 2 / (60 - k) for k, r in zip(range(1, 5), rho))
        assert res.statistic[j] == pytest.approx(q, rel=1e-12)
    assert res.dof == 4 and res.n_samples == 60


def test_ljung_box_detects_correlated_residuals(rng):
    # AR(1) with coefficient 0.5 over 2000 samples: ρ1 ≈ 0.5 gives Q in the hundreds (far beyond χ²_10)
    x = np.zeros(2000)
    w = rng.standard_normal(2000)
    for t in range(1, 2000):
        x[t] = 0.5 * x[t - 1] + w[t]
    assert ljung_box(x, 10).rejects(0.01).all()


@pytest.mark.parametrize("lags, fitted, pattern", [(0, 0, r"lags must be a whole number in \[1, 9\]"),
                                                   (10, 0, r"in \[1, 9\]"), (3, 3, "lags - fitted_params")])
def test_ljung_box_bad_arguments(lags, fitted, pattern):
    with pytest.raises(SessionError, match=pattern):
        ljung_box(np.arange(10.0), lags, fitted_params=fitted)
    with pytest.raises(SessionError, match="finite 2-D"):
        ljung_box(np.full(10, np.nan), 2)


def test_xcorr_finds_a_missed_delayed_effect(rng):
    u = rng.standard_normal((1000, 2))
    e = np.zeros((1000, 1))
    e[3:, 0] = u[:-3, 1]  # the residual still holds input 1 delayed by 3 samples
    xc = input_residual_xcorr(u, e, 5)
    assert xc.values.shape == (11, 2, 1) and xc.band == pytest.approx(1.96 / np.sqrt(1000))
    peak = np.unravel_index(np.argmax(np.abs(xc.values)), xc.values.shape)
    assert (xc.lags[peak[0]], peak[1]) == (3, 1)
    assert xc.values[peak] == pytest.approx(1.0, abs=0.01)


def test_xcorr_of_independent_signals_stays_mostly_in_band(rng):
    # Under independence about 5% of values fall outside ±1.96/√N (the band's definition); 2 × 41 × 3 = 246 values
    # here, so a share far above 5% would mean a wrong normalisation. Bound: 12% (generous, by design).
    xc = input_residual_xcorr(rng.standard_normal((3000, 2)), rng.standard_normal((3000, 3)), 20)
    assert xc.outside.mean() < 0.12


def test_xcorr_bad_arguments():
    with pytest.raises(SessionError, match="same number of samples"):
        input_residual_xcorr(np.zeros((5, 1)), np.zeros((6, 1)), 1)
    with pytest.raises(SessionError, match=r"max_lag must be a whole number in \[0, 4\]"):
        input_residual_xcorr(np.zeros((5, 1)), np.zeros((5, 1)), 5)


def test_empty_score_tables_are_new_frames_of_the_stated_columns():
    # every Scores holds an empty table of the other kind, copied from one built once: a caller that fills one
    # must not fill the next (reference: the column-by-column construction the copy replaces)
    from stimsteer.sysid.metrics import _METRICS, _empty_freerun, _empty_kstep

    built = pd.DataFrame({"step": pd.Series(dtype=np.int64), "channel": pd.Series(dtype=object),
                          **{k: pd.Series(dtype=float) for k in _METRICS}, "n_samples": pd.Series(dtype=np.int64)})
    first = _empty_kstep()
    first.loc[0] = [1, "a", 0.5, 0.5, 50.0, 0.1, 10]
    for made, want in ((_empty_kstep(), built), (_empty_freerun(), built.drop(columns="step"))):
        assert made.empty and made.equals(want) and made.dtypes.equals(want.dtypes)


def test_a_chained_free_run_that_overflows_raises_as_predict_many_does():
    # the free run checks each block's fed-back outputs itself (its inputs once): an unstable linear predictor with
    # a limited horizon must still stop with predict_many's message, not score infinities
    from types import SimpleNamespace

    class Unstable:
        past_steps_, max_horizon_steps_, has_linear_maps = 1, 2, True

        def predict(self, u_past, y_past, u_future):  # pragma: no cover - the maps are used
            raise AssertionError

        def prediction_maps(self, past_steps, horizon_steps):
            P = np.zeros((horizon_steps, 2))
            P[:, 1] = 1e150  # y[t] = 1e150 · y[t - 1]: inf after a few blocks
            return SimpleNamespace(P=P, F=np.zeros((horizon_steps, horizon_steps)), c=np.zeros(horizon_steps))

    session = Session(u=np.zeros((40, 1)), y=np.ones((40, 1)), sample_rate_hz=100.0)
    with np.errstate(over="ignore"), pytest.raises(SessionError, match=r"y_past holds NaN or infinite values"):
        freerun_scores(Unstable(), session)
