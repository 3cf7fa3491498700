"""Tests of stimsteer.sysid.prep: detrending, zero-phase filtering, resampling, scaling, artifact blanking."""

import math

import numpy as np
import pytest
from scipy import signal

from stimsteer.sysid.exceptions import NotFittedError, SessionError, StimsteerWarning
from stimsteer.sysid.prep import SessionScaler, blank_artifacts, detrend, filter_session, resample_session
from stimsteer.sysid.session import Session

FS = 1000.0


def _sine_session(f_hz, n=4000, phase=0.3, trials=None, mask=None):
    t = np.arange(n) / FS
    y = np.column_stack([np.sin(2 * np.pi * f_hz * t + phase), 2.0 * np.cos(2 * np.pi * f_hz * t)])
    return Session(u=np.zeros((n, 1)), y=y, sample_rate_hz=FS, trials=trials, mask=mask, output_units=["mV", "mV"])


def _amplitude_phase(x, t, f_hz):
    """Least-squares amplitude and phase of the f_hz component of x (a sinusoid fit, common practice)."""
    design = np.column_stack([np.sin(2 * np.pi * f_hz * t), np.cos(2 * np.pi * f_hz * t)])
    (a, b), *_ = np.linalg.lstsq(design, x, rcond=None)
    return math.hypot(a, b), math.atan2(b, a)


# ================================================================================================ filtering
# Outside check: forward-backward (zero-phase) filtering multiplies a sinusoid by |H(f)|^2 and adds no phase
# (Gustafsson F. 1996, "Determining the initial states in forward-backward filtering", IEEE Trans. Signal Process.
# 44:988; scipy.signal.sosfiltfilt documentation). |H(f)| comes from scipy.signal.sosfreqz (reference library).
@pytest.mark.parametrize("kind, cutoff, f_hz", [("lowpass", 50.0, 5.0), ("highpass", 5.0, 50.0),
                                                ("bandpass", (5.0, 100.0), 30.0)])
def test_zero_phase_filter_keeps_passband_sinusoid_phase_and_amplitude(kind, cutoff, f_hz):
    s = _sine_session(f_hz, n=8000)
    out = filter_session(s, kind=kind, cutoff_hz=cutoff, order=4)
    sos = signal.butter(4, cutoff, btype=kind, fs=FS, output="sos")
    gain = abs(signal.sosfreqz(sos, worN=[f_hz], fs=FS)[1][0]) ** 2
    t = np.arange(s.n_samples) / FS
    # 2 s from each edge: the slowest pole of the 5 Hz filters decays as exp(-2 pi 5 sin(pi/8) t), about 1e-10
    # after 2 s (Butterworth pole angles, common practice, no source), so the edge transients are gone
    inner = slice(2000, 6000)
    amp, ph = _amplitude_phase(out.y[inner, 0], t[inner], f_hz)
    assert amp == pytest.approx(gain, rel=1e-6)
    assert ph == pytest.approx(0.3, abs=1e-6)
    assert np.abs(out.y[inner, 1] - gain * s.y[inner, 1]).max() < 1e-6
    assert gain > 1 - 1e-3  # the chosen frequencies are well inside the pass band


def test_zero_phase_filter_removes_a_stopband_sinusoid():
    s = _sine_session(400.0)
    out = filter_session(s, kind="lowpass", cutoff_hz=20.0)
    # squared 4th-order Butterworth at 20x the cut-off: about 20**-16, i.e. nothing left (sosfreqz gives 1e-21)
    assert np.abs(out.y[500:3500]).max() < 1e-8


