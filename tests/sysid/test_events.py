"""Trials from events, triggers and pulse tables; pulse tables onto the grid; two clocks aligned."""

import numpy as np
import pytest
from scipy import signal

from stimsteer.sysid.events import (PULSE_MAPPING, align_channel, encode_pulses, pulse_train_onsets, select_events,
                                    trials_from_events, trigger_times)
from stimsteer.sysid.exceptions import SessionError


def test_windows_in_seconds_become_half_open_sample_ranges():
    w = trials_from_events([1.0, 2.0], sample_rate_hz=100.0, n_samples=400, before_s=0.1, after_s=0.25)
    assert w.trials.tolist() == [[90, 125], [190, 225]]
    # a grid that starts at 0.5 s moves every range by 50 samples
    w = trials_from_events([1.0], sample_rate_hz=100.0, n_samples=400, start_time_s=0.5, before_s=0.1, after_s=0.25)
    assert w.trials.tolist() == [[40, 75]]


def test_out_of_range_windows_are_dropped_and_reported():
    w = trials_from_events([0.05, 1.0, 3.95], sample_rate_hz=100.0, n_samples=400, before_s=0.1, after_s=0.1)
    assert w.trials.tolist() == [[90, 110]]
    assert w.out_of_range == [0.05, 3.95]
    assert "2 window(s) outside the recording dropped" in w.to_text()


def test_overlapping_windows_are_merged_or_the_later_dropped_and_reported():
    kw = dict(sample_rate_hz=100.0, n_samples=400, before_s=0.1, after_s=0.3)
    m = trials_from_events([1.0, 1.2, 2.0], **kw)
    assert m.trials.tolist() == [[90, 150], [190, 230]] and m.overlaps == [(1.0, 1.2)]
    d = trials_from_events([1.0, 1.2, 2.0], overlap="drop", **kw)
    assert d.trials.tolist() == [[90, 130], [190, 230]] and d.to_dict()["overlapping_s"] == [[1.0, 1.2]]


@pytest.mark.parametrize("kw, pattern", [
    (dict(event_times_s=[]), r"no \(finite\) event times"),
    (dict(event_times_s=[10.0]), r"every trial window falls outside the recording \[0, 4\) s"),
    (dict(event_times_s=[1.0], overlap="keep"), r"overlap must be 'merge' or 'drop'"),
    (dict(event_times_s=[1.0], after_s=-0.1), r"positive finite length"),
])
def test_trial_errors(kw, pattern):
    args = {**dict(sample_rate_hz=100.0, n_samples=400, before_s=0.0, after_s=0.1), **kw}
    with pytest.raises(SessionError, match=pattern):
        trials_from_events(**args)


def test_trigger_threshold_rising_crossings_and_refractory_interval():
    x = np.zeros(100)
    x[[10, 11, 12, 14, 50]] = 3.0  # a bounce at 14 (2 ms after the first crossing at 1 kHz)
    assert trigger_times(x, sample_rate_hz=1000.0, threshold=2.5).tolist() == [0.010, 0.014, 0.050]
    assert trigger_times(x, sample_rate_hz=1000.0, threshold=2.5, min_interval_s=0.005).tolist() == [0.010, 0.050]
    with pytest.raises(SessionError, match=r"never rises through 5 \(its values span 0 to 3\)"):
        trigger_times(x, sample_rate_hz=1000.0, threshold=5.0)


def test_event_selection_lists_the_labels_it_has():
    events = [{"time_s": 1.0, "label": "Comment/go"}, {"time_s": 2.0, "label": "stop"}]
    assert select_events(events, ["go"]).tolist() == [1.0]  # BrainVision's "Comment/" prefix is matched
    with pytest.raises(SessionError, match=r"no event matches the labels \['start'\]; the recording has "
                                           r"\['Comment/go', 'stop'\]"):
        select_events(events, "start")


def test_pulse_table_onto_the_grid_by_the_declared_mapping():
    pulses = [{"time_s": 0.0101, "site": "A", "amplitude": 2.0}, {"time_s": 0.0105, "site": "A", "amplitude": -3.0},
              {"time_s": 0.020, "site": "B", "amplitude": 1.5}, {"time_s": 9.0, "site": "B", "amplitude": 1.0}]
    u, rec = encode_pulses(pulses, ["A", "B"], sample_rate_hz=1000.0, n_samples=50)
    assert u[10].tolist() == [-3.0, 0.0]  # two pulses in one sample: the larger magnitude
    assert u[20].tolist() == [0.0, 1.5] and np.count_nonzero(u) == 2
    assert rec["n_pulses"] == 3 and rec["n_pulses_off_grid"] == 1 and rec["name"] == PULSE_MAPPING["name"]
    # a clock offset moves the pulses onto later samples
    u2, _ = encode_pulses(pulses, ["A", "B"], sample_rate_hz=1000.0, n_samples=50, offset_s=0.005)
    assert u2[15, 0] == -3.0
    with pytest.raises(SessionError, match=r"sites \['B'\] that are not declared inputs \['A'\]"):
        encode_pulses(pulses, ["A"], sample_rate_hz=1000.0, n_samples=50)
    with pytest.raises(SessionError, match=r"no pulse falls on the recording"):
        encode_pulses(pulses[3:], ["A", "B"], sample_rate_hz=1000.0, n_samples=50)


