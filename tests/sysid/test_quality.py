"""Tests of stimsteer.sysid.quality: the session summary and its warnings."""

import json
import re

import numpy as np
import pytest

from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.quality import SessionSummary, describe_session
from stimsteer.sysid.session import Session


def _session(rng, n=1000):
    """Invented: 2 stimulation sites, 3 outputs; output 'clip' is clipped at +1 mV, 'dead' is flat at 0."""
    u = rng.standard_normal((n, 2))
    y = rng.standard_normal((n, 3))
    y[:, 1] = np.minimum(y[:, 1], 1.0)  # P(N(0,1) > 1) = 15.9 % of samples end at the maximum (normal table)
    y[:, 2] = 0.0
    mask = np.ones(n, dtype=bool)
    mask[100:110] = False  # a 10-sample gap in trial 0
    mask[700:705] = False  # a 5-sample gap in trial 1
    mask[450:500] = False  # between trials: not a gap
    return Session(u=u, y=y, sample_rate_hz=500.0, trials=[(0, 400), (500, 900), (900, 1000)], mask=mask,
                   input_names=["site_a", "site_b"], input_units=["uA", "uA"],
                   output_names=["lfp", "clip", "dead"], output_units=["mV", "mV", "mV"])


def test_summary_counts_trials_gaps_and_bad_channels(rng):
    s = _session(rng)
    q = describe_session(s)
    assert isinstance(q, SessionSummary)
    assert (q.n_samples, q.sample_rate_hz, q.duration_s) == (1000, 500.0, 2.0)
    assert q.input_units == ("uA", "uA") and q.output_names == ("lfp", "clip", "dead")
    assert (q.n_trials, q.trial_samples_min, q.trial_samples_median, q.trial_samples_max) == (3, 100, 400.0, 400)
    assert q.trial_seconds == (0.2, 0.8, 0.8)
    assert q.n_samples_outside_trials == 100
    assert q.masked_fraction == pytest.approx(15 / 900)
    assert q.n_gaps == 2 and q.longest_gap_s == pytest.approx(10 / 500.0)
    assert q.flat_channels == ("dead",)
    names = [n for n, _ in q.saturated_channels]
    assert names == ["clip"]
    frac = dict(q.saturated_channels)["clip"]
    assert 0.10 < frac < 0.22  # 15.9 % expected; binomial sd over 885 samples is 1.2 %
    assert any("'dead' is flat" in w and "drop it" in w for w in q.warnings)
    assert any("'clip' sits at its maximum (1 mV)" in w and "re-record" in w for w in q.warnings)
    assert q.notes == []


def test_continuous_and_stimulation_channels_are_not_flagged(rng):
    n = 2000
    u = np.zeros((n, 1))
    u[::50] = 80.0  # a pulse train sits at its minimum most of the time: by design, not clipping
    s = Session(u=u, y=rng.standard_normal((n, 2)), sample_rate_hz=1000.0, trials=[(0, 1000), (1000, 2000)])
    q = describe_session(s)
    assert q.warnings == () and q.flat_channels == () and q.saturated_channels == ()
    assert q.n_gaps == 0 and q.longest_gap_s == 0.0
    assert "No problems found." in q.to_text()


def test_masked_fraction_single_trial_and_empty_warnings(rng):
    mask = np.ones(100, dtype=bool)
    mask[:30] = False
    s = Session(u=rng.standard_normal((100, 1)), y=rng.standard_normal((100, 1)), sample_rate_hz=10.0, mask=mask)
    q = describe_session(s)
    assert any(w.startswith("30.0% of in-trial samples are masked") for w in q.warnings)
    assert any(w.startswith("only 1 trial: no held-out split") for w in q.warnings)
    q = describe_session(s.replace(mask=np.zeros(100, dtype=bool)))
    assert q.warnings[0].startswith("no valid samples inside trials")


