"""Ridge ARX: recovery by construction, rows inside segments, streaming, cross-validation, errors, contract."""

import warnings

import numpy as np
import pytest

from stimsteer.sysid.arx import RidgeArx, arx_to_state_space
from stimsteer.sysid.exceptions import (ConditioningWarning, ExcitationError, InvalidParameterError, NotFittedError,
                                       SessionError)
from stimsteer.sysid.session import Session

# A stable 2-output, 2-input ARX (na = 2, nb = 2, d = 1), invented for these tests; stability checked below.
A_TRUE = np.array([[[0.5, 0.1], [-0.2, 0.4]], [[-0.1, 0.0], [0.05, -0.2]]])
B_TRUE = np.array([[[1.0, 0.0], [0.5, -1.0]], [[0.3, 0.2], [0.0, 0.4]]])


def simulate_arx(A, B, d, u, e=None, c=None, y0=None):
    """The ARX recursion from rest (or from ``y0`` for the first samples), written out sample by sample."""
    T, p = u.shape[0], A.shape[1] if A.size else B.shape[1]
    y = np.zeros((T, p)) if y0 is None else y0.copy()
    for k in range(T):
        acc = np.zeros(p) if c is None else c.copy()
        for i in range(A.shape[0]):
            if k - 1 - i >= 0:
                acc += A[i] @ y[k - 1 - i]
        for j in range(B.shape[0]):
            if k - d - j >= 0:
                acc += B[j] @ u[k - d - j]
        y[k] = acc + (0.0 if e is None else e[k])
    return y


def multi_trial_session(rng, n_trials=6, length=150, noise=0.0, c=None, gap=0):
    """Trials simulated independently from rest (each trial restarts), separated by ``gap`` junk samples."""
    us, ys, trials, pos = [], [], [], 0
    for _ in range(n_trials):
        u = rng.standard_normal((length, 2))
        e = noise * rng.standard_normal((length, 2))
        y = simulate_arx(A_TRUE, B_TRUE, 1, u, e, c)
        us += [u, 50.0 * np.ones((gap, 2))]
        ys += [y, -80.0 * np.ones((gap, 2))]
        trials.append((pos, pos + length))
        pos += length + gap
    return Session(u=np.concatenate(us), y=np.concatenate(ys), sample_rate_hz=200.0, trials=trials,
                   input_names=["stim_a", "stim_b"], output_names=["lfp_1", "lfp_2"])


def true_coef():
    return np.hstack([A_TRUE[0], A_TRUE[1], B_TRUE[0], B_TRUE[1]])


def test_true_system_is_stable():
    # the simulated data must not blow up; from the companion-form poles (common practice, no source)
    assert arx_to_state_space(A_TRUE, B_TRUE, 1).spectral_radius < 1.0


def test_recovers_noise_free_arx_exactly(rng):
    s = multi_trial_session(rng)
    est = RidgeArx(output_lags=2, input_lags=2, delay_samples=1, alphas=[0.0]).fit(s)
    np.testing.assert_allclose(est.coef_, true_coef(), atol=1e-9)
    np.testing.assert_allclose(est.intercept_, 0.0, atol=1e-9)
    assert est.past_steps_ == 2 and est.max_horizon_steps_ is None


def test_the_realisation_is_made_at_its_first_use_and_kept(rng):
    s = multi_trial_session(rng)
    assert not hasattr(RidgeArx(), "model_")  # unfitted: no realisation (and hasattr does not raise)
    est = RidgeArx(output_lags=2, input_lags=2, delay_samples=1, alphas=[0.0]).fit(s)
    est.predict(s.u[:2], s.y[:2], s.u[2:9])
    est.prediction_maps(2, 7)
    assert "_model" not in vars(est)  # predictions and maps run on the coefficients
    model = est.model_
    assert est.model_ is model and est.state_space_model().n_states == 8  # na·p + nb·m = 2·2 + 2·2 lagged values
    # the realisation of the fitted coefficients, as arx_to_state_space makes it (the companion form)
    ref = arx_to_state_space(est.ar_coefs_, est.input_coefs_, 1)
    np.testing.assert_array_equal(model.A, ref.A)
    est.fit(multi_trial_session(rng, noise=0.1))
    assert "_model" not in vars(est) and est.model_ is not model  # a refit drops the old realisation


