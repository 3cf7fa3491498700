"""Stimulation artifacts: detection on simulated sessions and on the demo (the measured 22 %), template subtraction
to a stated tolerance, interpolation, inputs never touched."""

from pathlib import Path

import numpy as np
import pytest

from stimsteer.sysid import Session, load_session
from stimsteer.sysid.artifacts import (detect_artifacts, interpolate_artifacts, stimulation_onsets,
                                       subtract_template)
from stimsteer.sysid.exceptions import SessionError

FS = 1000.0


def _session(seed, artifact_gain):
    """Noise plus a network-like response plus an artifact template scaled by the onset amplitude."""
    rng = np.random.default_rng(seed)
    n, m, p = 30000, 2, 3
    u = np.zeros((n, m))
    for j in range(m):
        k = np.sort(rng.choice(np.arange(20, n - 20, 13), 400, replace=False))
        u[k, j] = rng.uniform(10, 40, k.size) * rng.choice([-1, 1], k.size)
    y = np.zeros((n, p))
    for i in range(1, n):
        y[i] = 0.9 * y[i - 1] + 0.01 * (u[i - 1] @ np.ones((m, p)))  # a response one sample late
    y += rng.standard_normal((n, p))
    template = np.array([[1.0, 0.5, 0.2], [0.6, 0.3, 0.1], [0.3, 0.1, 0.05]])  # (lag, channel), per µA
    art = np.zeros((n, p))
    for j in range(m):
        for k in np.flatnonzero(u[:, j]):
            art[k:k + 3] += artifact_gain[j] * u[k, j] * template
    return Session(u=u, y=y + art, sample_rate_hz=FS, trials=[(0, n // 2), (n // 2, n)]), art


@pytest.fixture(scope="module")
def sessions():
    return _session(3, [1.0, 0.4]), _session(4, [0.0, 0.0])


def test_stimulation_onsets_either_polarity_not_polarity_switches():
    u = np.array([[0.0], [2.0], [-2.0], [0.0], [-1.0], [np.nan], [1.0]])
    assert np.flatnonzero(stimulation_onsets(u)[:, 0]).tolist() == [1, 4, 6]


def test_detection_flags_artifacts_and_leaves_clean_sessions_alone(sessions):
    (dirty, _), (clean, _) = sessions
    r = detect_artifacts(dirty)
    assert r.flagged == ("y0", "y1", "y2") and np.all(r.ratio > 5)
    c = detect_artifacts(clean)
    # without artifacts the onset-locked change power equals the pre-onset level (white noise: ratio 1 ± 0.15 over
    # ~800 onsets; the network's response arrives one sample later than the 1-sample window)
    assert c.flagged == () and np.all(np.abs(c.ratio - 1.0) < 0.15)
    assert "stimulation artifacts in 3 of 3" in r.warnings()[0] and c.warnings() == []


def test_template_subtraction_removes_the_artifact_to_a_stated_tolerance(sessions):
    (dirty, art), _ = sessions
    out = subtract_template(dirty, window_s=0.003)
    assert np.array_equal(out.u, dirty.u) and np.array_equal(out.mask, dirty.mask)  # inputs untouched
    clean = dirty.y - art
    resid = out.y - clean
    # what is left of the artifact: below 5 % of its RMS (the template is estimated from ~800 noisy onsets, so the
    # error is about noise / sqrt(n_onsets) per lag, plus the part of the response inside the 3 ms window)
    assert np.sqrt(np.mean(resid ** 2)) < 0.05 * np.sqrt(np.mean(art ** 2))
    assert detect_artifacts(out).flagged == ()
    templates = np.array(out.metadata["prep"][-1]["templates"])  # (lag, site, channel)
    assert templates[0, 0, 0] == pytest.approx(1.0, abs=0.05) and templates[0, 1, 0] == pytest.approx(0.4, abs=0.05)


def test_interpolation_replaces_the_window_by_a_line_and_keeps_inputs():
    u = np.zeros((20, 1))
    u[5, 0] = 1.0
    y = np.arange(20, dtype=float)[:, None] ** 2
    s = Session(u=u, y=y, sample_rate_hz=FS)
    out = interpolate_artifacts(s, window_s=0.003)
    # samples 5, 6, 7 on the line between y[4] = 16 and y[8] = 64
    assert out.y[5:8, 0].tolist() == [28.0, 40.0, 52.0] and np.array_equal(out.y[8:], s.y[8:])
    assert np.array_equal(out.u, s.u) and out.metadata["prep"][-1]["n_onsets"] == 1


def test_the_demo_artifacts_are_reported(tmp_path):
    # Measured before: the demo's artifacts are worth up to 22 % of a channel's stimulated noise-free power
    # (rec_02: artifact power / power of clean response + artifact = 0.223) while `inspect` said "No problems found".
    from stimsteer.demo_data import make_demo
    from stimsteer.demo_data.make_demo import build_plant, build_schedule

    plant, (u, trials) = build_plant(), build_schedule()
    decay = np.exp(-1.0 / (plant.artifact_decay_s * plant.sample_rate_hz))
    state, prev, art = np.zeros(u.shape[1]), np.zeros(u.shape[1]), np.empty((u.shape[0], plant.n_outputs))
    for k in range(u.shape[0]):  # the plant's artifact recursion (control/network_plant.py), alone
        state *= decay
        on = (u[k] != 0) & (prev == 0)
        state[on] += u[k][on]
        art[k], prev = plant.artifact_gain @ state, u[k]
    session = load_session(Path(make_demo.__file__).parent / make_demo.SESSION_FILE)
    share = (art ** 2).mean(axis=0) / (session.y ** 2).mean(axis=0)
    # the pulse-train demo (issue 16; 845 onsets): on every channel the artifacts carry more than twice the power of
    # the recorder's own noise, and over a tenth of the recorded power on the worst channel (0.106, rec_02)
    assert np.all((art ** 2).mean(axis=0) > 2 * np.asarray(plant.measurement_noise_std) ** 2)
    assert share.max() > 0.1
    report = detect_artifacts(session)
    assert set(report.flagged) == set(session.output_names)
    worst = session.output_names[int(np.argmax(share))]
    assert report.ratio[session.output_names.index(worst)] == report.ratio.max()


@pytest.mark.parametrize("call, pattern", [
    (lambda s: subtract_template(s, window_s=0.0), r"window_s must be a positive number of seconds"),
    (lambda s: subtract_template(s, window_s=0.002, scale="log"), r"scale must be 'amplitude' or 'none'"),
    (lambda s: interpolate_artifacts(s, window_s=0.002, inputs=["zz"]), r"inputs \['zz'\] are not input channels"),
    (lambda s: subtract_template(s.replace(u=np.zeros_like(s.u)), window_s=0.002), r"needs at least 2 stimulation"),
])
def test_artifact_errors(sessions, call, pattern):
    with pytest.raises(SessionError, match=pattern):
        call(sessions[0][0])


def test_detection_reads_a_lazy_file_in_chunks_with_the_same_numbers():
    from stimsteer.demo_data import make_demo
    from stimsteer.sysid.artifacts import _locked_sums
    from stimsteer.sysid.io import open_session_file

    path = Path(make_demo.__file__).parent / make_demo.SESSION_FILE
    whole = detect_artifacts(load_session(path))
    with open_session_file(path) as f:
        lazy = detect_artifacts(f)
        small, n_small = _locked_sums(f, [0, 1, 2], 0.0, whole.pre_samples, whole.window_samples, chunk_rows=97)
    assert np.array_equal(lazy.ratio, whole.ratio) and lazy.n_onsets == whole.n_onsets
    assert n_small == whole.n_onsets and np.allclose(small / n_small, whole.locked_power, rtol=1e-12)


def test_blanking_in_windows_equals_the_straight_line_over_each_whole_trial(monkeypatch):
    # Reference: the definition, applied over each whole trial at once (numpy.interp through the trial's valid,
    # unblanked outputs at its blanked ones; masked samples untouched). Blanking now runs in windows of _CHUNK
    # samples (bounded temporaries for convert); with 37-sample windows it must give the same outputs and mask.
    import stimsteer.sysid.artifacts as art

    rng = np.random.default_rng(3)
    n = 2000
    u = np.zeros((n, 2))
    u[rng.choice(n, 60, replace=False), 0] = 1.0
    u[rng.choice(n, 30, replace=False), 1] = -2.0
    u[500:700, 0] = 1.0  # a long train: one onset, a window longer than a chunk when wide
    y = rng.standard_normal((n, 3))
    mask = np.ones(n, dtype=bool)
    mask[900:960] = False
    y[900:960] = np.nan
    s = Session(u=u, y=y, sample_rate_hz=1000.0, mask=mask, trials=[(0, 800), (800, 1500), (1500, n)])
    whole = art.blank_artifacts(s, window_s=0.045)
    monkeypatch.setattr(art, "_CHUNK", 37)
    windowed = art.blank_artifacts(s, window_s=0.045)
    ref = np.array(y)
    for a, b in s.trials:
        idx = np.arange(a, b)
        good, fill = mask[a:b] & whole.output_mask[a:b], mask[a:b] & ~whole.output_mask[a:b]
        for j in range(3):
            ref[idx[fill], j] = np.interp(idx[fill], idx[good], y[idx[good], j])
    assert np.array_equal(windowed.output_mask, whole.output_mask)
    assert not whole.output_mask.all() and whole.output_mask[:500].sum() < 500
    assert np.allclose(windowed.y, ref, equal_nan=True, rtol=0, atol=1e-12)
    assert np.allclose(whole.y, ref, equal_nan=True, rtol=0, atol=1e-12)
    assert windowed.metadata["prep"][-1]["n_onsets"] == whole.metadata["prep"][-1]["n_onsets"]