def test_text_and_dict_forms(rng):
    q = describe_session(_session(rng))
    text = q.to_text()
    assert "Session: 1000 samples at 500 Hz = 2.000 s" in text
    assert "inputs (2): site_a [uA], site_b [uA]" in text
    assert "trials: 3; length min 100 / median 400 / max 400 samples (0.200 / 0.800 / 0.800 s)" in text
    assert "masked: 1.7% of in-trial samples; gaps: 2, longest 0.020 s" in text
    assert "flat channels: dead" in text and "Warnings:" in text
    d = q.to_dict()
    assert json.loads(json.dumps(d)) == d
    assert d["flat_channels"] == ["dead"] and d["trial_seconds_max"] == 0.8
    q.notes.append("inputs excite order 12")  # room for later checks
    assert "Notes:\n  - inputs excite order 12" in q.to_text()


def test_describe_errors(rng):
    with pytest.raises(SessionError, match=r"describe_session needs a Session or an opened session file .*got str"):
        describe_session("session.h5")
    with pytest.raises(SessionError, match=r"saturation_fraction must be in \(0, 1\]; got 0"):
        describe_session(_session(rng), saturation_fraction=0)
    with pytest.raises(SessionError, match=r"masked_warning_fraction must be in \(0, 1\]; got 2"):
        describe_session(_session(rng), masked_warning_fraction=2)


def _gap_lengths(mask, trials):
    """Masked runs inside each trial, counted the obvious way (one sample at a time)."""
    out = []
    for a, b in trials:
        run = 0
        for v in mask[a:b]:
            if not v:
                run += 1
            elif run:
                out.append(run)
                run = 0
        if run:
            out.append(run)
    return out


@pytest.mark.parametrize("chunk", [1, 7, 10, 64, 65536])
def test_a_lazily_opened_file_is_described_like_the_session_whatever_the_chunks(rng, tmp_path, chunk):
    from stimsteer.sysid.io import open_session_file, save_session

    s = _session(rng)
    mask = s.mask.copy()
    mask[0:3] = False      # a gap at a trial's start
    mask[395:400] = False  # and at its end
    mask[760:790] = False  # longer than several chunks
    y = s.y.copy()
    y[~mask] = np.nan      # masked samples may hold NaN; they must not count
    s = s.replace(mask=mask, y=y)
    expected = _gap_lengths(mask, s.trials)
    with open_session_file(save_session(s, tmp_path / "s.h5")) as f:
        q = describe_session(f, chunk_samples=chunk)
    ref = describe_session(s)
    assert q.to_dict() == ref.to_dict()
    assert q.n_gaps == len(expected) == 5 and q.longest_gap_s == pytest.approx(max(expected) / 500.0)
    assert q.masked_fraction == pytest.approx((~mask[:400]).sum() / 900 + (~mask[500:1000]).sum() / 900)
    assert q.flat_channels == ("dead",) and [n for n, _ in q.saturated_channels] == ["clip"]


def test_an_output_on_a_baseline_offset_is_reported_with_what_to_do(rng):
    n = 1000
    y = rng.standard_normal((n, 2))
    y[:, 1] += 3.0  # mean² / mean square = 9 / 10 (hand-derived, unit-variance noise)
    u = rng.standard_normal((n, 1))
    u[:100] = 0.0
    u[500:600] = 0.0  # a pre-stimulation baseline of 100 samples in each trial carries the offset
    s = Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, 500), (500, 1000)],
                output_names=["lfp", "eeg"], output_units=["mV", "uV"])
    q = describe_session(s)
    ((name, mean, share),) = q.offset_channels
    assert name == "eeg" and mean == pytest.approx(y[:, 1].mean(), rel=1e-12)
    assert share == pytest.approx(y[:, 1].mean() ** 2 / np.mean(y[:, 1] ** 2), rel=1e-12) and 0.85 < share < 0.95
    base = np.concatenate([y[:100, 1], y[500:600, 1]]).mean()
    assert any(w.startswith(f"output 'eeg' rests on an offset before any stimulation (baseline mean {base:.4g} uV "
                            "over 200 pre-stimulation samples") and "--centre-outputs" in w for w in q.warnings)
    assert f"  output offsets: eeg (mean {mean:.4g} uV, {100 * share:.0f}% of its mean square)" in q.to_text()
    assert "  output offsets: none" in describe_session(s.replace(y=y - y.mean(0))).to_text()


