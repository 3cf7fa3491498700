"""fit_route: honest split and held-out scores; patterns: reading, checking against the model, predicting."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.exceptions import FileFormatError, InvalidParameterError, SessionError
from stimsteer.sysid.metrics import kstep_scores
from stimsteer.sysid.routes import (
    METHODS,
    fit_route,
    load_pattern,
    predict_pattern,
    trial_end_window,
)
from stimsteer.sysid.session import Session
from stimsteer.sysid.trial_sources import _split, _TrialSubset
from stimsteer.sysid.statespace import StateSpaceModel

TRUE = StateSpaceModel(A=[[0.8, 0.3], [0.0, 0.5]], B=[[0.0, 0.5], [1.0, 0.0]], C=[[1.0, 0.5]])


def make_session(rng, n_trials=6, length=200, noise=0.02):
    n = n_trials * length
    u = rng.standard_normal((n, 2))
    y = np.concatenate([TRUE.simulate(u[i * length:(i + 1) * length]) for i in range(n_trials)])
    y = y + noise * rng.standard_normal(y.shape)
    return Session(u=u, y=y, sample_rate_hz=500.0, trials=[(i * length, (i + 1) * length) for i in range(n_trials)],
                   input_names=["site_a", "site_b"], input_units=["uA", "uA"], output_names=["lfp"],
                   output_units=["mV"])


@pytest.fixture
def sess(rng):
    return make_session(rng)


@pytest.fixture
def fitted(sess):
    return fit_route(sess, route="indirect", method="arx", settings={"past_steps": 3, "alphas": [1e-6, 1e-3]},
                     seed=5, horizon_steps=4)


# ------------------------------------------------------------------------------------------------ fit_route
def test_split_is_seeded_and_fit_uses_training_trials_only(sess, fitted):
    split = sess.split(test_fraction=0.25, seed=5)
    assert fitted.split == split
    alone = RidgeArx(output_lags=3, input_lags=3, alphas=[1e-6, 1e-3]).fit(sess.select_trials(split.train))
    np.testing.assert_array_equal(fitted.predictor.coef_, alone.coef_)
    held = kstep_scores(alone, sess.select_trials(split.test), horizon_steps=4)
    pd.testing.assert_frame_equal(fitted.heldout.kstep, held.kstep)
    assert not fitted.heldout.freerun.empty
    assert fitted.selection_table is fitted.predictor.structure_table_  # lags fixed: the delay is chosen


def test_provenance_records_the_data_settings_and_split(sess, fitted):
    prov = fitted.provenance
    assert prov["session"]["content_hash"] == sess.content_hash()
    assert prov["split"] == fitted.split.as_dict() and prov["seed"] == 5
    assert prov["settings"]["output_lags"] == 3 and prov["settings"]["alphas"] == [1e-6, 1e-3]
    assert (prov["route"], prov["method"], prov["horizon_steps"]) == ("indirect", "arx", 4)
    assert prov["session"]["input_units"] == ["uA", "uA"] and prov["heldout"]["horizon_steps"] == 4


def test_held_out_scores_are_good_for_the_true_structure(fitted):
    # Small noise (std 0.02) and the right structure: held-out one-step R² must be high (by construction).
    assert fitted.heldout.kstep.query("step == 1")["r2"].iloc[0] > 0.99


def test_a_lazy_file_gives_the_same_fit(sess, tmp_path):
    from stimsteer.sysid import io as io
    io.save_session(sess, tmp_path / "s.h5")
    kw = {"route": "indirect", "method": "arx", "settings": {"past_steps": 2}, "seed": 1}
    with io.open_session_file(tmp_path / "s.h5") as f:
        lazy = fit_route(f, **kw)
    eager = fit_route(sess, **kw)
    assert lazy.split == eager.split
    np.testing.assert_allclose(lazy.predictor.coef_, eager.predictor.coef_, rtol=1e-11, atol=1e-13)
    pd.testing.assert_frame_equal(lazy.heldout.kstep, eager.heldout.kstep, rtol=1e-9)
    assert lazy.provenance["session"]["content_hash"] == eager.provenance["session"]["content_hash"]


@pytest.mark.parametrize("seed", [0, 1, 7, 123])
@pytest.mark.parametrize("n_test", [None, 2])
def test_split_of_a_file_equals_session_split(sess, seed, n_test):
    class _NoSplit:
        trials = sess.trials

    assert _split(_NoSplit(), n_test, 0.25, seed) == sess.split(n_test, test_fraction=0.25, seed=seed)


def test_trial_subset_keeps_only_its_trials(sess):
    sub = _TrialSubset(sess, (1, 4))
    assert sub.segments() == [(200, 400), (800, 1000)] and sub.n_trials == 2


def test_trial_subset_passes_read_buffers_on_only_when_its_source_takes_them(sess, tmp_path):
    from stimsteer.sysid._lagged import _reads_into
    from stimsteer.sysid.io import open_session_file, save_session

    class _Plain:  # a source with the minimal protocol: read(start, stop) only
        def __init__(self, s):
            self.trials, self._s = s.trials, s
            for k in ("n_samples", "n_inputs", "n_outputs", "sample_rate_hz", "input_names", "output_names",
                      "input_units", "output_units"):
                setattr(self, k, getattr(s, k))

        def read(self, start, stop):
            return self._s.read(start, stop)

    assert not _reads_into(_TrialSubset(_Plain(sess), (1, 4)))
    with open_session_file(save_session(sess, tmp_path / "s.h5")) as f:
        sub = _TrialSubset(f, (1, 4))
        assert _reads_into(sub)
        Z = np.empty((50, sess.n_outputs + sess.n_inputs))
        sub.read(210, 260, out=(Z[:, sess.n_outputs:], Z[:, : sess.n_outputs]))
        np.testing.assert_array_equal(Z[:, : sess.n_outputs], sess.y[210:260])
        np.testing.assert_array_equal(Z[:, sess.n_outputs:], sess.u[210:260])


def test_an_output_offset_is_warned_about_for_models_without_a_constant_term(sess, recwarn):
    import warnings

    from stimsteer.sysid.exceptions import StimsteerWarning
    from stimsteer.sysid.routes import OFFSET_WARN_FRACTION
    from stimsteer.sysid.quality import baseline_moments

    u = sess.u.copy()
    for a, _b in sess.trials:
        u[a:a + 20] = 0.0  # a pre-stimulation baseline at the start of every trial
    shifted = sess.replace(u=u, y=sess.y + 3.0 * sess.y.std())  # baseline mean² / mean square about 9 / 10
    n_base, mean, frac = baseline_moments(shifted)
    base = np.concatenate([shifted.y[a:a + 20] for a, _b in shifted.trials])
    assert n_base == base.shape[0]
    np.testing.assert_allclose(mean, base.mean(0), rtol=1e-12)
    np.testing.assert_allclose(frac, base.mean(0) ** 2 / (base ** 2).mean(0), rtol=1e-12)
    assert frac[0] > OFFSET_WARN_FRACTION
    with pytest.warns(StimsteerWarning, match=r"channel 'lfp' has a pre-stimulation baseline of .* mV \(\d+ samples\), "
                      r"\d+ % of its baseline mean square"):
        res = fit_route(shifted, route="indirect", method="subspace", settings={"past_steps": 4, "future_steps": 4})
    assert res.provenance["output_offset_fraction"] > OFFSET_WARN_FRACTION
    with warnings.catch_warnings():
        warnings.simplefilter("error", StimsteerWarning)  # ridge ARX fits an intercept: no warning
        res = fit_route(shifted, route="indirect", method="arx", settings={"past_steps": 3, "alphas": [1e-3]})
        assert res.provenance["output_offset_fraction"] == 0.0
        fit_route(sess, route="indirect", method="subspace", settings={"past_steps": 4, "future_steps": 4})
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        # the same offset without a baseline (stimulated from the first sample): the mean is response, no advice
        fit_route(sess.replace(y=sess.y + 3.0 * sess.y.std()), route="indirect", method="subspace",
                  settings={"past_steps": 4, "future_steps": 4})
    assert not [w for w in caught if "offset" in str(w.message)]


def test_subspace_route(sess):
    res = fit_route(sess, route="indirect", method="subspace", settings={"past_steps": 4, "future_steps": 4})
    assert "order" in res.selection_table.columns and res.predictor.order_ >= 1
    assert res.heldout.horizon_steps == 10  # the default when neither caller nor predictor fixes one


def test_direct_route_when_registered(sess):
    res = fit_route(sess, route="direct", method="lsq", settings={"past_steps": 3}, horizon_steps=5)
    assert res.predictor.max_horizon_steps_ == 5 and res.heldout.horizon_steps == 5


def test_route_errors(sess):
    with pytest.raises(InvalidParameterError,
                       match="no method 'oracle' on route 'indirect'; available: .*--route indirect --method arx"):
        fit_route(sess, route="indirect", method="oracle")
    with pytest.raises(InvalidParameterError, match=r"unknown setting\(s\) \['lag'\] for RidgeArx"):
        fit_route(sess, route="indirect", method="arx", settings={"lag": 2})
    with pytest.raises(SessionError, match="needs at least 2 trials"):
        fit_route(sess.select_trials([0]), route="indirect", method="arx")


def test_explicit_lags_win_over_past_steps(sess):
    res = fit_route(sess, route="indirect", method="arx", settings={"past_steps": 4, "input_lags": 1})
    assert (res.predictor.output_lags, res.predictor.input_lags) == (4, 1)


# ------------------------------------------------------------------------------------------------ patterns
def write_pattern(path, header, rows):
    path.write_text(",".join(header) + "\n" + "\n".join(",".join(str(v) for v in r) for r in rows) + "\n")
    return path


def good_pattern(tmp_path, n=40, rate=500.0):
    rows = [(k / rate, 1.0 if 10 <= k < 20 else 0.0, 0.0) for k in range(n)]
    return write_pattern(tmp_path / "p.csv", ["time [s]", "in:site_a [uA]", "in:site_b [uA]"], rows)


def test_load_pattern(tmp_path):
    pat = load_pattern(good_pattern(tmp_path))
    assert pat.u.shape == (40, 2) and pat.sample_rate_hz == 500.0
    assert pat.input_names == ("site_a", "site_b") and pat.input_units == ("uA", "uA")


@pytest.mark.parametrize("header, rows, pattern", [
    (["time [s]", "in:site_a [uA]", "out:lfp [mV]"], [(0, 1, 1), (0.002, 1, 1)], r"not recognised: \['out:lfp"),
    (["t", "in:site_a [uA]"], [(0, 1), (1, 1)], "not a stimulation pattern table"),
    (["time [s]", "in:site_a"], [(0, 1), (1, 1)], "not a stimulation pattern table"),
    # the second row of data: counted as people count it, as the session tables' errors count (io.tables._data_row)
    (["time [s]", "in:site_a [uA]"], [(0, 1), (0.002, "")],
     r"data row 2 \(counted from 1 after the header\) of column 'in:site_a"),
    (["time [s]", "in:site_a [uA]"], [(0, 1), (0.002, 1), (0.01, 1)], "not on a uniform grid"),
    (["time [s]", "in:site_a [uA]"], [(0, 1)], "one row cannot give the sampling rate"),
    (["time [s]", "in:site_a [uA]"], [], "header but no rows"),
])
def test_bad_pattern_files(tmp_path, header, rows, pattern):
    with pytest.raises(FileFormatError, match=pattern):
        load_pattern(write_pattern(tmp_path / "bad.csv", header, rows))


def test_missing_pattern_file(tmp_path):
    with pytest.raises(FileNotFoundError, match="no such pattern file"):
        load_pattern(tmp_path / "none.csv")


def test_predict_from_rest_and_from_a_trial(sess, fitted, tmp_path):
    pat = load_pattern(good_pattern(tmp_path))
    rest = predict_pattern(fitted.predictor, fitted.provenance, pat)
    up, yp = fitted.predictor.rest_window()
    np.testing.assert_allclose(rest.y, fitted.predictor.predict(up, yp, pat.u))
    past = trial_end_window(sess, 2, fitted.predictor, fitted.provenance)
    np.testing.assert_array_equal(past[1], sess.y[600 - 3:600])
    from_trial = predict_pattern(fitted.predictor, fitted.provenance, pat, past=past, start="trial 2")
    np.testing.assert_allclose(from_trial.y, fitted.predictor.predict(*past, pat.u))
    band = fitted.heldout.error_band(40)
    np.testing.assert_allclose(from_trial.band, band)
    assert from_trial.output_units == ("mV",) and from_trial.start == "trial 2"


def test_limited_horizon_predictors_are_chained(fitted, tmp_path):
    class _Short:
        past_steps_, max_horizon_steps_ = fitted.predictor.past_steps_, 7

        def predict(self, u_past, y_past, u_future):
            assert u_future.shape[0] <= 7
            return fitted.predictor.predict(u_past, y_past, u_future)

    pat = load_pattern(good_pattern(tmp_path))
    long = predict_pattern(fitted.predictor, fitted.provenance, pat)
    up, yp = fitted.predictor.rest_window()
    short = predict_pattern(_Short(), fitted.provenance, pat, past=(up, yp))
    np.testing.assert_allclose(short.y, long.y, rtol=1e-12, atol=1e-12)


def test_pattern_must_match_the_model(fitted, tmp_path):
    cases = [
        (["time [s]", "in:site_a [uA]"], "has 1 input\\(s\\) \\['site_a'\\]; the model has 2"),
        (["time [s]", "in:site_b [uA]", "in:site_a [uA]"], "expects \\['site_a', 'site_b'\\] in this order"),
        (["time [s]", "in:site_a [mA]", "in:site_b [uA]"], "'site_a' is in 'mA' in the pattern, but the model was "
                                                          "fitted in 'uA'"),
    ]
    for header, message in cases:
        rows = [(k / 500.0, *([0.0] * (len(header) - 1))) for k in range(5)]
        pat = load_pattern(write_pattern(tmp_path / "p.csv", header, rows))
        with pytest.raises(SessionError, match=message):
            predict_pattern(fitted.predictor, fitted.provenance, pat)
    pat = load_pattern(good_pattern(tmp_path, rate=1000.0))
    with pytest.raises(SessionError, match="sampled at 1000 Hz; the model runs at 500 Hz"):
        predict_pattern(fitted.predictor, fitted.provenance, pat)
    with pytest.raises(FileFormatError, match="provenance lacks the session description"):
        predict_pattern(fitted.predictor, {}, pat)


def test_trial_end_window_errors(sess, fitted):
    with pytest.raises(SessionError, match="trial 9 does not exist; the session has trials 0 to 5"):
        trial_end_window(sess, 9, fitted.predictor, fitted.provenance)
    mask = np.array(sess.mask)
    mask[599] = False
    with pytest.raises(SessionError, match="last 3 samples of trial 2 include masked samples"):
        trial_end_window(sess.replace(mask=mask), 2, fitted.predictor, fitted.provenance)
    renamed = sess.replace(output_names=("spikes",))
    with pytest.raises(SessionError, match="outputs \\['spikes'\\]"):
        trial_end_window(renamed, 2, fitted.predictor, fitted.provenance)
    short = Session(u=sess.u[:2], y=sess.y[:2], sample_rate_hz=500.0, input_names=sess.input_names,
                    input_units=sess.input_units, output_names=sess.output_names, output_units=sess.output_units)
    with pytest.raises(SessionError, match="trial 0 has 2 samples; the model needs a past window of 3"):
        trial_end_window(short, 0, fitted.predictor, fitted.provenance)

def test_a_schedule_file_reads_as_a_pattern(tmp_path):
    # `stimsteer schedule` writes a trial column; predicting the whole schedule must accept it
    from stimsteer.sysid.routes import load_pattern
    from stimsteer.control import StimLimits, design_schedule, save_schedule

    limits = StimLimits(amplitude_min_ua=[-1.0, -1.0], amplitude_max_ua=[1.0, 1.0])
    sched = design_schedule(limits, order=6, sample_rate_hz=100.0, n_trials=2, trial_s=1.0, rest_s=0.2, seed=3)
    path = tmp_path / "schedule.csv"
    save_schedule(sched, path)
    pattern = load_pattern(path)
    assert pattern.sample_rate_hz == 100.0 and pattern.u.shape == sched.u.shape
    np.testing.assert_array_equal(pattern.u, sched.u)