def test_pulse_train_onsets_are_the_first_pulse_of_each_train():
    t = np.concatenate([1.0 + np.arange(10) / 130.0, 3.0 + np.arange(10) / 130.0])
    assert pulse_train_onsets(t, gap_s=0.5).tolist() == [1.0, 3.0]


def test_two_clocks_fir_alignment_matches_scipy_resample_poly_on_a_sinusoid():
    # 30 kHz source, 1 kHz grid, same start: the aligned series is resample_poly's output itself (the interpolation
    # lands exactly on its samples); a 40 Hz tone passes the anti-aliasing filter unchanged to 2e-3 (the pass-band
    # ripple of scipy's default Kaiser-window design)
    fs, ft = 30000.0, 1000.0
    t = np.arange(int(fs * 2.0)) / fs
    x = np.sin(2 * np.pi * 40.0 * t)
    y, cov, a = align_channel(x, source_rate_hz=fs, source_start_s=0.0, target_rate_hz=ft, target_start_s=0.0,
                              n_target=2000, anti_aliasing="fir", name="stim")
    ref = signal.resample_poly(x, 1, 30)  # scipy reference (Kaiser window, beta 5)
    assert cov.all() and np.allclose(y, ref, atol=1e-12)
    tk = np.arange(2000) / ft
    assert np.max(np.abs(y[100:-100] - np.sin(2 * np.pi * 40.0 * tk[100:-100]))) < 2e-3
    # a 3 kHz tone (above the grid's 500 Hz Nyquist) is removed, not folded back
    z, _, _ = align_channel(np.sin(2 * np.pi * 3000.0 * t), source_rate_hz=fs, source_start_s=0.0,
                            target_rate_hz=ft, target_start_s=0.0, n_target=2000, anti_aliasing="fir")
    assert np.max(np.abs(z[100:-100])) < 1e-2
    assert a.to_dict()["method"].startswith("scipy.signal.resample_poly")


def test_two_clocks_with_an_offset_partial_overlap_and_no_overlap():
    x = np.arange(100, dtype=float)  # 100 Hz source from 0 s on its clock
    y, cov, a = align_channel(x, source_rate_hz=100.0, source_start_s=0.0, target_rate_hz=100.0, target_start_s=0.0,
                              n_target=120, offset_s=0.1, anti_aliasing="none")
    assert np.flatnonzero(~cov).tolist() == list(range(10)) + list(range(110, 120))
    assert y[10] == 0.0 and y[109] == 99.0 and a.n_outside == 20 and a.overlap_s == (0.1, 1.1)
    with pytest.raises(SessionError, match=r"clocks of 'stim' and the model grid do not overlap"):
        align_channel(x, source_rate_hz=100.0, source_start_s=0.0, target_rate_hz=100.0, target_start_s=0.0,
                      n_target=50, offset_s=5.0, name="stim")
    with pytest.raises(SessionError, match=r"anti_aliasing must be one of"):
        align_channel(x, source_rate_hz=100.0, source_start_s=0.0, target_rate_hz=100.0, target_start_s=0.0,
                      n_target=50, anti_aliasing="cubic")


@pytest.mark.parametrize("fs, ft, how, offset_s", [
    (1000.0, 1000.0, "fir", 0.0123), (30000.0, 1000.0, "fir", 0.0), (30000.0, 1000.0, "mean", 0.0),
    (1000.0, 250.0, "fir", -0.5), (1000.0, 300.0, "fir", 0.3), (1000.0, 2000.0, "fir", 0.0),
    (3000.0, 1000.0, "none", 0.1)])
def test_aligning_in_windows_equals_aligning_the_whole_series(monkeypatch, fs, ft, how, offset_s):
    # convert streams: the grid is filled window by window from the source samples each window needs. The
    # reference is the same alignment in one window (the whole series at once); they agree to rounding, on
    # windows of 997 model samples (prime, so no window edge lines up with the resampling ratio).
    import stimsteer.sysid.events as ev
    from stimsteer.sysid.io._recording import LazySamples

    x = np.random.default_rng(0).standard_normal(30011)
    kw = dict(source_rate_hz=fs, source_start_s=0.0, target_rate_hz=ft, target_start_s=0.2,
              n_target=int(30011 * ft / fs), offset_s=offset_s, anti_aliasing=how)
    monkeypatch.setattr(ev, "ALIGN_WINDOW_SAMPLES", 1 << 30)
    whole, cov_whole, _ = ev.align_channel(x, **kw)
    monkeypatch.setattr(ev, "ALIGN_WINDOW_SAMPLES", 997)
    reads = []
    lazy = LazySamples(x.size, lambda a, b: (reads.append(b - a), x[a:b])[1])
    out = np.empty(kw["n_target"])
    windowed, cov, _ = ev.align_channel(lazy, **kw, out=out)
    assert windowed is out and np.array_equal(cov, cov_whole) and np.isnan(windowed[~cov]).all()
    assert np.allclose(windowed[cov], whole[cov_whole], rtol=0, atol=1e-10)
    assert max(reads) < 997 * fs / ft + 400  # never the whole series: one window and the filter's reach