def test_an_offset_that_comes_with_one_signed_stimulation_is_not_advised_to_be_centred(rng):
    # A first-order system at rest at zero driven by positive pulses: its mean is response, not offset.
    n = 2000
    u = np.where(rng.random((n, 1)) < 0.5, 2.0, 0.0)
    u[:50] = u[1000:1050] = 0.0  # a quiet pre-stimulation baseline at rest (zero output)
    y = np.zeros((n, 1))
    for k in range(1, n):
        y[k] = 0.8 * y[k - 1] + u[k - 1] + 0.01 * rng.standard_normal()
    y[:50] = y[1000:1050] = 0.01 * rng.standard_normal((50, 1))
    s = Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, 1000), (1000, 2000)])
    q = describe_session(s)
    assert [c[0] for c in q.offset_channels] == ["y0"]
    assert not any("--centre-outputs" in w for w in q.warnings)
    assert any("the mean comes with the stimulation" in n_ and "centring is not advised" in n_ for n_ in q.notes)
    no_base = describe_session(s.replace(u=np.where(u == 0, 2.0, u)))
    assert any("no pre-stimulation baseline" in n_ for n_ in no_base.notes)


@pytest.mark.parametrize("value", [1e200, 1e300, -1e150])
def test_values_beyond_the_representable_range_are_refused_with_the_figure(rng, value):
    # float64 holds up to 1.8e308, so squares of 1e155 and more overflow (IEEE 754-2008); issue 12 measured an
    # internal LinAlgError in fit and "No problems found" from inspect at 1e200-1e300.
    from stimsteer.sysid import fit_route
    from stimsteer.sysid.quality import check_representable

    y = rng.standard_normal((400, 1))
    y[10] = value
    s = Session(u=rng.standard_normal((400, 1)), y=y, sample_rate_hz=100.0, trials=[(0, 200), (200, 400)],
                output_units=["uV"])
    text = re.escape(f"output 'y0' reaches {abs(value):.3g} uV, beyond the largest magnitude")
    with pytest.raises(SessionError, match=text + ".*Rescale the channel"):
        describe_session(s)
    with pytest.raises(SessionError, match=text):
        check_representable(s)
    with pytest.raises(SessionError, match=text):
        fit_route(s, route="indirect", method="arx")
    check_representable(s.replace(y=y / abs(value) * 1e12))  # 1e12 is fine


def test_offsets_that_come_with_the_stimulation_are_one_note_naming_every_output():
    # found on the one-signed pulse-train demo: six outputs gave six identical notes "centring is not advised"
    rng = np.random.default_rng(5)
    n = 2000
    u = np.where(rng.random((n, 1)) < 0.5, 2.0, 0.0)
    u[:50] = u[1000:1050] = 0.0
    y = np.zeros((n, 3))
    for k in range(1, n):
        y[k] = 0.8 * y[k - 1] + np.array([1.0, -2.0, 0.5]) * u[k - 1, 0] + 0.01 * rng.standard_normal(3)
    y[:50] = y[1000:1050] = 0.01 * rng.standard_normal((50, 3))
    q = describe_session(Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, 1000), (1000, 2000)]))
    assert [c[0] for c in q.offset_channels] == ["y0", "y1", "y2"]
    offset_notes = [n_ for n_ in q.notes if "centring is not advised" in n_]
    assert len(offset_notes) == 1 and all(f"'y{j}' (mean" in offset_notes[0] for j in range(3))
    assert offset_notes[0].startswith("outputs 'y0'")
