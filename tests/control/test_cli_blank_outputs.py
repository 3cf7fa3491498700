"""`stimsteer fit --blank-outputs-ms`: blanking from the command line hides outputs only (issue 17, item 4)."""

import sys
from pathlib import Path

import numpy as np
import pytest

from stimsteer.control.cli import main
from stimsteer.sysid import save_session
from stimsteer.sysid.io import load_session

sys.path.insert(0, str(Path(__file__).parents[1] / "sysid"))
from test_output_mask import _pulses  # noqa: E402  (the 130 Hz / 1 kHz pulse-train session)


@pytest.fixture(scope="module")
def pulse_file(tmp_path_factory):
    return save_session(_pulses(n=16000), tmp_path_factory.mktemp("blank") / "pulses.h5")


def test_fit_blanks_outputs_from_the_command_line(pulse_file, tmp_path, capsys):
    out = tmp_path / "m.h5"
    args = ["fit", str(pulse_file), "--route", "indirect", "--method", "arx", "--past-steps", "3", "--out", str(out)]
    assert main(args + ["--blank-outputs-ms", "2"]) == 0
    text = capsys.readouterr().out
    # 2 of every 7.7 samples (130 Hz at 1 kHz): 26 % of the outputs, the inputs kept
    assert "blanked outputs:" in text and "(26.0 % of the valid in-trial outputs)" in text and "inputs kept" in text
    assert out.exists()


@pytest.mark.parametrize("value", ["0", "-1", "nan"])
def test_fit_refuses_a_bad_blanking_window(pulse_file, tmp_path, capsys, value):
    out = tmp_path / "m.h5"
    assert main(["fit", str(pulse_file), "--route", "indirect", "--method", "arx", "--out", str(out),
                 "--blank-outputs-ms", value]) == 2
    assert "--blank-outputs-ms must be a positive number of milliseconds" in capsys.readouterr().err
    assert not out.exists()


def test_convert_blanks_outputs_and_the_file_keeps_them(tmp_path, capsys):
    pytest.importorskip("mne")
    import mne
    import numpy as np

    from stimsteer.sysid.io import load_session

    stim = np.zeros(4000)
    stim[::100] = 1.0  # 10 Hz pulses at 1 kHz
    rng = np.random.default_rng(3)
    raw = mne.io.RawArray(np.vstack([rng.standard_normal((1, 4000)) * 1e-5, stim[None]]),
                          mne.create_info(["LFP", "STIM"], 1000.0, ["seeg", "misc"]), verbose="error")
    fif = tmp_path / "r_raw.fif"
    raw.save(fif, verbose="error")
    desc = tmp_path / "d.toml"
    desc.write_text('[channels]\ninputs = ["STIM"]\noutputs = ["LFP"]\n')
    out = tmp_path / "s.h5"
    assert main(["convert", str(fif), "--description", str(desc), "--out", str(out), "--blank-outputs-ms", "3"]) == 0
    assert "blanked outputs: 120 sample(s)" in capsys.readouterr().out  # 40 onsets x 3 samples
    s = load_session(out)
    assert (~s.output_mask).sum() == 120 and s.mask.all() and s.u[::100, 0].tolist() == [1.0] * 40


def test_the_blanked_demo_is_no_longer_flagged_and_inspect_says_what_is_hidden(tmp_path, capsys):
    from stimsteer.demo_data import make_demo

    demo = Path(make_demo.__file__).parent / make_demo.SESSION_FILE
    desc = tmp_path / "d.toml"
    desc.write_text('[channels]\ninputs = ["stim_a", "stim_b", "stim_c"]\n'
                    'outputs = ["rec_01", "rec_02", "rec_03", "rec_04", "rec_05", "rec_06", "rec_07", "rec_08"]\n')
    out = tmp_path / "b.h5"
    assert main(["inspect", str(demo)]) == 0
    assert "<- artifact" in capsys.readouterr().out  # the demo's artifacts are flagged
    # expected counts from the inputs, by the documented rule: an onset is a sample where some site turns on from
    # zero; 8 ms at 250 Hz blanks 2 samples from each onset
    u = load_session(demo).u
    on = ((u > 0) & (np.vstack([np.zeros((1, u.shape[1])), u[:-1]]) == 0)).any(axis=1)
    onsets = np.flatnonzero(on)
    hidden = np.zeros(u.shape[0], bool)
    hidden[np.concatenate([onsets, onsets + 1])] = True
    trials = load_session(demo).trials
    inside = np.zeros(u.shape[0], bool)
    for a, b in trials:
        inside[a:b] = True
    n_hidden = int((hidden & inside).sum())
    assert main(["convert", str(demo), "--description", str(desc), "--out", str(out), "--blank-outputs-ms", "8"]) == 0
    assert f"after {onsets.size} stimulation onset(s); inputs kept" in capsys.readouterr().out
    assert main(["inspect", str(out)]) == 0
    text = capsys.readouterr().out
    share = 100 * n_hidden / inside.sum()
    assert f"blanked outputs: {n_hidden} in-trial sample(s) ({share:.1f} %)" in text and "<- artifact" not in text
    assert "stimulation artifacts in" not in text
