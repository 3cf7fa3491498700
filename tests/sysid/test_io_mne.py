"""Recordings written by MNE's own writers (EDF through edfio, BrainVision through pybv, FIF) read back through
stimsteer: values, units, annotations, bad intervals, trials from events; nothing downloaded."""

import hashlib
import re
import warnings

import numpy as np
import pytest

mne = pytest.importorskip("mne")

from stimsteer.control.cli import main
from stimsteer.sysid import load_session
from stimsteer.sysid.description import parse_description
from stimsteer.sysid.exceptions import FileFormatError, SessionError
from stimsteer.sysid import Session
from stimsteer.sysid.from_recording import build_session, read_recording, session_from_mne
from stimsteer.sysid.io.detect import detect_recording
from stimsteer.sysid.io.mne import read_mne_file

FS = 1000.0
N = 6000


@pytest.fixture(scope="module")
def raw():
    rng = np.random.default_rng(20261201)
    data = np.zeros((4, N))
    data[:2] = rng.standard_normal((2, N)) * 40e-6  # two sEEG contacts, volts
    data[2, 1000:1003] = 1.0  # a trigger channel: three pulses of 1 (a.u.)
    data[2, 3000:3003] = 1.0
    data[2, 5500:5503] = 1.0
    data[3, ::130] = 2e-3  # a stimulation monitor, one sample every 130 ms
    info = mne.create_info(["LFP1", "LFP2", "TRIG", "STIM"], FS, ["seeg", "seeg", "misc", "misc"])
    r = mne.io.RawArray(data, info, verbose="error")
    r.set_annotations(mne.Annotations([1.0, 3.0, 5.5], [0.0, 0.0, 0.0], ["stim_on", "stim_on", "stim_on"]))
    r.annotations.append(4.2, 0.3, "BAD_movement")
    return r


@pytest.fixture(scope="module")
def files(raw, tmp_path_factory):
    d = tmp_path_factory.mktemp("mne")
    out = {}
    for name in ("rec.edf", "rec.vhdr", "rec_raw.fif"):
        path = d / name
        if name.endswith(".fif"):
            raw.save(path, verbose="error")
        else:
            with warnings.catch_warnings():  # pybv warns that BrainVision stores non-voltage channels as they are
                warnings.simplefilter("ignore", UserWarning)
                mne.export.export_raw(path, raw, verbose="error")  # MNE's own writers (edfio, pybv)
        out[name.split(".")[-1]] = path
    return out


DESC = {"channels": {"inputs": ["STIM"], "outputs": ["LFP1", "LFP2"], "output_unit": "uV"},
        "trials": {"events": ["stim_on"], "before_s": 0.5, "after_s": 1.0}}


@pytest.mark.parametrize("kind, expected", [("edf", "edf"), ("vhdr", "brainvision"), ("fif", "fif")])
def test_files_are_recognised_by_content_whatever_their_name(files, kind, expected, tmp_path):
    assert detect_recording(files[kind]) == expected
    if kind != "vhdr":  # a BrainVision header names its data file, so it cannot be renamed alone
        renamed = tmp_path / "no_suffix"
        renamed.write_bytes(files[kind].read_bytes())
        assert detect_recording(renamed) == expected


@pytest.mark.parametrize("kind", ["edf", "vhdr", "fif"])
def test_values_and_units_read_back_exactly(raw, files, kind):
    rec = read_mne_file(files[kind], {"edf": "edf", "vhdr": "brainvision", "fif": "fif"}[kind])
    ref = raw.get_data()
    for j, name in enumerate(["LFP1", "LFP2"]):
        ch = rec.channel(name)
        assert ch.unit == "V" and ch.sample_rate_hz == FS and ch.data.shape == (N,)
        x = ref[j]
        if kind == "edf":  # one step of the 16-bit range (Kemp et al. 1992, "A simple format for exchange of
            # digitized polygraphic recordings": integers between the channel's physical minimum and maximum)
            tol = (x.max() - x.min()) / 65535
        elif kind == "vhdr":  # pybv stores float32 microvolts (BrainVision core data format, float32 option)
            tol = np.abs(x).max() * np.finfo(np.float32).eps
        else:  # FIF keeps float32 by default
            tol = np.abs(x).max() * np.finfo(np.float32).eps
        assert np.max(np.abs(ch.data - x)) <= tol
    assert [e["time_s"] for e in rec.events] == pytest.approx([1.0, 3.0, 5.5], abs=1e-9)
    assert rec.bad_intervals == [pytest.approx((4.2, 4.5), abs=1e-6)]  # FIF keeps durations as float32


