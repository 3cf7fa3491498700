"""Tests of stimsteer.sysid.session: validation of every bad input, selection, splits, segments, identity."""

import numpy as np
import pytest

from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.session import Session, TrialSplit


def _session(rng, n=100, trials=((0, 30), (30, 60), (70, 100)), **kw):
    return Session(u=rng.standard_normal((n, 2)), y=rng.standard_normal((n, 3)), sample_rate_hz=500.0,
                   trials=trials, **kw)


# ------------------------------------------------------------------------------------------------ construction
def test_defaults(rng):
    s = Session(u=rng.standard_normal(50), y=rng.standard_normal((50, 2)), sample_rate_hz=100)
    assert s.u.shape == (50, 1) and s.u.dtype == np.float64  # a 1-D input becomes one column
    assert s.trials.tolist() == [[0, 50]] and s.mask.all()
    assert s.input_names == ("u0",) and s.output_names == ("y0", "y1")
    assert s.input_units == ("a.u.",) and s.output_units == ("a.u.", "a.u.")
    assert s.sample_rate_hz == 100.0 and s.duration_s == 0.5 and s.metadata == {}
    assert "n_samples=50" in repr(s)


def test_arrays_are_read_only_copies_and_inputs_untouched(rng):
    u = rng.standard_normal((40, 2))
    u_before = u.copy()
    s = Session(u=u, y=np.zeros((40, 1)), sample_rate_hz=10.0)
    u[0, 0] = 99.0
    assert s.u[0, 0] == u_before[0, 0]
    with pytest.raises(ValueError, match="read-only"):
        s.u[0, 0] = 1.0


def test_nan_and_inf_allowed_inside_the_mask(rng):
    u, y = rng.standard_normal((20, 1)), rng.standard_normal((20, 2))
    u[3], y[4, 1], y[5, 0] = np.nan, np.inf, -np.inf
    mask = np.ones(20, dtype=bool)
    mask[3:6] = False
    s = Session(u=u, y=y, sample_rate_hz=10.0, mask=mask)
    assert s.masked_fraction == 3 / 20


@pytest.mark.parametrize("where, value", [("u", np.nan), ("y", np.inf), ("y", -np.inf)])
def test_nan_or_inf_outside_the_mask_is_refused(rng, where, value):
    u, y = rng.standard_normal((20, 1)), rng.standard_normal((20, 2))
    (u if where == "u" else y)[7, 0] = value
    mask = np.ones(20, dtype=bool)
    mask[3] = False
    name = "input" if where == "u" else "output"
    # the message names the channel and the time in seconds, and how to fix it (issue 18)
    with pytest.raises(SessionError, match=rf"1 NaN or infinite {name} value\(s\) at valid samples, in {where}0 "
                                           rf"\(1\); the first in {name} '{where}0' at t = 0.7 s \(sample 7\)\. "
                                           r"Mark those samples invalid \(mask=False; in a table, valid = 0"):
        Session(u=u, y=y, sample_rate_hz=10.0, mask=mask)


def test_length_mismatch(rng):
    with pytest.raises(SessionError, match=r"same number of samples; got 500 and 499\. Trim or resample"):
        Session(u=np.zeros((500, 1)), y=np.zeros((499, 1)), sample_rate_hz=1.0)


def test_empty_recording_and_bad_dimensions():
    with pytest.raises(SessionError, match=r"holds no samples"):
        Session(u=np.zeros((0, 1)), y=np.zeros((0, 1)), sample_rate_hz=1.0)
    with pytest.raises(SessionError, match=r"u \(inputs\) must be a 2-D time-major array.*shape \(2, 3, 4\)"):
        Session(u=np.zeros((2, 3, 4)), y=np.zeros((2, 1)), sample_rate_hz=1.0)


