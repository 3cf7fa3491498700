"""An iEEG-BIDS dataset written by mne-bids itself, with the electrical-stimulation columns in events.tsv, read
back as a session whose inputs are the pulses of events.tsv."""

import warnings

import numpy as np
import pandas as pd
import pytest

mne = pytest.importorskip("mne")
mne_bids = pytest.importorskip("mne_bids")

from stimsteer.control.cli import main
from stimsteer.sysid import load_session
from stimsteer.sysid.description import parse_description
from stimsteer.sysid.exceptions import FileFormatError
from stimsteer.sysid.from_recording import build_session, read_recording
from stimsteer.sysid.io.detect import detect_recording

FS = 1000.0


@pytest.fixture(scope="module")
def bids_root(tmp_path_factory):
    rng = np.random.default_rng(20261201)
    data = rng.standard_normal((2, 5000)) * 30e-6
    raw = mne.io.RawArray(data, mne.create_info(["LA1", "LA2"], FS, "seeg"), verbose="error")
    raw.set_meas_date(None)
    onsets = np.array([1000, 1500, 3000])  # samples
    events = np.column_stack([onsets, np.zeros(3, int), np.ones(3, int)])
    meta = pd.DataFrame({"electrical_stimulation_site": ["LA1-LA2", "LA1-LA2", "LA1-LA2"],
                         "electrical_stimulation_current": [0.002, 0.003, 0.0025]})
    root = tmp_path_factory.mktemp("bids")
    bp = mne_bids.BIDSPath(subject="01", session="1", task="stim", run="1", datatype="ieeg", root=root)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mne_bids.write_raw_bids(raw, bp, events=events, event_id={"stim": 1}, event_metadata=meta,
                                extra_columns_descriptions={
                                    "electrical_stimulation_site": "stimulated contact pair",
                                    "electrical_stimulation_current": "pulse amplitude"},
                                format="BrainVision", allow_preload=True, verbose="error")
    return root, data


DESC = {"recording": {"bids": {"subject": "01", "session": "1", "task": "stim", "run": "1"}},
        "channels": {"outputs": ["LA1", "LA2"], "output_unit": "uV"},
        "pulses": {"from_recording": True, "unit": "A"},
        "trials": {"pulse_trains_gap_s": 0.1, "before_s": 0.2, "after_s": 0.8}}  # trials from the pulse table


def test_bids_dataset_with_stimulation_columns(bids_root):
    root, data = bids_root
    assert detect_recording(root) == "bids"
    desc = parse_description(DESC)
    rec = read_recording(root, desc)
    assert [(p["time_s"], p["site"], p["amplitude"]) for p in rec.pulses] == [
        (1.0, "LA1-LA2", 0.002), (1.5, "LA1-LA2", 0.003), (3.0, "LA1-LA2", 0.0025)]
    s = build_session(rec, desc)
    assert s.input_names == ("LA1-LA2",) and s.input_units == ("A",)
    assert np.flatnonzero(s.u[:, 0]).tolist() == [1000, 1500, 3000]
    assert s.u[[1000, 1500, 3000], 0].tolist() == [0.002, 0.003, 0.0025]
    assert s.metadata["pulse_mapping"]["name"] == "onset-amplitude"
    assert s.trials.tolist() == [[800, 2300], [2800, 3800]]  # the windows of 1.0 and 1.5 s overlap: merged
    assert s.metadata["trials_from_events"]["overlapping_s"] == [[1.0, 1.5]]
    tol = np.abs(data).max() * 1e6 * np.finfo(np.float32).eps  # BrainVision float32 (pybv)
    assert np.max(np.abs(s.y - data.T * 1e6)) <= tol


def test_bids_entities_that_match_nothing_list_what_the_dataset_has(bids_root, tmp_path, capsys):
    root, _ = bids_root
    desc = tmp_path / "d.toml"
    desc.write_text('[recording]\nbids = {subject = "02", task = "stim"}\n[channels]\noutputs = ["LA1"]\n'
                    '[pulses]\nfrom_recording = true\n')
    assert main(["convert", str(root), "--description", str(desc), "--out", str(tmp_path / "s.h5")]) == 2
    err = capsys.readouterr().err
    assert "no ieeg recording for subject='02'" in err and "sub-01_ses-1_task-stim_run-1_ieeg" in err
    assert not (tmp_path / "s.h5").exists()
    with pytest.raises(FileFormatError, match=r"is a folder"):
        load_session(root)


def test_a_non_numeric_current_names_its_data_row_counted_from_1(bids_root, tmp_path, capsys):
    """A typo in a stimulation current of events.tsv: one line naming the column and the data row as a person counts
    it in a spreadsheet (from 1 after the header, as the table reader's messages do), exit code 2, no output file."""
    import shutil

    root = tmp_path / "bids"
    shutil.copytree(bids_root[0], root)
    events = next(root.rglob("*_events.tsv"))
    lines = events.read_text(encoding="utf-8").splitlines()
    header = lines[0].split("\t")
    col = header.index("electrical_stimulation_current")
    cells = lines[2].split("\t")  # the second data row
    cells[col] = "0..003"
    lines[2] = "\t".join(cells)
    events.write_text("\n".join(lines) + "\n", encoding="utf-8")
    desc = tmp_path / "d.toml"
    desc.write_text('[recording]\nbids = {subject = "01", session = "1", task = "stim", run = "1"}\n'
                    '[channels]\noutputs = ["LA1", "LA2"]\noutput_unit = "uV"\n'
                    '[pulses]\nfrom_recording = true\nunit = "A"\n', encoding="utf-8")
    out = tmp_path / "s.h5"
    assert main(["convert", str(root), "--description", str(desc), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "electrical_stimulation_current" in err and "data rows [2], counted from 1 after the header" in err
    assert not out.exists()