def test_recovers_intercept(rng):
    c = np.array([2.0, -1.0])
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[0.0]).fit(multi_trial_session(rng, c=c))
    np.testing.assert_allclose(est.coef_, true_coef(), atol=1e-9)
    np.testing.assert_allclose(est.intercept_, c, atol=1e-9)


def test_rows_never_straddle_trial_boundaries_or_masked_samples(rng):
    # Junk between trials and NaN at masked samples: a single straddling row would break exact recovery or give NaN.
    s = multi_trial_session(rng, gap=7)
    u, y, mask = np.array(s.u), np.array(s.y), np.array(s.mask)
    for k in (40, 41, 300, 611):
        mask[k] = False
        u[k], y[k] = np.nan, np.nan
    # a masked sample breaks the recursion's history: restart the outputs after it (data stay an exact ARX)
    s = s.replace(u=u, y=y, mask=mask)
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[0.0]).fit(_restart_after_masks(s))
    np.testing.assert_allclose(est.coef_, true_coef(), atol=1e-9)


def _restart_after_masks(s):
    """Re-simulate each valid segment from rest, so every segment is exact ARX data on its own."""
    u = np.array(s.u)
    y = np.array(s.y)
    for a, b in s.segments():
        y[a:b] = simulate_arx(A_TRUE, B_TRUE, 1, u[a:b])
    return s.replace(y=y)


def test_straddling_rows_would_have_been_detected(rng):
    # Control for the test above: the same data as one long trial (rows crossing the junk) is not exact ARX.
    s = multi_trial_session(rng, gap=7)
    joined = s.replace(trials=[(0, s.n_samples)])
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[0.0]).fit(joined)
    assert np.abs(est.coef_ - true_coef()).max() > 1e-3


def test_chunk_size_does_not_change_the_fit(rng):
    s = multi_trial_session(rng, noise=0.1)
    big = RidgeArx(alphas=[1e-3], chunk_samples=100000).fit(s)
    small = RidgeArx(alphas=[1e-3], chunk_samples=7).fit(s)
    np.testing.assert_allclose(small.coef_, big.coef_, rtol=1e-11, atol=1e-12)
    np.testing.assert_allclose(small.cv_table_["mean_error"], big.cv_table_["mean_error"], rtol=1e-9)


class _CountingSource:
    """A Session seen only through the lazy-file protocol, recording every window read."""

    def __init__(self, session):
        self._s = session
        self.windows = []
        for k in ("n_inputs", "n_outputs", "trials", "sample_rate_hz", "input_names", "output_names"):
            setattr(self, k, getattr(session, k))

    def segments(self, min_length=1):
        return self._s.segments(min_length)

    def read(self, start, stop):
        self.windows.append((start, stop))
        return self._s.read(start, stop)


def test_streams_bounded_windows_from_a_lazy_source(rng):
    s = multi_trial_session(rng, noise=0.1)
    src = _CountingSource(s)
    est = RidgeArx(alphas=[1e-4], chunk_samples=32).fit(src)
    # the structure selection reads windows of its longest candidate: 8 input lags after a delay of 3 = 10 samples
    assert max(b - a for a, b in src.windows) <= 32 + max(est.past_steps_, 10)
    np.testing.assert_allclose(est.coef_, RidgeArx(alphas=[1e-4]).fit(s).coef_, rtol=1e-11, atol=1e-12)


def test_a_read_error_in_the_streaming_pass_reaches_the_caller(rng):
    from stimsteer.sysid.exceptions import FileFormatError

    class _Broken(_CountingSource):
        def read(self, start, stop):
            if start > 300:
                raise FileFormatError("damaged chunk at sample 300 (test)")
            return super().read(start, stop)

    with pytest.raises(FileFormatError, match="damaged chunk at sample 300"):
        RidgeArx(chunk_samples=40).fit(_Broken(multi_trial_session(rng)))


