"""Biomarker outputs: band-power outputs with unit and recipe, binned spike rates, line-noise removal."""

import numpy as np
import pytest

from stimsteer.sysid import Session, load_session, save_session
from stimsteer.sysid.biomarkers import (add_band_power_outputs, band_power_envelope, binned_spike_rate,
                                        remove_line_noise)
from stimsteer.sysid.exceptions import SessionError

FS = 1000.0


@pytest.fixture(scope="module")
def session():
    t = np.arange(8000) / FS
    y = np.column_stack([np.sin(2 * np.pi * 20 * t) * (t > 4), 0.5 * np.sin(2 * np.pi * 10 * t)])
    return Session(u=np.zeros((8000, 1)), y=y, sample_rate_hz=FS, output_names=["lfp", "ecog"],
                   output_units=["uV", "mV"], trials=[(0, 4000), (4000, 8000)])


def test_band_power_outputs_keep_unit_and_recipe_and_survive_a_file(session, tmp_path):
    out = add_band_power_outputs(session, channels="lfp", band_hz=(13, 30), phase="causal", smoothing_hz=4.0)
    assert out.output_names == ("lfp", "ecog", "lfp_power_13-30Hz") and out.output_units[-1] == "uV^2"
    recipe = out.metadata["derived_outputs"]["lfp_power_13-30Hz"]
    assert recipe["phase"] == "causal" and recipe["band_hz"] == [13.0, 30.0] and recipe["source"] == "lfp"
    assert recipe["smoothing_hz"] == 4.0 and "squared" in recipe["definition"]
    env = out.y[:, 2]
    # per trial from rest: the first trial holds no 20 Hz, the second a unit sinusoid -> power about 1/2
    assert env[:4000].max() < 1e-12 and env[6000:].mean() == pytest.approx(0.5, rel=0.05)
    back = load_session(save_session(out, tmp_path / "s.h5"))
    assert back.output_units == out.output_units and back.metadata["derived_outputs"] == out.metadata[
        "derived_outputs"]
    swap = add_band_power_outputs(session, channels=["lfp"], band_hz=(13, 30), phase="zero-phase",
                                  keep_source=False, names=["beta"])
    assert swap.output_names == ("ecog", "beta")


def test_the_phase_is_chosen_explicitly(session):
    with pytest.raises(SessionError, match=r"phase must be chosen explicitly among \['causal', 'zero-phase'\]"):
        add_band_power_outputs(session, channels="lfp", band_hz=(13, 30), phase=None)
    with pytest.raises(SessionError, match=r"band_hz must be \(low, high\) with 0 < low < high < Nyquist 500 Hz"):
        band_power_envelope(np.zeros(10), sample_rate_hz=FS, band_hz=(30, 600), phase="causal")
    with pytest.raises(SessionError, match=r"outputs \['spk'\] are not output channels"):
        add_band_power_outputs(session, channels="spk", band_hz=(13, 30), phase="causal")


def test_a_causal_envelope_never_uses_the_future():
    x = np.zeros(2000)
    x[1500:] = np.sin(2 * np.pi * 20 * np.arange(500) / FS)
    causal = band_power_envelope(x, sample_rate_hz=FS, band_hz=(13, 30), phase="causal")
    zero = band_power_envelope(x, sample_rate_hz=FS, band_hz=(13, 30), phase="zero-phase")
    assert np.all(causal[:1500] == 0.0) and np.abs(zero[1400:1500]).max() > 1e-4  # zero-phase looks ahead


def test_binned_spike_rate_counts_per_model_sample():
    rate = binned_spike_rate([0.0005, 0.0009, 0.0021, 0.5, -1.0], sample_rate_hz=FS, n_samples=10)
    assert rate.tolist() == [2000.0, 0.0, 1000.0] + [0.0] * 7  # spikes per second in each 1 ms bin
    with pytest.raises(SessionError, match=r"spike times must be finite"):
        binned_spike_rate([np.nan], sample_rate_hz=FS, n_samples=10)


@pytest.mark.parametrize("phase", ["causal", "zero-phase"])
def test_line_noise_is_removed_and_the_signal_kept(phase):
    t = np.arange(20000) / FS
    clean = np.sin(2 * np.pi * 10 * t)
    hum = 0.8 * np.sin(2 * np.pi * 50 * t) + 0.3 * np.sin(2 * np.pi * 150 * t)
    s = Session(u=np.zeros((t.size, 1)), y=(clean + hum)[:, None], sample_rate_hz=FS)
    out = remove_line_noise(s, line_hz=50.0, harmonics=3, phase=phase)
    err = out.y[5000:-5000, 0] - clean[5000:-5000]
    # left of the hum: under 2 % of its RMS (notch quality 30: the 10 Hz signal passes with < 1 % gain error)
    assert np.sqrt(np.mean(err ** 2)) < 0.02 * np.sqrt(np.mean(hum ** 2))
    step = out.metadata["prep"][-1]
    assert step["frequencies_hz"] == [50.0, 100.0, 150.0] and step["phase"] == phase
    assert np.array_equal(out.u, s.u)


@pytest.mark.parametrize("phase", ["causal", "zero-phase"])
def test_filters_in_windows_equal_one_pass_over_each_segment(monkeypatch, phase):
    # Reference: scipy.signal.sosfilt / sosfiltfilt over each whole valid segment at once (the module docstring's
    # definitions). The causal passes now run in windows carrying the filter state, the zero-phase ones a channel
    # at a time; on 999-sample windows they must give the same envelopes and notched outputs.
    import stimsteer.sysid.biomarkers as bio
    from scipy import signal as sig

    rng = np.random.default_rng(5)
    n, fs = 6000, 1000.0
    y = rng.standard_normal((n, 3))
    mask = np.ones(n, dtype=bool)
    mask[2500:2600] = False
    s = Session(u=np.zeros((n, 1)), y=y, sample_rate_hz=fs, mask=mask, trials=[(0, 4000), (4000, n)],
                output_names=["a", "b", "c"])
    monkeypatch.setattr(bio, "_CHUNK", 999)
    env = bio.add_band_power_outputs(s, channels=["c", "a"], band_hz=[13.0, 30.0], phase=phase)
    notched = bio.remove_line_noise(s, line_hz=50.0, phase=phase)
    band, smooth, _ = bio.envelope_filters(fs, [13.0, 30.0])
    notch, _ = bio._notch_sos(fs, 50.0, 3, 30.0)
    run = sig.sosfilt if phase == "causal" else sig.sosfiltfilt
    for a, b in s.segments():
        ref = run(smooth, run(band, y[a:b][:, [2, 0]], axis=0) ** 2, axis=0)
        assert np.allclose(env.y[a:b, 3:], ref, rtol=1e-10, atol=1e-14)
        assert np.allclose(notched.y[a:b], run(notch, y[a:b], axis=0), rtol=1e-10, atol=1e-14)
    assert np.array_equal(env.y[:, :3], y) and env.output_names[3:] == ("c_power_13-30Hz", "a_power_13-30Hz")