@pytest.mark.parametrize("rate, pattern", [
    (0.0, r"positive and finite; got 0\.0"),
    (-5.0, r"positive and finite; got -5\.0"),
    (np.nan, r"positive and finite; got nan"),
    (np.inf, r"positive and finite; got inf"),
    ("fast", r"must be a number in Hz; got 'fast'"),
])
def test_bad_sample_rate(rate, pattern):
    with pytest.raises(SessionError, match=pattern):
        Session(u=np.zeros((5, 1)), y=np.zeros((5, 1)), sample_rate_hz=rate)


@pytest.mark.parametrize("trials, pattern", [
    ([(0, 50), (40, 100)], r"trials 0 \[0, 50\) and 1 \[40, 100\) overlap"),
    ([(0, 50), (60, 101)], r"trial 1 \[60, 101\) lies outside the recording of 100 samples"),
    ([(-1, 50)], r"trial 0 \[-1, 50\) lies outside the recording"),
    ([(10, 10)], r"trial 0 is empty or reversed: \[10, 10\)"),
    ([(20, 10)], r"trial 0 is empty or reversed: \[20, 10\)"),
    ([], r"trials is empty; give at least one"),
    ([(50, 100), (0, 50)], r"trials must be sorted by start sample"),
    ([(0, 10.5)], r"whole sample indices; got fractional"),
    ([0, 10, 20], r"list of \[start, stop\) pairs; got an array of shape \(3,\)"),
])
def test_bad_trials(trials, pattern):
    with pytest.raises(SessionError, match=pattern):
        Session(u=np.zeros((100, 1)), y=np.zeros((100, 1)), sample_rate_hz=1.0, trials=trials)


@pytest.mark.parametrize("names, pattern", [
    ({"input_names": ["a", "b"], "output_names": ["b"]}, r"unique across inputs and outputs; duplicated: \['b'\]"),
    ({"input_names": ["a", "a"]}, r"duplicated: \['a'\]"),
    ({"input_names": ["a"]}, r"input_names must have one entry per channel; got 1 for 2 channels"),
    ({"output_names": [" "]}, r"output_names must not contain empty strings"),
    ({"input_units": ["uA"]}, r"input_units must have one unit per channel; got 1 for 2"),
    ({"output_units": [""]}, r"output_units must not contain empty strings; use 'a\.u\.'"),
])
def test_bad_names_and_units(names, pattern):
    with pytest.raises(SessionError, match=pattern):
        Session(u=np.zeros((10, 2)), y=np.zeros((10, 1)), sample_rate_hz=1.0, **names)


@pytest.mark.parametrize("mask, pattern", [
    (np.ones(9, dtype=bool), r"mask must have shape \(10,\), one flag per sample; got \(9,\)"),
    (np.full(10, 2), r"mask must be boolean .*values other than 0/1"),
])
def test_bad_mask(mask, pattern):
    with pytest.raises(SessionError, match=pattern):
        Session(u=np.zeros((10, 1)), y=np.zeros((10, 1)), sample_rate_hz=1.0, mask=mask)


def test_integer_mask_and_column_mask_are_accepted():
    s = Session(u=np.zeros((4, 1)), y=np.zeros((4, 1)), sample_rate_hz=1.0, mask=np.array([[1], [0], [1], [1]]))
    assert s.mask.tolist() == [True, False, True, True]


def test_replace_validates_again(rng):
    s = _session(rng)
    with pytest.raises(SessionError, match=r"same number of samples"):
        s.replace(u=np.zeros((99, 2)))


# ------------------------------------------------------------------------------------------------ selection
def test_split_is_deterministic_and_disjoint(rng):
    s = _session(rng, n=200, trials=[(10 * i, 10 * i + 10) for i in range(20)])
    a, b = s.split(seed=7), s.split(seed=7)
    assert a == b and isinstance(a, TrialSplit)
    assert not set(a.train) & set(a.test)
    assert sorted(a.train + a.test) == list(range(20))
    assert len(a.test) == 5  # round(0.25 * 20)
    assert a.as_dict() == {"train": list(a.train), "test": list(a.test), "seed": 7}