def test_parallel_pass_keeps_chunk_order_and_raises_task_errors():
    import time

    from stimsteer.sysid._lagged import _parallel_pass

    def slow_first(x):  # uneven task times: later chunks finish first
        time.sleep(0.02 if x == 0 else 0.0)
        return x * 10

    out = list(_parallel_pass(range(6), lambda c: c, slow_first, n_workers=3))
    assert out == [(c, 10 * c) for c in range(6)]

    def fails_on_four(x):
        if x == 4:
            raise ExcitationError("chunk 4 failed (test)")
        return x

    with pytest.raises(ExcitationError, match="chunk 4 failed"):
        list(_parallel_pass(range(8), lambda c: c, fails_on_four, n_workers=2))


def test_blas_thread_limit_is_restored_after_fit(rng):
    threadpoolctl = pytest.importorskip("threadpoolctl")

    def blas_threads():
        return [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]

    before = blas_threads()
    RidgeArx(alphas=[1e-3]).fit(multi_trial_session(rng, n_trials=2))
    assert blas_threads() == before


def test_fits_a_lazily_opened_session_file(rng, tmp_path):
    io = pytest.importorskip("stimsteer.sysid.io")
    s = multi_trial_session(rng, noise=0.1)
    io.save_session(s, tmp_path / "s.h5")
    with io.open_session_file(tmp_path / "s.h5") as f:
        lazy = RidgeArx(alphas=[1e-4, 1e-2], chunk_samples=50).fit(f)
    eager = RidgeArx(alphas=[1e-4, 1e-2]).fit(s)
    np.testing.assert_allclose(lazy.coef_, eager.coef_, rtol=1e-11, atol=1e-12)
    assert lazy.output_names_ == ("lfp_1", "lfp_2")


def test_cv_folds_group_whole_trials_and_table_is_complete(rng):
    s = multi_trial_session(rng, n_trials=4, noise=0.2)
    est = RidgeArx(alphas=[1e-6, 1e-2, 1.0], n_folds=5).fit(s)
    assert est.n_folds_ == 4 and est.cv_scheme_ == "trials"
    assert list(est.cv_table_.columns) == ["alpha", "mean_error", "std_error", "fold_0", "fold_1", "fold_2",
                                           "fold_3"]
    best = est.cv_table_.loc[est.cv_table_["mean_error"].idxmin(), "alpha"]
    assert est.alpha_ == best
    # heavy ridge shrinks towards zero: it must validate worse than a light one on this well-excited system
    errs = est.cv_table_.set_index("alpha")["mean_error"]
    assert errs[1.0] > errs[1e-6]


def test_cv_fold_errors_equal_explicit_refits(rng):
    # Each fold error = fit on the other trials' rows, score (1 − R², channel mean) on the fold's rows.
    s = multi_trial_session(rng, n_trials=3, noise=0.3)
    alpha = 1e-2
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[alpha], n_folds=3).fit(s)
    for f in range(3):
        train = s.select_trials([t for t in range(3) if t != f])
        fitted = RidgeArx(output_lags=2, input_lags=2, alphas=[alpha]).fit(train)
        u, y = s.u[s.trials[f, 0]: s.trials[f, 1]], s.y[s.trials[f, 0]: s.trials[f, 1]]
        X = np.hstack([y[1:-1], y[:-2], u[1:-1], u[:-2]])
        resid = y[2:] - (X @ fitted.coef_.T + fitted.intercept_)
        expected = np.mean((resid ** 2).sum(0) / ((y[2:] - y[2:].mean(0)) ** 2).sum(0))
        assert est.cv_table_[f"fold_{f}"].iloc[0] == pytest.approx(expected, rel=1e-9)


def test_single_trial_uses_contiguous_blocks(rng):
    s = multi_trial_session(rng, n_trials=1, length=600, noise=0.1)
    est = RidgeArx(alphas=[1e-6, 1e-1], n_folds=3).fit(s)
    assert est.cv_scheme_.startswith("contiguous blocks") and est.n_folds_ == 3
    assert est.cv_table_[["fold_0", "fold_1", "fold_2"]].notna().all().all()


