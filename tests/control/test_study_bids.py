"""A study of an iEEG-BIDS dataset written by mne-bids itself (issue 21, item 1; issue 17, BIDS): every recording
with stimulation columns in events.tsv becomes a session, subject and session from the BIDS entities."""

import warnings

import numpy as np
import pandas as pd
import pytest

mne = pytest.importorskip("mne")
mne_bids = pytest.importorskip("mne_bids")

from stimsteer.control.cli import main
from stimsteer.control.study import describe_study
from stimsteer.sysid.exceptions import SessionError
from stimsteer.control.study.bids import convert_bids_dataset
from stimsteer.sysid.io import load_session

pytestmark = pytest.mark.slow

FS = 250.0
DESC = {"channels": {"outputs": ["LA1"], "output_unit": "uV"},
        "pulses": {"from_recording": True, "unit": "A"},
        "trials": {"pulse_trains_gap_s": 0.5, "before_s": 0.2, "after_s": 1.4}}


def _write(root, subject, session, seed):
    # six 1 s trains of 20 Hz pulses of random current, 2 s apart; the contact responds as a damped oscillator
    rng = np.random.default_rng(seed)
    n = int(14 * FS)
    times = np.concatenate([t0 + np.arange(20) / 20.0 for t0 in 1.0 + 2.0 * np.arange(6)])
    amps = rng.uniform(1e-3, 3e-3, times.size)
    u = np.zeros(n)
    u[np.round(times * FS).astype(int)] = amps
    y = np.zeros(n)
    for k in range(2, n):
        y[k] = 1.5 * y[k - 1] - 0.7 * y[k - 2] + 0.02 * u[k - 1]
    y = y + 2e-6 * rng.standard_normal(n)
    raw = mne.io.RawArray(y[None], mne.create_info(["LA1"], FS, "seeg"), verbose="error")
    raw.set_meas_date(None)
    samples = np.round(times * FS).astype(int)
    events = np.column_stack([samples, np.zeros_like(samples), np.ones_like(samples)])
    meta = pd.DataFrame({"electrical_stimulation_site": ["LA1-LA2"] * samples.size,
                         "electrical_stimulation_current": amps})
    bp = mne_bids.BIDSPath(subject=subject, session=session, task="stim", run="1", datatype="ieeg", root=root)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        mne_bids.write_raw_bids(raw, bp, events=events, event_id={"pulse": 1}, event_metadata=meta,
                                extra_columns_descriptions={"electrical_stimulation_site": "contact pair",
                                                            "electrical_stimulation_current": "pulse current"},
                                format="BrainVision", allow_preload=True, verbose="error")
    return u


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    root = tmp_path_factory.mktemp("bids_study")
    inputs = {(s, d): _write(root, s, d, seed=10 * i + j) for i, s in enumerate(("01", "02"))
              for j, d in enumerate(("1", "2"))}
    return root, inputs


def test_bids_recordings_become_session_files_and_are_reused(dataset, tmp_path):
    root, inputs = dataset
    rows = convert_bids_dataset(root, description=DESC, out_dir=tmp_path / "conv")
    assert [(r["subject"], r["session"], r["condition"]) for r in rows] == [
        ("01", "1", "stim"), ("01", "2", "stim"), ("02", "1", "stim"), ("02", "2", "stim")]
    s = load_session(rows[0]["file"])
    assert s.input_names == ("LA1-LA2",) and s.n_trials == 6
    assert np.allclose(s.u[:, 0], inputs[("01", "1")], rtol=1e-12)  # the pulse currents of events.tsv, in A
    stamp = [r["file"].stat().st_mtime_ns for r in rows]
    again = convert_bids_dataset(root, description=DESC, out_dir=tmp_path / "conv")  # nothing converted again
    assert [r["file"].stat().st_mtime_ns for r in again] == stamp
    assert sorted(p.name for p in root.rglob("*.h5")) == []  # nothing written into the dataset


def test_a_study_of_a_bids_dataset_runs_from_the_command_line(dataset, tmp_path, capsys):
    root, _ = dataset
    desc = tmp_path / "desc.toml"
    desc.write_text('[channels]\noutputs = ["LA1"]\noutput_unit = "uV"\n[pulses]\nfrom_recording = true\n'
                    'unit = "A"\n[trials]\npulse_trains_gap_s = 0.5\nbefore_s = 0.2\nafter_s = 1.4\n')
    out = tmp_path / "out"
    assert main(["study", str(root), "--out", str(out), "--description", str(desc), "--quick", "--workers", "1",
                 "--past-steps", "4", "--horizon-steps", "4", "--analyses", "sessions,days", "--no-progress",
                 "--methods", "indirect/arx,direct/lsq"]) == 0
    table = pd.read_csv(out / "tables" / "sessions.csv", dtype=str)
    assert sorted(zip(table["subject"], table["session"])) == [("01", "1"), ("01", "2"), ("02", "1"), ("02", "2")]
    tasks = pd.read_csv(out / "tables" / "tasks.csv")
    assert (tasks["status"] == "ok").all() and set(tasks["analysis"]) == {"sessions", "days"}
    assert (tasks.loc[tasks["analysis"] == "sessions", "r2_mean"] > 0.5).all()
    assert len(list((tmp_path / "out.sessions").glob("*.h5"))) == 4


def test_a_bids_study_without_a_description_or_events_is_refused(dataset, tmp_path):
    root, _ = dataset
    with pytest.raises(SessionError, match=r"needs a description of how its recordings become sessions"):
        describe_study(root)
    bare = tmp_path / "bare"
    (bare / "sub-01" / "ses-1" / "ieeg").mkdir(parents=True)
    (bare / "dataset_description.json").write_text('{"Name": "x", "BIDSVersion": "1.8.0"}')
    with pytest.raises(SessionError, match=r"no stimulation information"):
        describe_study(bare, description=DESC, convert_dir=tmp_path / "c")