@pytest.mark.parametrize("kind", ["edf", "vhdr"])
def test_a_session_from_a_file_has_trials_from_annotations_and_the_bad_interval_masked(raw, files, kind):
    desc = parse_description(DESC)
    s = build_session(read_recording(files[kind], desc), desc)
    assert s.output_units == ("uV", "uV") and s.input_names == ("STIM",)
    # annotations at 1.0, 3.0, 5.5 s with the window [-0.5, +1.0) s: the last one reaches past 6.0 s and is dropped
    assert s.trials.tolist() == [[500, 2000], [2500, 4000]]
    assert s.metadata["trials_from_events"]["out_of_range_s"] == pytest.approx([5.5])
    assert np.flatnonzero(~s.mask).tolist() == list(range(4200, 4500))
    tol = 1e6 * np.abs(raw.get_data()[0]).max() * 2e-4
    assert np.max(np.abs(s.y[:, 0] - 1e6 * raw.get_data()[0])) < tol  # volts to microvolts by quantities


def test_trials_from_a_trigger_channel_with_a_threshold(raw):
    desc = {"channels": {"inputs": ["STIM"], "outputs": ["LFP1"]},
            "trials": {"trigger": "TRIG", "threshold": 0.5, "before_s": 0.2, "after_s": 0.3}}
    s = session_from_mne(raw, desc)
    assert s.trials.tolist() == [[800, 1300], [2800, 3300], [5300, 5800]]


def test_the_python_api_on_a_raw_object_equals_the_file_route(raw, files):
    desc = parse_description(DESC)
    a = session_from_mne(raw, desc)
    b = build_session(read_recording(files["fif"], desc), desc)
    assert np.allclose(a.y, b.y, rtol=1e-6, atol=1e-6) and a.trials.tolist() == b.trials.tolist()
    c = Session.from_mne(raw, DESC)  # the classmethod is the same call
    assert np.array_equal(c.y, a.y) and np.array_equal(c.u, a.u) and c.trials.tolist() == a.trials.tolist()


def test_convert_command_writes_a_session_and_leaves_the_source_alone(files, tmp_path, capsys):
    desc = tmp_path / "d.toml"
    desc.write_text('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1", "LFP2"]\n'
                    '[trials]\nevents = ["stim_on"]\nbefore_s = 0.5\nafter_s = 1.0\n')
    before = hashlib.sha256(files["edf"].read_bytes()).hexdigest()
    out = tmp_path / "s.h5"
    assert main(["convert", str(files["edf"]), "--description", str(desc), "--out", str(out)]) == 0
    s = load_session(out)
    assert s.n_trials == 2 and s.output_names == ("LFP1", "LFP2")
    assert "1 window(s) outside the recording dropped" in capsys.readouterr().out
    assert hashlib.sha256(files["edf"].read_bytes()).hexdigest() == before
    with pytest.raises(FileFormatError, match=r"EDF recording, not a session.*stimsteer convert"):
        load_session(files["edf"])