def test_warns_with_condition_number_when_ill_conditioned(rng):
    s = multi_trial_session(rng)
    u = np.array(s.u)
    u[:, 1] = 2.0 * u[:, 0]  # collinear inputs: the normal equations are singular at alpha = 0
    with pytest.warns(ConditioningWarning, match=r"condition number (inf|\d)"):
        RidgeArx(alphas=[0.0]).fit(s.replace(u=u))


def test_no_warning_when_well_conditioned(rng):
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConditioningWarning)
        est = RidgeArx(alphas=[1e-3]).fit(multi_trial_session(rng, noise=0.1))
    assert np.isfinite(est.condition_number_) and est.condition_number_ < 1e3


# ------------------------------------------------------------------------------------------------ prediction
def test_predict_equals_recursion_with_own_predictions(rng):
    s = multi_trial_session(rng, noise=0.2, c=np.array([0.5, 0.0]))
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[1e-4]).fit(s)
    u_past, y_past, u_fut = s.u[100:110], s.y[100:110], rng.standard_normal((25, 2))
    A, B = est.ar_coefs_, est.input_coefs_
    y = np.vstack([y_past, np.zeros((25, 2))])
    u = np.vstack([u_past, u_fut])
    for k in range(10, 35):
        y[k] = est.intercept_ + A[0] @ y[k - 1] + A[1] @ y[k - 2] + B[0] @ u[k - 1] + B[1] @ u[k - 2]
    np.testing.assert_allclose(est.predict(u_past, y_past, u_fut), y[10:], rtol=1e-12, atol=1e-12)


def _reference_prediction(est, u_past, y_past, u_future):
    """The ARX difference equation written out for one window, independent of the estimator's own code."""
    A, B, c = est.ar_coefs_, est.input_coefs_, est.intercept_
    d, n_past = est.delay_samples_, u_past.shape[0]
    u = np.concatenate([u_past, u_future])
    y = np.concatenate([y_past, np.zeros((u_future.shape[0], y_past.shape[1]))])
    for k in range(n_past, u.shape[0]):
        y[k] = c + sum(A[i] @ y[k - 1 - i] for i in range(A.shape[0])) \
            + sum(B[j] @ u[k - d - j] for j in range(B.shape[0]))
    return y[n_past:]