def test_split_seeds_change_the_draw(rng):
    s = _session(rng, n=200, trials=[(10 * i, 10 * i + 10) for i in range(20)])
    draws = {s.split(n_test=5, seed=k).test for k in range(5)}
    assert len(draws) > 1  # C(20, 5) = 15504 possible draws; five seeds agreeing would be a broken seed


@pytest.mark.parametrize("trials, n_test", [([(0, 100)], None), ([(0, 50), (50, 100)], 2),
                                            ([(0, 50), (50, 100)], 0)])
def test_split_needs_two_trials_and_a_sensible_size(rng, trials, n_test):
    with pytest.raises(SessionError, match=r"held-out split needs at least 2 trials and 1 <= n_test"):
        _session(rng, trials=trials).split(n_test=n_test)


def test_train_test_sessions(rng):
    s = _session(rng)
    split = TrialSplit(train=(0, 2), test=(1,), seed=0)
    train, test = s.train_test(split)
    assert train.n_trials == 2 and test.n_trials == 1
    assert np.array_equal(test.y, s.y[30:60])


def test_select_trials_concatenates_in_the_given_order(rng):
    mask = np.ones(100, dtype=bool)
    mask[75] = False
    s = _session(rng, mask=mask)
    sub = s.select_trials([2, 0])
    assert sub.trials.tolist() == [[0, 30], [30, 60]]
    assert np.array_equal(sub.u, np.concatenate([s.u[70:100], s.u[0:30]]))
    assert sub.mask.tolist() == mask[70:100].tolist() + [True] * 30
    assert sub.metadata["source_trials"] == [2, 0]
    assert sub.select_trials([1]).metadata["source_trials"] == [0]  # indices map back to the original session


@pytest.mark.parametrize("idx, pattern", [([], r"at least one trial index"), ([3], r"\[3\] are out of range; this "
                                          r"session has 3 trials"), ([0, 0], r"must be unique; got \[0, 0\]"),
                                          ([-1], r"\[-1\] are out of range")])
def test_select_trials_errors(rng, idx, pattern):
    with pytest.raises(SessionError, match=pattern):
        _session(rng).select_trials(idx)


def test_segments_never_cross_trials_or_masked_samples(rng):
    mask = np.ones(100, dtype=bool)
    mask[[5, 6, 40]] = False
    s = _session(rng, mask=mask)
    # trials (0,30), (30,60), (70,100): masked 5, 6 split trial 0; masked 40 splits trial 1; the boundary at 30 cuts
    assert s.segments() == [(0, 5), (7, 30), (30, 40), (41, 60), (70, 100)]
    assert s.segments(min_length=20) == [(7, 30), (70, 100)]


def test_read_and_iter_trials(rng):
    s = _session(rng)
    u, y, m = s.read(10, 20)
    assert np.array_equal(u, s.u[10:20]) and m.shape == (10,)
    with pytest.raises(SessionError, match=r"window \[90, 101\) is outside the recording of 100"):
        s.read(90, 101)
    windows = list(s.iter_trials())
    assert [(w.index, w.start, w.stop) for w in windows] == [(0, 0, 30), (1, 30, 60), (2, 70, 100)]
    assert np.array_equal(windows[2].y, s.y[70:100])
    assert s.trial_lengths.tolist() == [30, 30, 30] and s.n_trials == 3


def test_masked_fraction_counts_only_in_trial_samples(rng):
    mask = np.ones(100, dtype=bool)
    mask[60:70] = False  # between trials: not counted
    mask[0:9] = False
    s = _session(rng, mask=mask)
    assert s.masked_fraction == 9 / 90


def test_content_hash_tracks_data_not_metadata(rng):
    s = _session(rng)
    assert s.content_hash() == s.replace(metadata={"note": "x"}).content_hash()
    y = np.array(s.y)
    y[0, 0] += 1e-12
    assert s.content_hash() != s.replace(y=y).content_hash()
    assert s.content_hash() != s.replace(output_units=("mV",) * 3).content_hash()