def test_filter_runs_per_segment_and_matches_sosfiltfilt():
    rng = np.random.default_rng(3)
    n = 1000
    y = rng.standard_normal((n, 1))
    mask = np.ones(n, dtype=bool)
    mask[400:410] = False
    y[400:410] = np.nan  # a masked artifact holding NaN must not spread
    y[700:] += 1e6  # a huge step in the second trial must not leak into the first
    s = Session(u=np.zeros((n, 1)), y=y, sample_rate_hz=FS, trials=[(0, 600), (600, n)], mask=mask)
    out = filter_session(s, kind="lowpass", cutoff_hz=100.0, order=2)
    sos = signal.butter(2, 100.0, fs=FS, output="sos")
    for a, b in [(0, 400), (410, 600), (600, n)]:
        assert np.allclose(out.y[a:b], signal.sosfiltfilt(sos, y[a:b], axis=0), rtol=1e-12, atol=1e-9)
    assert np.isnan(out.y[400:410]).all() and np.array_equal(out.mask, mask)
    assert np.array_equal(out.u, s.u)  # default signals="outputs"
    assert out.metadata["prep"][-1]["step"] == "filter"


def test_segment_too_short_to_filter():
    mask = np.ones(200, dtype=bool)
    mask[20] = False
    s = Session(u=np.zeros((200, 1)), y=np.ones((200, 1)), sample_rate_hz=FS, mask=mask)
    # order 4 -> 2 sections -> padlen 3 * (2*2 + 1) = 15 (scipy.signal.sosfiltfilt default); [0, 20) has 20 > 15
    filter_session(s, kind="lowpass", cutoff_hz=50.0, order=4)
    with pytest.raises(SessionError, match=r"valid segment \[0, 20\) has 20 samples; an order-8 lowpass filter "
                                           r"needs more than 27.*short_segments='mask'"):
        filter_session(s, kind="lowpass", cutoff_hz=50.0, order=8)
    out = filter_session(s, kind="lowpass", cutoff_hz=50.0, order=8, short_segments="mask")
    assert not out.mask[:21].any() and out.mask[21:].all()
    assert out.metadata["prep"][-1]["n_masked_short"] == 20


@pytest.mark.parametrize("kw, pattern", [
    ({"kind": "notch", "cutoff_hz": 50.0}, r"kind must be 'lowpass', 'highpass' or 'bandpass'; got 'notch'"),
    ({"kind": "lowpass", "cutoff_hz": 500.0}, r"strictly between 0 and the Nyquist frequency 500 Hz; got \[500\.0\]"),
    ({"kind": "lowpass", "cutoff_hz": -1.0}, r"strictly between 0 and the Nyquist"),
    ({"kind": "bandpass", "cutoff_hz": 50.0}, r"bandpass filter needs 2 cut-off frequencies"),
    ({"kind": "bandpass", "cutoff_hz": (60.0, 50.0)}, r"bandpass needs low < high; got \[60\.0, 50\.0\]"),
    ({"kind": "highpass", "cutoff_hz": (1.0, 2.0)}, r"highpass filter needs 1 cut-off frequency"),
    ({"kind": "lowpass", "cutoff_hz": 50.0, "order": 0}, r"order must be a positive whole number; got 0"),
    ({"kind": "lowpass", "cutoff_hz": 50.0, "order": 2.5}, r"order must be a positive whole number; got 2\.5"),
    ({"kind": "lowpass", "cutoff_hz": 50.0, "signals": "all"}, r"signals must be one of"),
    ({"kind": "lowpass", "cutoff_hz": 50.0, "short_segments": "skip"}, r"short_segments must be 'error' or 'mask'"),
])
def test_filter_setting_errors(kw, pattern):
    with pytest.raises(SessionError, match=pattern):
        filter_session(_sine_session(5.0, n=500), **kw)


def test_prep_functions_need_a_session():
    with pytest.raises(SessionError, match=r"filter_session needs a Session; got ndarray"):
        filter_session(np.zeros((10, 2)), kind="lowpass", cutoff_hz=1.0)