# (3, 2, 3): past window (4) longer than the output lags; (4, 2, 1): as long (the first step reads its first
# sample); (0, 3, 0): no output lags (finite impulse response, direct feed-through).
@pytest.mark.parametrize("na, nb, d", [(3, 2, 3), (4, 2, 1), (0, 3, 0)])
def test_predict_many_equals_the_written_out_recursion(rng, na, nb, d):
    est = RidgeArx(output_lags=na, input_lags=nb, delay_samples=d, alphas=[1e-3]).fit(
        multi_trial_session(rng, noise=0.2))
    assert est.past_steps_ == max(na, nb + d - 1)
    up, yp, uf = rng.standard_normal((5, 4, 2)), rng.standard_normal((5, 4, 2)), rng.standard_normal((5, 6, 2))
    many = est.predict_many(up, yp, uf)
    for w in range(5):
        expected = _reference_prediction(est, up[w], yp[w], uf[w])
        np.testing.assert_allclose(many[w], expected, rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(est.predict(up[w], yp[w], uf[w]), expected, rtol=1e-12, atol=1e-12)


def test_prediction_maps_reproduce_predict(rng):
    est = RidgeArx(output_lags=3, input_lags=2, delay_samples=2, alphas=[1e-3]).fit(
        multi_trial_session(rng, noise=0.2, c=np.array([0.5, -1.0])))
    maps = est.prediction_maps(6, 5)
    assert maps.P.shape == (10, 24) and maps.F.shape == (10, 10) and maps.c.shape == (10,)
    up, yp, uf = rng.standard_normal((6, 2)), rng.standard_normal((6, 2)), rng.standard_normal((5, 2))
    np.testing.assert_allclose(maps.apply(up, yp, uf), est.predict(up, yp, uf), rtol=1e-12, atol=1e-12)


def test_changing_a_setting_after_fit_requires_a_new_fit(rng):
    est = RidgeArx(output_lags=3, input_lags=2, alphas=[1e-3]).fit(multi_trial_session(rng))
    window = np.zeros((4, 2)), np.zeros((4, 2)), np.zeros((3, 2))
    est.set_params(output_lags=2)
    with pytest.raises(NotFittedError, match=r"settings output_lags of this RidgeArx changed after it was fitted.*"
                                             r"fit\(\.\.\.\) again"):
        est.predict(*window)
    assert est.fit(multi_trial_session(rng)).predict(*window).shape == (3, 2)
    assert est.output_lags_ == 2 and est.coef_.shape == (2, 8)


def test_direct_feedthrough_and_fir(rng):
    u = rng.standard_normal((500, 1))
    y = 0.7 * u + 0.2 * np.vstack([[0.0], u[:-1]])  # y_k = 0.7 u_k + 0.2 u_{k-1}
    s = Session(u=u, y=y, sample_rate_hz=10.0)
    est = RidgeArx(output_lags=0, input_lags=2, delay_samples=0, alphas=[0.0]).fit(s)
    np.testing.assert_allclose(est.coef_, [[0.7, 0.2]], atol=1e-10)
    np.testing.assert_allclose(est.model_.D, [[0.7]], atol=1e-10)
    np.testing.assert_allclose(est.predict(u[:1], y[:1], u[1:20]), y[1:20], atol=1e-10)


def test_model_realisation_predicts_like_the_arx(rng):
    est = RidgeArx(output_lags=2, input_lags=3, delay_samples=1, alphas=[1e-4], fit_intercept=False).fit(
        multi_trial_session(rng, noise=0.2))
    up, yp, uf = rng.standard_normal((3, 2)), rng.standard_normal((3, 2)), rng.standard_normal((30, 2))
    np.testing.assert_allclose(est.model_.predict(up, yp, uf), est.predict(up, yp, uf), rtol=1e-10, atol=1e-10)
    assert est.model_.past_steps == est.past_steps_ == 3


def test_rest_window_is_a_fixed_point(rng):
    c = np.array([1.0, -2.0])
    est = RidgeArx(alphas=[0.0]).fit(multi_trial_session(rng, c=c))
    u0, y0 = est.rest_window()
    out = est.predict(u0, y0, np.zeros((20, 2)))
    np.testing.assert_allclose(out, np.tile(y0[0], (20, 1)), atol=1e-9)
    np.testing.assert_allclose(est.model_.info["output_offset"], y0[0], atol=1e-12)


def test_state_round_trip_predicts_identically(rng):
    est = RidgeArx(alphas=[1e-4, 1e-2]).fit(multi_trial_session(rng, noise=0.1))
    back = RidgeArx.from_state(est.to_state())
    up, yp, uf = rng.standard_normal((2, 2)), rng.standard_normal((2, 2)), rng.standard_normal((9, 2))
    np.testing.assert_array_equal(back.predict(up, yp, uf), est.predict(up, yp, uf))
    assert back.cv_table_.equals(est.cv_table_) and back.get_params()["alphas"] == (1e-4, 1e-2)


# ------------------------------------------------------------------------------------------------ contract
def test_estimator_contract(rng):
    s = multi_trial_session(rng, noise=0.1)
    params = {"output_lags": 3, "input_lags": 1, "delay_samples": 2, "lag_grid": (1, 2, 3, 4, 6, 8),
              "delay_grid": (0, 1, 2, 3), "alphas": (1e-3,), "n_folds": 3, "chunk_samples": 64,
              "fit_intercept": False}
    est = RidgeArx(**params)
    assert est.get_params() == params and not hasattr(est, "coef_")
    assert RidgeArx(**est.get_params()).get_params() == params  # clone
    assert est.fit(s) is est
    first = est.coef_.copy()
    np.testing.assert_array_equal(est.fit(s).coef_, first)
    assert "RidgeArx(" in repr(est)
    up, yp, uf = np.ones((3, 2)), np.ones((3, 2)), np.ones((4, 2))
    copies = [a.copy() for a in (up, yp, uf)]
    est.predict(up, yp, uf)
    for a, b in zip((up, yp, uf), copies):
        np.testing.assert_array_equal(a, b)


def test_unfitted_use_raises():
    with pytest.raises(NotFittedError, match="RidgeArx is not fitted yet"):
        RidgeArx().predict(np.zeros((2, 1)), np.zeros((2, 1)), np.zeros((2, 1)))
    with pytest.raises(NotFittedError, match="call RidgeArx.fit"):
        RidgeArx().to_state()


# ------------------------------------------------------------------------------------------------ bad input
def test_lags_longer_than_every_trial(rng):
    s = multi_trial_session(rng, n_trials=3, length=5)
    with pytest.raises(SessionError, match="needs valid runs of at least 7 samples.*longest valid run has 5"):
        RidgeArx(output_lags=6, input_lags=2).fit(s)


def test_more_parameters_than_rows(rng):
    # 2 outputs × 3 lags + 2 inputs × 3 lags + intercept = 13 coefficients; 2 trials × (8 − 3) rows = 10 rows
    s = multi_trial_session(rng, n_trials=2, length=8)
    with pytest.raises(SessionError, match="13 coefficients per output.*only 10 usable rows"):
        RidgeArx(output_lags=3, input_lags=3, delay_samples=1).fit(s)


def test_input_that_never_varies_is_named(rng):
    s = multi_trial_session(rng)
    u = np.array(s.u)
    u[:, 1] = 3.5
    with pytest.raises(ExcitationError, match=r"input channel 'stim_b' never varies .*always 3\.5"):
        RidgeArx().fit(s.replace(u=u))


@pytest.mark.parametrize("alphas, pattern", [([-1.0, 1.0], r"finite and >= 0.*-1\.0"), ([], "non-empty"),
                                             ([np.nan], "finite and >= 0")])
def test_bad_alphas(rng, alphas, pattern):
    with pytest.raises(InvalidParameterError, match=pattern):
        RidgeArx(alphas=alphas).fit(multi_trial_session(rng, n_trials=2))


@pytest.mark.parametrize("name, value, lowest", [("output_lags", -1, 0), ("input_lags", 0, 1),
                                                 ("delay_samples", 1.5, 0), ("n_folds", 1, 2),
                                                 ("chunk_samples", 0, 1), ("output_lags", True, 0)])
def test_bad_integer_settings(rng, name, value, lowest):
    with pytest.raises(InvalidParameterError, match=f"{name} must be an integer >= {lowest}"):
        RidgeArx(**{name: value}).fit(multi_trial_session(rng, n_trials=2))


def test_fit_intercept_must_be_boolean(rng):
    with pytest.raises(InvalidParameterError, match="fit_intercept must be True or False; got 'yes'"):
        RidgeArx(fit_intercept="yes").fit(multi_trial_session(rng, n_trials=2))


def test_not_a_session():
    with pytest.raises(SessionError, match="expected a stimsteer Session or an opened session file"):
        RidgeArx().fit(np.zeros((10, 2)))


def test_predict_bad_windows(rng):
    est = RidgeArx(output_lags=2, input_lags=2).fit(multi_trial_session(rng, noise=0.1))
    with pytest.raises(SessionError, match="at least past_steps_=2 samples"):
        est.predict(np.zeros((1, 2)), np.zeros((1, 2)), np.zeros((3, 2)))
    with pytest.raises(SessionError, match=r"u_future must have shape \(n_samples, 2\)"):
        est.predict(np.zeros((2, 2)), np.zeros((2, 2)), np.zeros((3, 3)))
    with pytest.raises(SessionError, match="NaN or infinite"):
        est.predict(np.zeros((2, 2)), np.full((2, 2), np.nan), np.zeros((3, 2)))
    with pytest.raises(SessionError, match=r"u_past must have shape \(n_samples, 2\)"):
        est.predict(np.zeros((2, 2, 1)), np.zeros((2, 2)), np.zeros((3, 2)))


def test_set_params_rejects_unknown():
    with pytest.raises(InvalidParameterError, match="no setting 'lags'"):
        RidgeArx().set_params(lags=3)
    assert RidgeArx().set_params(output_lags=4).output_lags == 4


def _feedthrough_session(rng, n_trials=6, length=200):
    # y_k = 0.6 y_{k-1} − 0.2 y_{k-2} + 0.8 u_k + 0.3 u_{k-1}: a direct term D = 0.8 (construction)
    u = rng.standard_normal((n_trials * length, 1))
    y = np.zeros_like(u)
    for i in range(n_trials):
        a = i * length
        for k in range(a + 2, a + length):
            y[k] = 0.6 * y[k - 1] - 0.2 * y[k - 2] + 0.8 * u[k] + 0.3 * u[k - 1]
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=[(i * length, (i + 1) * length) for i in range(n_trials)])


