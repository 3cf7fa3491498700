"""Biomarker envelopes against scipy.signal references (outside checks).

Sources: the envelope definition is ours (stated in stimsteer.sysid.biomarkers): band-pass, square (rectification
by squaring, no Hilbert transform), low-pass. The references are scipy.signal.butter + scipy.signal.lfilter (transfer
function form, run directly) and scipy.signal.sosfreqz for the filters' gain; the steady-state mean of
(A |H| sin)^2 is A^2 |H|^2 / 2 (a trigonometric identity, common practice, no source).
"""

import numpy as np
import pytest
from scipy import signal

from stimsteer.sysid.biomarkers import band_power_envelope, envelope_filters

FS = 1000.0
BAND = (13.0, 30.0)


def _tone(f, a=2.0, seconds=6.0):
    t = np.arange(int(FS * seconds)) / FS
    return a * np.sin(2 * np.pi * f * t)


def test_causal_envelope_equals_lfilter_in_transfer_function_form():
    x = np.random.default_rng(20261201).standard_normal(5000)
    env = band_power_envelope(x, sample_rate_hz=FS, band_hz=BAND, phase="causal", order=3, smoothing_hz=5.0)
    b, a = signal.butter(3, BAND, btype="bandpass", fs=FS)  # reference: scipy.signal.butter + lfilter
    b2, a2 = signal.butter(2, 5.0, btype="lowpass", fs=FS)
    ref = signal.lfilter(b2, a2, signal.lfilter(b, a, x) ** 2)
    assert np.allclose(env, ref, rtol=1e-7, atol=1e-12 * np.abs(ref).max())


def test_envelope_of_a_known_sinusoid_is_a2_h2_over_2():
    band_sos, _, _ = envelope_filters(FS, BAND, order=4, smoothing_hz=5.0)
    for f in (20.0, 25.0):
        _, h = signal.sosfreqz(band_sos, worN=[f], fs=FS)
        expected = 2.0 ** 2 * abs(h[0]) ** 2 / 2
        env = band_power_envelope(_tone(f), sample_rate_hz=FS, band_hz=BAND, phase="causal", smoothing_hz=5.0)
        steady = env[-2000:]  # after the filters' transients (several time constants of the 5 Hz low-pass)
        assert steady.mean() == pytest.approx(expected, rel=0.01)
        assert np.sqrt(2 * steady.mean()) == pytest.approx(2.0 * abs(h[0]), rel=0.01)  # the amplitude


@pytest.mark.parametrize("phase", ["causal", "zero-phase"])
def test_band_power_of_a_pure_tone_in_band_vs_out_of_band(phase):
    band_sos, _, _ = envelope_filters(FS, BAND, order=4, smoothing_hz=5.0)
    _, h = signal.sosfreqz(band_sos, worN=[20.0, 60.0], fs=FS)
    gain2 = np.abs(h) ** 2 if phase == "causal" else np.abs(h) ** 4  # forward-backward squares the magnitude
    p_in = band_power_envelope(_tone(20.0), sample_rate_hz=FS, band_hz=BAND, phase=phase, smoothing_hz=5.0)
    p_out = band_power_envelope(_tone(60.0), sample_rate_hz=FS, band_hz=BAND, phase=phase, smoothing_hz=5.0)
    mid = slice(2000, 4000)  # away from both edges (the zero-phase pass has transients at both)
    assert p_in[mid].mean() == pytest.approx(2.0 * gain2[0], rel=0.02)
    assert p_out[mid].mean() == pytest.approx(2.0 * gain2[1], rel=0.05, abs=1e-9)
    assert p_out[mid].mean() < 1e-3 * p_in[mid].mean()


def test_zero_phase_envelope_equals_sosfiltfilt_reference():
    x = np.random.default_rng(7).standard_normal(3000)
    band_sos, smooth_sos, _ = envelope_filters(FS, BAND, order=4, smoothing_hz=5.0)
    ref = signal.sosfiltfilt(smooth_sos, signal.sosfiltfilt(band_sos, x) ** 2)
    env = band_power_envelope(x, sample_rate_hz=FS, band_hz=BAND, phase="zero-phase", smoothing_hz=5.0)
    assert np.allclose(env, ref)