# ================================================================================================ resampling
# Outside check: resample_poly's anti-aliasing FIR uses a Kaiser window with beta = 5; Kaiser's design formula
# beta = 0.1102 (A - 8.7) gives A = 54 dB, i.e. pass-band ripple about 10**(-54/20) = 2e-3 (Oppenheim A.V.,
# Schafer R.W. 1999, Discrete-Time Signal Processing, 2nd ed., sec. 7.5). An in-band sinusoid must therefore come
# back within a few 1e-3 of its amplitude at the exact new sample times, away from the trial edges.
@pytest.mark.parametrize("target", [250.0, 1500.0, 330.0])
def test_resampling_keeps_an_inband_sinusoid(target):
    s = _sine_session(5.0, phase=0.3)
    r = resample_session(s, target_rate_hz=target)
    t_new = np.arange(r.n_samples) / target
    inner = slice(r.n_samples // 10, -r.n_samples // 10)
    assert r.sample_rate_hz == target
    assert np.abs(r.y[inner, 0] - np.sin(2 * np.pi * 5.0 * t_new[inner] + 0.3)).max() < 5e-3
    assert np.abs(r.y[inner, 1] - 2.0 * np.cos(2 * np.pi * 5.0 * t_new[inner])).max() < 1e-2
    assert r.output_units == s.output_units and r.mask.all()
    assert r.metadata["prep"][-1]["to_hz"] == target


def test_resampling_removes_content_above_the_new_nyquist():
    s = _sine_session(200.0)  # above the 125 Hz Nyquist frequency of 250 Hz: would alias to 50 Hz
    r = resample_session(s, target_rate_hz=250.0)
    assert np.abs(r.y[100:-100, 0]).max() < 5e-3  # Kaiser beta = 5 stop band, about -54 dB (see above)


def test_resampling_maps_trials_and_mask_conservatively():
    n = 1000
    mask = np.ones(n, dtype=bool)
    mask[400] = False
    s = _sine_session(5.0, n=n, trials=[(0, 100), (150, 301), (301, 1000)], mask=mask)
    r = resample_session(s, target_rate_hz=250.0)  # up = 1, down = 4
    # [a, b) -> [ceil(a/4), ceil(b/4)): 150/4 = 37.5 -> 38, 301/4 = 75.25 -> 76 (as documented)
    assert r.trials.tolist() == [[0, 25], [38, 76], [76, 250]]
    # the first new sample of a trial is its first original sample: sin(2 pi 5 t + 0.3) at t = 150 ms
    assert r.y[38, 0] == pytest.approx(math.sin(2 * math.pi * 5.0 * 0.150 + 0.3), abs=2e-2)
    # outside trials: NaN and invalid
    assert np.isnan(r.y[25:38]).all() and not r.mask[25:38].any()
    # inside the third trial, new sample j (original position 301 + 4 j) is valid iff no masked original sample
    # lies within 10 * max(up, down) / up = 40 original samples (the reach of resample_poly's filter)
    # (sample 400 is relative position 99 in the trial)
    expected = [abs(4 * j - 99) > 40 for j in range(250 - 76)]
    assert r.mask[76:250].tolist() == expected and expected.count(False) == 20
    assert np.isfinite(r.y[r.mask]).all()


def test_resampling_errors():
    s = _sine_session(5.0, n=500, trials=[(0, 1), (1, 2), (2, 500)])
    with pytest.raises(SessionError, match=r"target_rate_hz must be positive and finite; got -1\.0"):
        resample_session(s, target_rate_hz=-1.0)
    with pytest.raises(SessionError, match=r"target_rate_hz must be a number in Hz; got 'fast'"):
        resample_session(s, target_rate_hz="fast")
    with pytest.raises(SessionError, match=r"cannot resample 1000 Hz to 3141\.59 Hz.*Raise max_denominator"):
        resample_session(s, target_rate_hz=1000.0 * math.pi, max_denominator=10)
    with pytest.raises(SessionError, match=r"trial 1 \[1, 2\) is shorter than one sample at 250 Hz"):
        resample_session(s, target_rate_hz=250.0)


# ================================================================================================ detrending
def test_linear_detrend_uses_valid_samples_per_trial():
    n = 300
    k = np.arange(n, dtype=float)
    y = np.where(k < 150, 2.0 + 0.1 * k, -5.0 - 0.03 * k)[:, None]
    mask = np.ones(n, dtype=bool)
    mask[[10, 11, 200]] = False
    y[[10, 11, 200]] = [[1e9], [np.nan], [-1e9]]  # masked junk must not bend the fitted lines
    y[290:] = 7.0  # outside trials: unchanged
    s = Session(u=np.ones((n, 1)), y=y, sample_rate_hz=FS, trials=[(0, 150), (150, 290)], mask=mask)
    out = detrend(s, kind="linear")
    assert np.abs(out.y[mask & (k < 290), 0]).max() < 1e-9  # a pure line per trial leaves zero
    assert np.array_equal(out.y[290:], y[290:]) and np.array_equal(out.u, s.u)
    assert out.metadata["prep"] == [{"step": "detrend", "kind": "linear", "signals": "outputs"}]


def test_constant_detrend_removes_the_valid_mean_of_each_trial():
    y = np.array([1.0, 3.0, 100.0, 10.0, 20.0])[:, None]
    mask = np.array([True, True, False, True, True])
    s = Session(u=y.copy(), y=y, sample_rate_hz=1.0, trials=[(0, 3), (3, 5)], mask=mask)
    out = detrend(s, kind="constant", signals="both")
    assert out.y[:, 0].tolist() == [-1.0, 1.0, 98.0, -5.0, 5.0]
    assert out.u[:, 0].tolist() == out.y[:, 0].tolist()


def test_detrend_errors():
    mask = np.array([True, False, False, True, True])
    s = Session(u=np.zeros((5, 1)), y=np.arange(5.0), sample_rate_hz=1.0, trials=[(0, 3), (3, 5)], mask=mask)
    with pytest.raises(SessionError, match=r"trial 0 \[0, 3\) has 1 valid sample; a linear trend needs at least 2"):
        detrend(s)
    assert detrend(s, kind="constant").y[:3, 0].tolist() == [0.0, 1.0, 2.0]
    with pytest.raises(SessionError, match=r"kind must be 'constant' or 'linear'; got 'quadratic'"):
        detrend(s, kind="quadratic")


# ================================================================================================ scaler
def test_scaler_standardises_on_valid_in_trial_samples_and_inverts(rng):
    n = 500
    u = 3.0 + 2.0 * rng.standard_normal((n, 2))
    y = -1.0 + 0.01 * rng.standard_normal((n, 1))
    mask = np.ones(n, dtype=bool)
    mask[:20] = False
    u[:20], y[450:] = np.nan, 1e6  # masked NaN and out-of-trial junk must not enter the statistics
    s = Session(u=u, y=y, sample_rate_hz=FS, trials=[(0, 450)], mask=mask, input_units=["uA", "uA"],
                output_units=["mV"])
    sc = SessionScaler()
    assert sc.fit(s) is sc
    used = mask & (np.arange(n) < 450)
    assert np.allclose(sc.mean_, np.hstack([u, y])[used].mean(axis=0), rtol=1e-14)
    z = sc.transform(s)
    assert np.allclose(z.u[used].mean(axis=0), 0.0, atol=1e-12) and np.allclose(z.y[used].std(axis=0), 1.0)
    assert z.input_units == ("sd(uA)", "sd(uA)") and z.output_units == ("sd(mV)",)
    back = sc.inverse_transform(z)
    # exact up to floating-point rounding: (x - m) / s * s + m differs from x by a few ulp at most
    assert np.allclose(back.u[used], s.u[used], rtol=1e-14, atol=1e-14)
    assert np.allclose(back.y, s.y, rtol=1e-14, atol=0)
    assert back.input_units == s.input_units and back.metadata["prep"][-1]["step"] == "unscale"
    plan = np.array([[0.5, -1.0]])
    assert np.allclose(sc.transform_inputs(sc.inverse_transform_inputs(plan)), plan, rtol=1e-14)
    assert np.allclose(sc.inverse_transform_outputs(np.ones(1)), sc.mean_[2] + sc.scale_[2])


def test_scaler_reports_zero_variance_channels(rng):
    s = Session(u=np.full((50, 1), 4.0), y=rng.standard_normal((50, 1)), sample_rate_hz=FS)
    with pytest.warns(StimsteerWarning, match=r"\['u0'\] have zero variance.*scale is set to 1"):
        sc = SessionScaler().fit(s)
    assert sc.constant_channels_ == ("u0",) and sc.scale_[0] == 1.0
    assert np.allclose(sc.transform(s).u, 0.0)


def test_scaler_without_scale_keeps_units(rng):
    s = Session(u=rng.standard_normal((50, 1)), y=rng.standard_normal((50, 1)), sample_rate_hz=FS,
                input_units=["uA"])
    sc = SessionScaler(with_scale=False).fit(s)
    assert sc.get_params() == {"with_mean": True, "with_scale": False} and np.all(sc.scale_ == 1.0)
    assert sc.transform(s).input_units == ("uA",)
    assert "with_scale=False" in repr(sc)


def test_scaler_errors(rng):
    s = Session(u=rng.standard_normal((50, 1)), y=rng.standard_normal((50, 1)), sample_rate_hz=FS)
    with pytest.raises(NotFittedError, match=r"SessionScaler is not fitted yet"):
        SessionScaler().transform(s)
    sc = SessionScaler().fit(s)
    with pytest.raises(SessionError, match=r"fitted on inputs \['u0'\] and outputs \['y0'\]; this session has "
                                           r"\['a'\]"):
        sc.transform(s.replace(input_names=["a"]))
    with pytest.raises(SessionError, match=r"inverse_transform expects units \['sd\(a\.u\.\)'.*scaled already"):
        sc.inverse_transform(s)
    with pytest.raises(SessionError, match=r"transform expects units \['a\.u\.', 'a\.u\.'\]"):
        sc.transform(sc.transform(s))
    with pytest.raises(SessionError, match=r"inputs must have 1 channels in the last axis .*got shape \(4, 2\)"):
        sc.transform_inputs(np.zeros((4, 2)))
    with pytest.raises(SessionError, match=r"no valid samples inside trials"):
        SessionScaler().fit(s.replace(mask=np.zeros(50, dtype=bool)))


# ================================================================================================ blanking
def test_blanking_masks_the_outputs_of_a_window_after_every_onset():
    n = 40
    u = np.zeros((n, 2))
    u[5:8, 0] = 1.0  # onset at 5
    u[20, 1] = 2.0  # onset at 20
    u[21, 0] = 1.0  # channel 0 rises at 21: another onset
    u[35:38, 1] = np.nan  # masked NaN: not an onset itself
    u[38, 1] = 3.0  # after a NaN: counts as a rise (NaN is "not above")
    mask = np.ones(n, dtype=bool)
    mask[35:38] = False
    s = Session(u=u, y=np.zeros((n, 1)), sample_rate_hz=FS, mask=mask)
    out = blank_artifacts(s, window_s=0.0025)  # 2.5 ms at 1 kHz -> ceil(2.5) = 3 samples from the onset
    blanked = sorted(set(range(5, 8)) | set(range(20, 24)) | set(range(38, 40)))
    assert np.flatnonzero(~out.output_mask).tolist() == blanked
    assert np.array_equal(out.mask, s.mask)  # the samples (and so the inputs) stay valid
    assert np.array_equal(out.u, s.u, equal_nan=True)
    step = out.metadata["prep"][-1]
    assert step["n_onsets"] == 4 and step["n_blanked"] == len(blanked)


def test_blanking_threshold_first_sample_and_channel_choice():
    u = np.array([[0.6, 0.0], [0.6, 0.0], [0.2, 0.0], [0.9, 0.9], [0.9, 0.0], [0.0, 0.0]])
    s = Session(u=u, y=np.zeros((6, 1)), sample_rate_hz=1.0, input_names=["a", "b"])
    out = blank_artifacts(s, window_s=1.0, onset_threshold=0.5)  # one sample per onset
    assert np.flatnonzero(~out.output_mask).tolist() == [0, 3]  # sample 0 already above: an onset
    assert np.flatnonzero(~blank_artifacts(s, window_s=1.0, onset_threshold=0.5, inputs="b").output_mask).tolist() \
        == [3]


@pytest.mark.parametrize("kw, pattern", [
    ({"window_s": 0.0}, r"window_s must be a positive number of seconds; got 0\.0"),
    ({"window_s": "long"}, r"window_s and onset_threshold must be numbers"),
    ({"window_s": 0.1, "onset_threshold": np.nan}, r"onset_threshold must be finite"),
    ({"window_s": 0.1, "inputs": ["site_z"]}, r"inputs \['site_z'\] are not input channels.*\['u0'\]"),
])
def test_blanking_errors(kw, pattern):
    s = Session(u=np.zeros((10, 1)), y=np.zeros((10, 1)), sample_rate_hz=FS)
    with pytest.raises(SessionError, match=pattern):
        blank_artifacts(s, **kw)


def test_blanking_needs_inputs():
    s = Session(u=np.zeros((10, 0)), y=np.zeros((10, 1)), sample_rate_hz=FS)
    with pytest.raises(SessionError, match=r"needs at least one input channel"):
        blank_artifacts(s, window_s=0.1)


def test_blanking_counts_negative_pulses_as_onsets_but_not_polarity_switches():
    # A cathodic (negative) pulse makes an artifact like an anodic one (common practice, no source); a switch
    # from +10 to -10 while the site stays on is not a new onset.
    u = np.zeros((40, 1))
    u[5:7] = -10.0  # negative pulse: onset at 5
    u[20:22] = 10.0  # positive, then switches polarity without turning off: one onset at 20
    u[22:24] = -10.0
    s = Session(u=u, y=np.zeros((40, 1)), sample_rate_hz=100.0)
    out = blank_artifacts(s, window_s=0.03)
    assert np.flatnonzero(~out.output_mask).tolist() == [5, 6, 7, 20, 21, 22]
    assert out.metadata["prep"][-1]["n_onsets"] == 2


# ======================================================================== blanking: what it hides, outputs-only
def _pulse_train_session(seed=1):
    # 130 Hz trains at 1 kHz, one sample per pulse: the case where blanking 2 ms hides every pulse
    rng = np.random.default_rng(seed)
    n = 20000
    u = np.zeros((n, 1))
    k = (np.arange(0, n / FS, 1 / 130.0) * FS).astype(int)
    u[k, 0] = rng.uniform(20, 60, k.size)
    y = np.zeros((n, 1))
    for i in range(1, n):
        y[i, 0] = 0.8 * y[i - 1, 0] + 0.05 * u[i - 1, 0]  # the response, one sample late
    y += 0.01 * rng.standard_normal((n, 1)) + 0.05 * u  # plus an artifact on the pulse sample itself
    return Session(u=u, y=y, sample_rate_hz=FS, trials=[(0, n // 2), (n // 2, n)])


def test_blanking_outputs_only_keeps_every_pulse_and_the_template_route_agrees():
    # Issue 17, "What was measured": 130 Hz trains at 1 kHz, 2 ms blanking made every pulse sample invalid and
    # ridge ARX raised "input never varies". Blanking now hides the outputs only: the inputs stay, the fit runs.
    from stimsteer.sysid.arx import RidgeArx
    from stimsteer.sysid.artifacts import subtract_template

    s = _pulse_train_session()
    b = blank_artifacts(s, window_s=0.002)
    assert np.array_equal(b.u, s.u) and b.mask.all()  # inputs and the sample mask untouched
    assert b.blanked_output_fraction == pytest.approx(0.26, abs=0.005)  # 2 of every 7.7 samples
    kept = b.output_mask
    assert np.array_equal(b.y[kept], s.y[kept])  # only blanked outputs change (bridged by a line)
    RidgeArx(output_lags=1, input_lags=1).fit(b)  # no "input never varies" any more
    t = subtract_template(s, window_s=0.001)  # the other outputs-only route still recovers the system
    assert np.array_equal(t.u, s.u) and t.mask.all()
    m = RidgeArx(output_lags=1, input_lags=1).fit(t)
    # the simulated system y_k = 0.8 y_(k-1) + 0.05 u_(k-1): recovered within 5 % after the artifact is removed
    assert m.ar_coefs_.ravel()[0] == pytest.approx(0.8, rel=0.05)
    assert m.input_coefs_.ravel()[0] == pytest.approx(0.05, rel=0.1)