def test_automatic_structure_recovers_delay_zero_and_the_direct_term_exactly(rng):
    # issue 13: lags stayed at the defaults and delay 1 (the CLI could not choose 0); exact data: D to 1e-8
    s = _feedthrough_session(rng)
    est = RidgeArx(alphas=[0.0]).fit(s)
    assert (est.output_lags_, est.input_lags_, est.delay_samples_) == (2, 2, 0)
    np.testing.assert_allclose(est.input_coefs_[0], [[0.8]], rtol=0, atol=1e-8)
    np.testing.assert_allclose(est.coef_, [[0.6, -0.2, 0.8, 0.3]], rtol=0, atol=1e-8)
    np.testing.assert_allclose(est.state_space_model().D, [[0.8]], rtol=0, atol=1e-8)
    table = est.structure_table_
    assert table["selected"].sum() == 1 and len(table) == 6 * 6 * 4
    assert table.loc[table["selected"], ["output_lags", "input_lags", "delay_samples"]].values.tolist() == [[2, 2, 0]]


def test_subspace_with_feedthrough_recovers_the_direct_term_exactly(rng):
    from stimsteer.sysid.subspace import SubspaceId

    s = _feedthrough_session(rng)
    est = SubspaceId(past_steps=5, future_steps=5, feedthrough=True).fit(s)
    np.testing.assert_allclose(est.model_.D, [[0.8]], rtol=0, atol=1e-8)


