"""`stimsteer inspect` reports stimulation artifacts (per channel, with a figure) and clock alignment."""

from pathlib import Path

import numpy as np
import pytest

from stimsteer.control.cli import main
from stimsteer.demo_data import make_demo
from stimsteer.sysid import Session, save_session
from stimsteer.sysid.artifacts import detect_artifacts, subtract_template
from stimsteer.sysid.io import load_session

DEMO = Path(make_demo.__file__).parent / make_demo.SESSION_FILE


def test_the_demo_artifacts_are_no_longer_no_problems_found(tmp_path, capsys):
    fig = tmp_path / "artifacts.png"
    assert main(["inspect", str(DEMO), "--artifact-figure", str(fig)]) == 0
    out = capsys.readouterr().out
    assert "No problems found." not in out  # before: "No problems found." despite artifacts up to 22 % of power
    assert "stimulation artifacts in 8 of 8 output channel(s)" in out
    report = detect_artifacts(load_session(DEMO))  # the worst channel, as the detector measures it
    worst = int(np.argmax(report.ratio))
    assert f"{report.channels[worst]}: {report.ratio[worst]:.2f}x  <- artifact" in out
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert main(["inspect", str(DEMO), "--artifact-figure", str(fig)]) == 2  # kept without --force
    assert "already exists" in capsys.readouterr().err


def test_after_template_subtraction_inspect_finds_no_problem(tmp_path, capsys):
    cleaned = subtract_template(load_session(DEMO), window_s=0.012)
    path = save_session(cleaned, tmp_path / "clean.h5")
    assert main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    assert "No problems found." in out and "<- artifact" not in out


def test_inspect_reports_the_clock_alignment_of_a_converted_session(tmp_path, capsys):
    pytest.importorskip("mne")
    import mne

    rng = np.random.default_rng(5)
    raw = mne.io.RawArray(np.vstack([rng.standard_normal((1, 4000)) * 1e-5, np.zeros((1, 4000))]),
                          mne.create_info(["LFP", "STIM"], 1000.0, ["seeg", "misc"]), verbose="error")
    fif = tmp_path / "r_raw.fif"
    raw.save(fif, verbose="error")
    desc = tmp_path / "d.toml"
    desc.write_text('[channels]\ninputs = ["STIM"]\noutputs = ["LFP"]\n[grid]\nsample_rate_hz = 500.0\n')
    out = tmp_path / "s.h5"
    assert main(["convert", str(fif), "--description", str(desc), "--out", str(out)]) == 0
    capsys.readouterr()
    assert main(["inspect", str(out)]) == 0
    text = capsys.readouterr().out
    assert "clock alignment (model grid):" in text
    assert "LFP: 1000 Hz -> 500 Hz, clock offset 0 s, scipy.signal.resample_poly" in text


@pytest.mark.parametrize("args, pattern", [
    (["--artifact-window-s", "0"], "--artifact-window-s must be a positive number"),
    (["--artifact-figure", "a.pdf"], "--artifact-figure must name a .png file"),
    (["--artifact-ratio", "-1"], "--artifact-ratio must be positive"),
])
def test_inspect_artifact_option_errors(args, pattern, capsys):
    assert main(["inspect", str(DEMO), *args]) == 2
    err = capsys.readouterr().err
    assert pattern in err and err.count("\n") == 1


def test_a_session_without_stimulation_onsets_says_so(tmp_path, capsys):
    s = Session(u=np.zeros((100, 1)), y=np.random.default_rng(0).standard_normal((100, 1)), sample_rate_hz=100.0)
    path = save_session(s, tmp_path / "s.h5")
    assert main(["inspect", str(path)]) == 0
    assert "artifacts: no stimulation onset" in capsys.readouterr().out


@pytest.mark.parametrize("method", ["template", "interpolate", "blank"])
def test_convert_applies_each_artifact_method_to_a_session_file(tmp_path, capsys, method):
    desc = tmp_path / "d.toml"
    desc.write_text('[channels]\ninputs = ["stim_a", "stim_b", "stim_c"]\n'
                    'outputs = ["rec_01", "rec_02", "rec_03", "rec_04", "rec_05", "rec_06", "rec_07", "rec_08"]\n'
                    f'[artifacts]\nmethod = "{method}"\nwindow_s = 0.012\n')
    out = tmp_path / "clean.h5"
    assert main(["convert", str(DEMO), "--description", str(desc), "--out", str(out)]) == 0
    before, after = load_session(DEMO), load_session(out)
    assert np.array_equal(after.u, before.u) and np.array_equal(after.trials, before.trials)  # inputs untouched
    if method == "blank":
        # outputs only: the samples stay valid, the blanked outputs are bridged, the others untouched
        kept = after.output_mask
        assert after.mask.all() and (~kept).sum() > 0 and np.array_equal(after.y[kept], before.y[kept])
    else:
        assert after.mask.all() and not np.array_equal(after.y, before.y)
    capsys.readouterr()
    assert main(["inspect", str(out)]) == 0
    if method == "template":
        assert "No problems found." in capsys.readouterr().out