@pytest.mark.parametrize("toml, pattern", [
    ('[channels]\ninputs = ["STIM"]\noutputs = ["LFP9"]\n', r"no channel 'LFP9'; it has \['LFP1', 'LFP2', 'TRIG'"),
    ('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1"]\n[trials]\nevents = ["nope"]\nbefore_s = 0.1\nafter_s = 0.1\n',
     r"no event matches the labels \['nope'\]; the recording has \['stim_on'\]"),
    ('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1"]\n[trials]\nevents = ["stim_on"]\nbefore_s = 9\nafter_s = 1\n',
     r"every trial window falls outside the recording"),
    ('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1"]\noutput_unit = "uA"\n',
     r"'LFP1' is in 'V', which cannot be converted to 'uA'"),
    ('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1"]\n[grid]\nclock_offset_s = {STIM = 100.0}\n',
     r"clocks of 'STIM' and the model grid do not overlap"),
    ('[channels]\noutputs = ["LFP1"]\n', r"no model inputs"),
    ('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1"]\ncolour = 1\n',
     r"unknown key\(s\) \['colour'\] in \[channels\]"),
])
def test_bad_descriptions_are_one_line_exit_2_and_nothing_written(files, tmp_path, capsys, toml, pattern):
    desc = tmp_path / "d.toml"
    desc.write_text(toml)
    out = tmp_path / "s.h5"
    before = hashlib.sha256(files["edf"].read_bytes()).hexdigest()
    assert main(["convert", str(files["edf"]), "--description", str(desc), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("stimsteer convert: error:")
    assert re.search(pattern, err), err
    assert not out.exists() and not list(tmp_path.glob(".s.h5*"))
    assert hashlib.sha256(files["edf"].read_bytes()).hexdigest() == before


def test_bad_mne_input_errors(raw):
    with pytest.raises(SessionError, match=r"picks \['ZZZ'\] match no channel"):
        from stimsteer.sysid.io.mne import recording_from_mne
        recording_from_mne(raw, picks=["ZZZ"])


def test_a_pulse_table_file_on_its_own_clock_becomes_the_inputs_and_opens_trials(raw, files, tmp_path, capsys):
    # the stimulator's clock runs 0.25 s behind the recording's: t_model = t_pulse + 0.25
    train = 0.75 + np.arange(10) / 130.0
    rows = [f"{t:.6f},A,{30 + i}" for i, t in enumerate(train)] + [f"{t + 2.0:.6f},B,20" for t in train]
    (tmp_path / "pulses.csv").write_text("time_s,site,amplitude\n" + "\n".join(rows) + "\n")
    desc = tmp_path / "d.toml"
    desc.write_text('[channels]\noutputs = ["LFP1"]\n[pulses]\nfile = "pulses.csv"\nsites = ["A", "B"]\n'
                    'unit = "uA"\nclock_offset_s = 0.25\n'
                    '[trials]\npulse_trains_gap_s = 0.5\nbefore_s = 0.1\nafter_s = 0.5\n')
    out = tmp_path / "s.h5"
    assert main(["convert", str(files["edf"]), "--description", str(desc), "--out", str(out)]) == 0
    s = load_session(out)
    assert s.input_names == ("A", "B") and s.input_units == ("uA", "uA")
    k = np.floor((train + 0.25) * FS + 1e-9).astype(int)
    assert np.flatnonzero(s.u[:, 0]).tolist() == k.tolist() and s.u[k, 0].tolist() == list(range(30, 40))
    assert np.flatnonzero(s.u[:, 1]).tolist() == (k + 2000).tolist()
    assert s.trials.tolist() == [[900, 1500], [2900, 3500]]  # the first pulse of each train, at 1.0 and 3.0 s
    assert s.metadata["pulse_mapping"]["offset_s"] == 0.25 and s.metadata["pulse_mapping"]["n_pulses"] == 20


def test_outputs_picked_by_channel_type(raw):
    s = session_from_mne(raw, {"channels": {"inputs": ["STIM"], "output_types": ["seeg"]}})
    assert s.output_names == ("LFP1", "LFP2")
    with pytest.raises(SessionError, match=r"no channel of the types \['ecog'\] in the recording; it has the "
                                           r"types \['misc', 'seeg'\]"):
        session_from_mne(raw, {"channels": {"inputs": ["STIM"], "output_types": ["ecog"]}})


def test_a_file_is_read_only_for_the_channels_the_description_uses(files):
    # read_recording passes the description's channels to MNE, so unused channels are never loaded
    # (benchmarks/bench_recordings.py measures the memory); a name the file lacks reads every channel, so the
    # error can list them all
    desc = parse_description({"channels": {"inputs": ["STIM"], "outputs": ["LFP1"]}})
    rec = read_recording(files["fif"], desc)
    assert rec.channel_names == ["LFP1", "STIM"] or rec.channel_names == ["STIM", "LFP1"]
    full = read_recording(files["fif"], parse_description({"channels": {"inputs": ["STIM"], "outputs": ["LFP9"]}}))
    assert set(full.channel_names) > {"STIM", "LFP1", "LFP2"}
    with pytest.raises(SessionError, match=r"no channel 'LFP9'; it has \[.*'LFP2'"):
        build_session(full, parse_description({"channels": {"inputs": ["STIM"], "outputs": ["LFP9"]}}))
    from stimsteer.sysid.io.mne import read_mne_file

    every = build_session(read_mne_file(files["fif"], "fif"), desc)  # every channel read: the same session
    s = build_session(rec, desc)
    assert np.array_equal(s.y, every.y) and np.array_equal(s.u, every.u)