def test_a_grid_edge_that_wins_is_reported_with_the_advice_to_widen_it(rng):
    s = _feedthrough_session(rng)
    est = RidgeArx(lag_grid=(1,), delay_grid=(1, 2), alphas=[1e-3, 1e-2]).fit(s)  # too short and too late
    notes = " ".join(est.selection_notes_)
    assert "delay_samples = 1 is the smallest value of its grid [1, 2]: widen the grid downwards" in notes
    assert "alpha = 0.001 is the smallest ridge strength of the grid" in notes
    big = RidgeArx(output_lags=2, input_lags=2, delay_samples=0, alphas=[1e2, 1e3]).fit(s)
    assert any("alpha = 100 is the smallest" in n or "add larger alphas" in n for n in big.selection_notes_)


def test_fit_cli_chooses_delay_zero_and_prints_the_table(rng, tmp_path, capsys):
    from stimsteer.control.cli import main
    from stimsteer.sysid import io

    path = io.save_session(_feedthrough_session(rng), tmp_path / "s.h5")
    assert main(["fit", str(path), "--route", "indirect", "--method", "arx", "--out", str(tmp_path / "m.h5")]) == 0
    out = capsys.readouterr().out
    assert "output_lags  input_lags  delay_samples" in out and "(10 of 144 candidates shown" in out
    assert main(["fit", str(path), "--route", "indirect", "--method", "arx", "--delay-steps", "0", "--past-steps",
                 "2", "--out", str(tmp_path / "m2.h5")]) == 0
    from stimsteer.sysid.storage import load_predictor

    model, _ = load_predictor(tmp_path / "m2.h5")
    assert model.delay_samples_ == 0 and model.output_lags_ == 2
