"""Tests of stimsteer.sysid.io: round trips, content dispatch, bad files, atomic output and lazy windows."""

import hashlib
import json
import os
import sys
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest

from stimsteer.sysid.exceptions import FileFormatError, SessionError, StimsteerError, StimsteerWarning
from stimsteer.sysid.io import detect_format, load_session, open_session_file, save_session
from stimsteer.sysid.session import Session

SUFFIXES = [".h5", ".csv", ".parquet", ".nwb"]


def _session(rng, n=600, metadata=None):
    """A small invented session: 2 stimulation sites, 3 recorded channels, 3 trials with a gap, masked samples."""
    u = rng.standard_normal((n, 2))
    y = rng.standard_normal((n, 3)) * 1e-3
    mask = np.ones(n, dtype=bool)
    mask[40:47] = False
    mask[310:312] = False
    u[41, 0] = np.nan  # masked samples may hold NaN or inf
    y[42, 2] = np.inf
    return Session(
        u=u, y=y, sample_rate_hz=1000.0 / 3.0, trials=[(0, 200), (250, 420), (420, 600)],
        input_names=["site a", "site_b"], output_names=["lfp_1", "lfp_2", "unit µ"],
        input_units=["uA", "uA"], output_units=["mV", "mV", "µV"], mask=mask,
        metadata={"animal": "simulated network 3", "prep": [{"step": "none"}]} if metadata is None else metadata,
    )


def _same(a: Session, b: Session, metadata=True):
    assert np.array_equal(a.u, b.u, equal_nan=True)
    assert np.array_equal(a.y, b.y, equal_nan=True)
    assert np.array_equal(a.mask, b.mask)
    assert np.array_equal(a.trials, b.trials)
    assert a.sample_rate_hz == b.sample_rate_hz
    assert (a.input_names, a.output_names) == (b.input_names, b.output_names)
    assert (a.input_units, a.output_units) == (b.input_units, b.output_units)
    assert a.content_hash() == b.content_hash()
    if metadata:
        assert a.metadata == b.metadata


def _sha(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


# ------------------------------------------------------------------------------------------------ round trips
@pytest.mark.parametrize("suffix", SUFFIXES)
def test_round_trip_preserves_every_array_name_unit_and_trial(tmp_path, rng, suffix):
    s = _session(rng)
    path = tmp_path / f"session{suffix}"
    with warnings.catch_warnings():
        warnings.simplefilter("error", StimsteerWarning)  # every layout keeps everything, without a warning
        save_session(s, path)
    back = load_session(path)
    _same(s, back)
    assert os.listdir(tmp_path) == [path.name]  # no temporary file left beside it


def test_round_trip_keeps_extreme_floats_exactly(tmp_path, rng):
    # exactness of the text layout: the shortest repr of a float64 reads back to the same bits (IEEE 754 / Python
    # float repr, common practice, no source); includes subnormals, huge values and negative zero
    s = _session(rng, metadata={})
    y = np.array(s.y)
    y[:5, 0] = [5e-324, -0.0, 1.7976931348623157e308, 1 / 3, -2.2250738585072014e-308]
    s = s.replace(y=y)
    for suffix in (".csv", ".parquet", ".h5"):
        save_session(s, tmp_path / f"x{suffix}")
        back = load_session(tmp_path / f"x{suffix}")
        assert back.y.tobytes() == s.y.tobytes()


def test_csv_keeps_the_metadata_on_a_comment_line(tmp_path, rng):
    s = _session(rng)
    assert "animal" in s.metadata
    path = save_session(s, tmp_path / "s.csv")
    first = path.read_text(encoding="utf-8").splitlines()[0]
    assert first.startswith("# stimsteer-metadata: {")
    back = load_session(path)
    assert back.metadata == s.metadata and back.content_hash() == s.content_hash()
    # pandas reads the table itself when told that '#' starts a comment (common practice, no source)
    import pandas as pd

    assert pd.read_csv(path, comment="#").shape[0] == s.n_samples


@pytest.mark.parametrize("line, match", [("# stimsteer-metadata: {broken", "must hold one JSON object"),
                                         ("# stimsteer-metadata: [1, 2]", "must hold a JSON object; found list")])
def test_a_damaged_csv_metadata_line_is_refused(tmp_path, rng, line, match):
    path = save_session(_session(rng), tmp_path / "s.csv")
    lines = path.read_text(encoding="utf-8").splitlines()
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join([line] + lines[1:]) + "\n", encoding="utf-8")
    with pytest.raises(FileFormatError, match=match):
        load_session(bad)


def test_start_time_survives_tables_and_nwb(tmp_path, rng):
    s = _session(rng, metadata={"start_time_s": 12.5})
    for suffix in (".csv", ".parquet", ".nwb"):
        save_session(s, tmp_path / f"s{suffix}")
        back = load_session(tmp_path / f"s{suffix}")
        assert back.metadata["start_time_s"] == 12.5
        _same(s, back)


def test_dispatch_is_by_content_not_suffix(tmp_path, rng):
    s = _session(rng)
    save_session(s, tmp_path / "a.h5")
    save_session(s, tmp_path / "b.parquet")
    save_session(s, tmp_path / "c.nwb")
    save_session(s, tmp_path / "d.csv")
    renamed = {"a.h5": "a.dat", "b.parquet": "b.h5", "c.nwb": "c.csv", "d.csv": "d.parquet"}
    expected = {"a.dat": "hdf5", "b.h5": "parquet", "c.csv": "nwb", "d.parquet": "csv"}
    for old, new in renamed.items():
        os.replace(tmp_path / old, tmp_path / new)
        assert detect_format(tmp_path / new) == expected[new]
        _same(s, load_session(tmp_path / new))


def test_hdf5_layout_is_as_documented(tmp_path, rng):
    s = _session(rng)
    save_session(s, tmp_path / "s.h5")
    with h5py.File(tmp_path / "s.h5", "r") as h:
        assert h.attrs["stimsteer_layout"] == "stimsteer-session"
        assert h.attrs["stimsteer_layout_version"] == 1
        assert h.attrs["sample_rate_hz"] == s.sample_rate_hz
        assert json.loads(h.attrs["metadata_json"]) == s.metadata
        assert h["inputs"].shape == (600, 2) and h["outputs"].shape == (600, 3) and h["valid"].dtype == np.uint8
        assert list(h["outputs"].attrs["channel_units"]) == ["mV", "mV", "µV"]
        # by default contiguous and uncompressed, as the module docstring documents
        assert h["inputs"].chunks is None and h["inputs"].compression is None
        assert h["trials"][()].tolist() == [[0, 200], [250, 420], [420, 600]]
    save_session(s, tmp_path / "g.h5", compression="gzip")
    with h5py.File(tmp_path / "g.h5", "r") as h:
        # chunk rows = min(T, 16384 // width), gzip with shuffle: as the module docstring documents
        assert h["inputs"].chunks == (600, 2) and h["inputs"].compression == "gzip" and h["inputs"].shuffle


# ------------------------------------------------------------------------------------------------ hand-written tables
def test_hand_written_csv_with_rows_between_trials_and_inferred_rate(tmp_path):
    # 4 rows at 100 Hz from t0 = 1 s: trial labelled 7, a row outside trials (empty label), trial labelled 3
    text = (
        "time [s], trial ,in:stim 1 [uA],out:lfp [mV],valid\n"
        "1.00,7,0.5,1.0,1\n"
        "1.01,7,0.0,,false\n"
        "1.02,,0.0,nan,0\n"
        "1.03,3,1.5,2.0,TRUE\n"
    )
    path = tmp_path / "hand.csv"
    path.write_text(text, encoding="utf-8")
    s = load_session(path)
    assert s.sample_rate_hz == 100.0
    assert s.trials.tolist() == [[0, 2], [3, 4]]
    assert s.mask.tolist() == [True, False, False, True]
    assert s.input_names == ("stim 1",) and s.output_units == ("mV",)
    assert s.metadata == {"start_time_s": 1.0}


def test_a_condition_column_labels_each_trial(tmp_path):
    # rows outside trials may leave the condition empty; whole numbers stay whole ("2", not "2.0")
    text = ("time [s] @ 10 Hz,trial,condition,out:y [mV]\n0,0,off,1\n0.1,0,off,2\n0.2,-1,,3\n0.3,1,130Hz,4\n"
            "0.4,2,2,5\n")
    s = load_session(_write(tmp_path / "c.csv", text))
    assert s.metadata["trial_conditions"] == ["off", "130Hz", "2"]


@pytest.mark.parametrize("suffix", [".csv", ".parquet"])
def test_condition_labels_round_trip_through_tables_and_follow_selected_trials(tmp_path, rng, suffix):
    s = _session(rng, metadata={"trial_conditions": ["off", "on", "off"]})
    back = load_session(save_session(s, tmp_path / f"s{suffix}"))
    assert back.metadata["trial_conditions"] == ["off", "on", "off"]
    assert back.select_trials([2, 1]).metadata["trial_conditions"] == ["off", "on"]


def test_a_condition_column_that_disagrees_with_the_stored_metadata_is_refused(tmp_path):
    text = ('# stimsteer-metadata: {"trial_conditions": ["on"]}\n'
            "time [s] @ 10 Hz,trial,condition,out:y [mV]\n0,0,off,1\n")
    with pytest.raises(FileFormatError, match=r"disagrees with the metadata's 'trial_conditions'"):
        load_session(_write(tmp_path / "c.csv", text))


def test_csv_without_valid_column_is_all_valid(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("time [s] @ 10 Hz,trial,out:y [a.u.]\n0,0,1\n0.1,0,2\n0.2,-1,3\n")
    s = load_session(path)
    assert s.mask.all() and s.n_inputs == 0 and s.trials.tolist() == [[0, 2]]


# ------------------------------------------------------------------------------------------------ bad files
def _write(path, content):
    path.write_bytes(content if isinstance(content, bytes) else content.encode())
    return path


BAD_TABLES = {
    "missing_columns": ("a,b,c\n1,2,3\n", r"expected columns .*time \[s\].*missing \['time', 'trial'"),
    "no_output": ("time [s] @ 10 Hz,trial,in:u [uA]\n0,0,1\n", r"missing \['out:<name> \[<unit>\]'\]"),
    "unknown_column": ("time [s] @ 10 Hz,trial,out:y [mV],notes\n0,0,1,x\n", r"not recognised \['notes'\]"),
    "no_unit": ("time [s] @ 10 Hz,trial,out:y\n0,0,1\n", r"'out:y' has no unit; units are required"),
    "empty_unit": ("time [s] @ 10 Hz,trial,out:y []\n0,0,1\n", r"needs a channel name and a unit"),
    "duplicate": ("time [s] @ 10 Hz,trial,out:y [mV],out:y [mV]\n0,0,1,1\n", r"must be unique; found duplicates"),
    "not_uniform": ("time [s],trial,out:y [mV]\n0,0,1\n0.1,0,1\n0.3,0,1\n0.4,0,1\n", r"not on a uniform grid"),
    "header_rate_mismatch": ("time [s] @ 20 Hz,trial,out:y [mV]\n0,0,1\n0.1,0,1\n",
                             r"data row 2 \(counted from 1 after the header\) is at 0.1 s"),
    "one_row_no_rate": ("time [s],trial,out:y [mV]\n0,0,1\n", r"cannot infer the sampling rate"),
    "split_trial": ("time [s] @ 10 Hz,trial,out:y [mV]\n0,0,1\n0.1,1,1\n0.2,0,1\n",
                    r"trial 0 appears in two separate runs of rows \(starting at data rows 1 and 3"),
    "fractional_trial": ("time [s] @ 10 Hz,trial,out:y [mV]\n0,0.5,1\n", r"must hold whole numbers"),
    "no_trial_rows": ("time [s] @ 10 Hz,trial,out:y [mV]\n0,-1,1\n", r"no row belongs to a trial"),
    "bad_valid": ("time [s] @ 10 Hz,trial,out:y [mV],valid\n0,0,1,maybe\n", r"'valid' column must hold 1/0"),
    "text_value": ("time [s] @ 10 Hz,trial,out:y [mV]\n0,0,abc\n",
                   r"must be numeric; data row 1 \(counted from 1 after the header\) holds 'abc'\. Write a number "
                   r"there, or leave the cell empty to mark that sample missing"),
    # an empty cell is a masked sample (issue 18); an infinite value at a valid sample is still refused, naming the
    # channel and the time
    "inf_valid": ("time [s] @ 10 Hz,trial,out:y [mV]\n0,0,1\n0.1,0,inf\n", r"in output 'y' at t = 0.1 s"),
    "header_only": ("time [s] @ 10 Hz,trial,out:y [mV]\n", r"holds a header but no rows"),
    "zero_rate": ("time [s] @ 0 Hz,trial,out:y [mV]\n0,0,1\n", r"sampling rate must be positive"),
    "two_conditions_in_a_trial": ("time [s] @ 10 Hz,trial,condition,out:y [mV]\n0,0,off,1\n0.1,0,on,1\n",
                                  r"trial 0 \(data rows 1-2, counted from 1 after the header\) has labels "
                                  r"\['off', 'on'\]"),
    "unlabelled_trial_row": ("time [s] @ 10 Hz,trial,condition,out:y [mV]\n0,0,off,1\n0.1,0,,1\n",
                             r"trial 0 \(data rows 1-2, counted from 1 after the header\) has empty cells"),
}


@pytest.mark.parametrize("case", sorted(BAD_TABLES))
def test_bad_csv_is_a_clear_error_and_left_untouched(tmp_path, case):
    text, pattern = BAD_TABLES[case]
    path = _write(tmp_path / "bad.csv", text)
    before = _sha(path)
    with pytest.raises(FileFormatError, match=pattern) as err:
        load_session(path)
    assert str(path) in str(err.value)
    assert _sha(path) == before and os.listdir(tmp_path) == ["bad.csv"]


def test_bad_parquet_columns_are_a_clear_error(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = tmp_path / "bad.parquet"
    pq.write_table(pa.table({"t": [0.0, 1.0], "out:y [mV]": [1.0, 2.0]}), path)
    with pytest.raises(FileFormatError, match=r"expected columns .*found \['t', 'out:y \[mV\]'\]"):
        load_session(path)


def _hdf5_wrong_groups(path):
    with h5py.File(path, "w") as h:
        h.create_group("recording").create_dataset("data", data=np.zeros((4, 2)))
        h.attrs["made_by"] = "another tool"


def _hdf5_edit(rng, edit):
    def make(path):
        save_session(_session(rng), path)
        with h5py.File(path, "a") as h:
            edit(h)
    return make


def _drop_units(h):
    del h["outputs"].attrs["channel_units"]


def _empty_unit(h):
    h["inputs"].attrs.create("channel_units", np.array(["uA", ""], dtype=object), dtype=h5py.string_dtype())


def _newer_version(h):
    h.attrs["stimsteer_layout_version"] = 99


def _no_version(h):
    del h.attrs["stimsteer_layout_version"]


def _short_outputs(h):
    del h["outputs"]
    ds = h.create_dataset("outputs", data=np.zeros((10, 3)))
    ds.attrs["channel_names"] = ["a", "b", "c"]
    ds.attrs["channel_units"] = ["mV", "mV", "mV"]


def _overlapping_trials(h):
    h["trials"][1, 0] = 150


def _missing_valid(h):
    del h["valid"]


def _bad_metadata(h):
    h.attrs["metadata_json"] = "{not json"


def _duplicate_names(h):
    h["outputs"].attrs["channel_names"] = ["lfp_1", "lfp_1", "x"]


def _mask_values(h):
    h["valid"][0] = 7


BAD_HDF5 = {
    "wrong_groups": (None, r"HDF5 file but not a session.*found root members \['recording'\]"),
    "no_units": (_drop_units, r"expected the attribute 'channel_units' on '/outputs'.*Units are required"),
    "empty_unit": (_empty_unit, r"'channel_units' on '/inputs' to hold 2 non-empty strings"),
    "newer_version": (_newer_version, r"layout version <= 1; found 99.*upgrade stimsteer"),
    "no_version": (_no_version, r"stimsteer_layout_version to be a whole number; found none"),
    "short_outputs": (_short_outputs, r"same number of samples; found 600, 10 and 600"),
    "overlapping_trials": (_overlapping_trials, r"trials 0 \[0, 200\) and 1 \[150, 420\) overlap"),
    "missing_valid": (_missing_valid, r"expected a dataset '/valid'; found nothing"),
    "bad_metadata": (_bad_metadata, r"metadata_json to hold JSON"),
    "duplicate_names": (_duplicate_names, r"unique channel names; found duplicates \['lfp_1'\]"),
    "mask_values": (_mask_values, r"'/valid' to hold only 0 and 1"),
}


@pytest.mark.parametrize("case", sorted(BAD_HDF5))
def test_bad_hdf5_is_a_clear_error_and_left_untouched(tmp_path, rng, case):
    edit, pattern = BAD_HDF5[case]
    path = tmp_path / "bad.h5"
    (_hdf5_wrong_groups if edit is None else _hdf5_edit(rng, edit))(path)
    before = _sha(path)
    with pytest.raises(FileFormatError, match=pattern) as err:
        load_session(path)
    assert str(path) in str(err.value)
    assert _sha(path) == before and os.listdir(tmp_path) == ["bad.h5"]


def test_other_stimsteer_files_are_named_as_such(tmp_path):
    path = tmp_path / "model.h5"
    with h5py.File(path, "w") as h:
        h.attrs["stimsteer_file"] = "model"  # the marker that storage.py and plants.py write
    with pytest.raises(FileFormatError, match=r"is a stimsteer 'model' file \(a saved model or plant\), not a session"):
        load_session(path)


@pytest.mark.parametrize(
    "content, pattern",
    [
        (b"", r"is empty \(0 bytes\)"),
        (b"\x00\x01\x02\xffbinary junk" * 10, r"not a session file.*binary data"),
        ("time [s],trial,out:y [\xb5V]\n0,0,1\n".encode("latin-1"), r"looks like text but is not UTF-8"),
        (b"\x89HDF\r\n\x1a\n" + b"\x00" * 100, r"cannot be read as HDF5.*damaged or truncated"),
        (b"PAR1" + b"\x00" * 50, r"does not end with the Parquet footer"),
    ],
    ids=["empty", "binary", "latin1_text", "truncated_hdf5", "truncated_parquet"],
)
def test_unreadable_files_are_clear_errors_and_untouched(tmp_path, content, pattern):
    path = _write(tmp_path / "x.h5", content)
    before = _sha(path)
    with pytest.raises(FileFormatError, match=pattern):
        load_session(path)
    assert _sha(path) == before and os.listdir(tmp_path) == ["x.h5"]


def test_damaged_parquet_body_is_a_clear_error(tmp_path):
    path = _write(tmp_path / "x.parquet", b"PAR1" + b"\x07" * 64 + b"PAR1")
    with pytest.raises(FileFormatError, match=r"cannot be read as Parquet"):
        load_session(path)


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(FileNotFoundError):
        load_session(tmp_path / "nope.h5")
    with pytest.raises(FileFormatError, match=r"is a folder"):
        load_session(tmp_path)


# ------------------------------------------------------------------------------------------------ writing
def test_existing_file_is_kept_without_overwrite(tmp_path, rng):
    path = tmp_path / "s.h5"
    save_session(_session(rng), path)
    before = _sha(path)
    with pytest.raises(StimsteerError, match=r"already exists; pass overwrite=True"):
        save_session(_session(rng), path)
    assert _sha(path) == before
    save_session(_session(rng), path, overwrite=True)
    assert _sha(path) != before


def test_failed_write_leaves_nothing_behind(tmp_path, rng, monkeypatch):
    import stimsteer.sysid.io.dispatch as io

    def half_write(session, tmp, compression):
        with h5py.File(tmp, "w") as h:
            h.create_dataset("inputs", data=session.u)
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(io, "_write_hdf5", half_write)
    with pytest.raises(OSError, match="disk full"):
        save_session(_session(rng), tmp_path / "s.h5")
    assert os.listdir(tmp_path) == []


def test_failed_overwrite_keeps_the_old_file(tmp_path, rng, monkeypatch):
    import stimsteer.sysid.io.dispatch as io

    path = tmp_path / "s.h5"
    save_session(_session(rng), path)
    before = _sha(path)

    def failing(session, tmp, compression):
        raise OSError("simulated failure")

    monkeypatch.setattr(io, "_write_hdf5", failing)
    with pytest.raises(OSError):
        save_session(_session(rng), path, overwrite=True)
    assert _sha(path) == before and os.listdir(tmp_path) == ["s.h5"]


@pytest.mark.parametrize(
    "names, suffix, pattern",
    [
        (["a[1]", "b"], ".csv", r"cannot be written as a table header"),
        ([" a", "b"], ".parquet", r"cannot be written as a table header"),
        (["a/b", "b"], ".nwb", r"cannot be NWB series names"),
    ],
)
def test_names_a_layout_cannot_hold_are_refused_before_writing(tmp_path, rng, names, suffix, pattern):
    s = _session(rng, metadata={}).replace(input_names=names)
    with pytest.raises(FileFormatError, match=pattern):
        save_session(s, tmp_path / f"s{suffix}")
    assert os.listdir(tmp_path) == []


def test_unknown_suffix_and_non_session(tmp_path, rng):
    with pytest.raises(FileFormatError, match=r"cannot choose a layout .*got '\.txt'"):
        save_session(_session(rng), tmp_path / "s.txt")
    with pytest.raises(SessionError, match=r"needs a Session; got dict"):
        save_session({"u": 1}, tmp_path / "s.h5")
    with pytest.raises(StimsteerError, match=r"is a folder"):
        (tmp_path / "d.h5").mkdir()
        save_session(_session(rng), tmp_path / "d.h5")
    with pytest.raises(StimsteerError, match=r"does not exist"):
        save_session(_session(rng), tmp_path / "no" / "s.h5")


def test_metadata_that_json_cannot_hold_is_refused(tmp_path, rng):
    s = _session(rng, metadata={"when": object()})
    with pytest.raises(SessionError, match=r"metadata cannot be stored as JSON"):
        save_session(s, tmp_path / "s.h5")
    assert os.listdir(tmp_path) == []


def test_numpy_values_in_metadata_are_stored_as_json(tmp_path, rng):
    s = _session(rng, metadata={"gain": np.float64(2.5), "taps": np.arange(3), "n": np.int64(4)})
    save_session(s, tmp_path / "s.h5")
    assert load_session(tmp_path / "s.h5").metadata == {"gain": 2.5, "taps": [0, 1, 2], "n": 4}


# ------------------------------------------------------------------------------------------------ NWB specifics
def test_nwb_without_pynwb_names_the_extra(tmp_path, rng, monkeypatch):
    s = _session(rng)
    save_session(s, tmp_path / "s.nwb")
    monkeypatch.setitem(sys.modules, "pynwb", None)  # makes `import pynwb` fail as if it were not installed
    with pytest.raises(FileFormatError, match=r'pip install "stimsteer\[nwb\]"'):
        load_session(tmp_path / "s.nwb")
    with pytest.raises(FileFormatError, match=r"cannot write .*pynwb.*not installed"):
        save_session(s, tmp_path / "t.nwb")
    assert sorted(os.listdir(tmp_path)) == ["s.nwb"]


def _nwb_file(path, stimulus, acquisition, trials=()):
    from datetime import datetime, timezone

    import pynwb

    nwb = pynwb.NWBFile(session_description="invented test recording", identifier="t1",
                        session_start_time=datetime(2020, 1, 1, tzinfo=timezone.utc))
    for ts in stimulus:
        nwb.add_stimulus(ts)
    for ts in acquisition:
        nwb.add_acquisition(ts)
    for a, b in trials:
        nwb.add_trial(start_time=a, stop_time=b)
    with pynwb.NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)


def test_foreign_nwb_series_are_split_converted_and_trials_mapped(tmp_path):
    from pynwb import TimeSeries

    stim = TimeSeries(name="pulses", data=np.arange(10.0), unit="uA", rate=100.0, starting_time=0.0)
    rec = TimeSeries(name="probe", data=np.ones((10, 2), dtype=np.int16), unit="mV", conversion=0.5,
                     timestamps=np.arange(10) / 100.0)
    # trial times between samples: [0.015, 0.05) holds samples 2, 3, 4 (t = 0.02 .. 0.04)
    _nwb_file(tmp_path / "f.nwb", [stim], [rec], trials=[(0.015, 0.05), (0.05, 0.1)])
    s = load_session(tmp_path / "f.nwb")
    assert s.output_names == ("probe_0", "probe_1") and s.output_units == ("mV", "mV")
    assert np.array_equal(s.y, np.full((10, 2), 0.5))
    assert s.trials.tolist() == [[2, 5], [5, 10]]
    assert s.sample_rate_hz == 100.0 and s.metadata["nwb_identifier"] == "t1"


def test_damaged_nwb_is_a_clear_error(tmp_path):
    path = tmp_path / "fake.nwb"
    with h5py.File(path, "w") as h:
        h.attrs["neurodata_type"] = "NWBFile"  # marked as NWB but holds nothing of it
    before = _sha(path)
    with pytest.raises(FileFormatError, match=r"cannot be read as an NWB file \(TypeError: Missing NWB version"):
        load_session(path)
    assert _sha(path) == before


def test_nwb_without_stimulus_or_with_mismatched_grids(tmp_path):
    from pynwb import TimeSeries

    def ts(name, n, rate):
        return TimeSeries(name=name, data=np.zeros(n), unit="mV", rate=rate, starting_time=0.0)

    _nwb_file(tmp_path / "a.nwb", [], [ts("y", 10, 100.0)])
    with pytest.raises(FileFormatError, match=r"without stimulus TimeSeries in /stimulus/presentation"):
        load_session(tmp_path / "a.nwb")
    _nwb_file(tmp_path / "b.nwb", [ts("u", 10, 100.0)], [ts("y", 12, 100.0)])
    with pytest.raises(FileFormatError, match=r"share one sample grid; 'u' has 10 samples .* 'y' has 12"):
        load_session(tmp_path / "b.nwb")


# ------------------------------------------------------------------------------------------------ lazy file
def test_session_file_matches_the_loaded_session(tmp_path, rng):
    s = _session(rng)
    save_session(s, tmp_path / "s.h5")
    with open_session_file(tmp_path / "s.h5") as f:
        assert (f.n_samples, f.n_inputs, f.n_outputs, f.n_trials) == (600, 2, 3, 3)
        assert f.sample_rate_hz == s.sample_rate_hz and f.metadata == s.metadata
        assert (f.input_names, f.output_units) == (s.input_names, s.output_units)
        assert np.array_equal(f.trials, s.trials) and np.array_equal(f.trial_lengths, s.trial_lengths)
        assert f.duration_s == s.duration_s
        assert f.segments() == s.segments() and f.segments(50) == s.segments(50)
        assert f.content_hash() == s.content_hash()
        for a, b in zip(f.read(30, 330), s.read(30, 330)):
            assert np.array_equal(a, b, equal_nan=True)
        _same(f.to_session(), s)
        assert "n_samples=600" in repr(f) and "open" in repr(f)
    assert "closed" in repr(f)
    with pytest.raises(StimsteerError, match=r"is closed; open it again"):
        f.read(0, 10)


def test_session_file_window_errors(tmp_path, rng):
    s = _session(rng)
    save_session(s, tmp_path / "s.h5")
    with h5py.File(tmp_path / "s.h5", "a") as h:
        h["outputs"][100, 1] = np.nan  # a NaN at a valid sample: only a window containing it notices
    with open_session_file(tmp_path / "s.h5") as f:
        f.read(0, 100)
        with pytest.raises(SessionError, match=r"window \[590, 601\) is outside the recording of 600"):
            f.read(590, 601)
        with pytest.raises(FileFormatError, match=r"NaN or infinite values at valid samples \(first at sample 100"):
            f.read(90, 110)


def test_open_session_file_refuses_other_layouts(tmp_path, rng):
    save_session(_session(rng), tmp_path / "s.csv")
    with pytest.raises(FileFormatError, match=r"is a CSV file; open_session_file reads only our HDF5 layout"):
        open_session_file(tmp_path / "s.csv")


def _bytes_read_by_process():
    with open("/proc/self/io") as fh:
        for line in fh:
            if line.startswith("rchar:"):
                return int(line.split()[1])
    raise OSError("no rchar line")


@pytest.mark.skipif(not os.path.exists("/proc/self/io"), reason="needs Linux /proc/self/io to count bytes read")
def test_reading_a_window_touches_only_its_chunks(tmp_path, rng):
    # An 8 MB file of incompressible noise; a 1000-sample window must read a small fraction of it from disk,
    # counted by the kernel (rchar in /proc/self/io, Linux proc(5) manual page).
    n = 200_000
    s = Session(u=rng.standard_normal((n, 2)), y=rng.standard_normal((n, 3)), sample_rate_hz=1000.0)
    path = tmp_path / "big.h5"
    save_session(s, path, compression="gzip")
    size = path.stat().st_size
    with h5py.File(path, "r") as h:
        assert h["outputs"].chunks == (16384 // 3, 3)  # many chunks along time
    with open_session_file(path) as f:
        before = _bytes_read_by_process()
        u, y, mask = f.read(120_000, 121_000)
        window_bytes = _bytes_read_by_process() - before
        before = _bytes_read_by_process()
        f.to_session()
        whole_bytes = _bytes_read_by_process() - before
    assert np.array_equal(u, s.u[120_000:121_000]) and np.array_equal(y, s.y[120_000:121_000]) and mask.all()
    assert window_bytes < 0.1 * size  # measured ~3 % with 128 KiB chunks
    assert whole_bytes > 0.9 * size  # the counter does see reads of the whole file


def _rss_file_bytes():
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("RssFile:"):
                return int(line.split()[1]) * 1024  # the kernel reports kB (Linux proc(5) manual page)
    raise OSError("no RssFile line")


@pytest.mark.skipif(not os.path.exists("/proc/self/status"), reason="needs Linux /proc/self/status")
def test_an_uncompressed_file_is_read_through_a_memory_map_that_holds_only_the_window(tmp_path, rng):
    # 80 MB of outputs read window by window through the memory map: the file-backed pages resident in this process
    # (RssFile, Linux proc(5) manual page) must stay small, not grow to the size of the file. Pages may be 2 MiB
    # huge pages (seen on a tmpfs), so the bound is loose.
    n = 200_000
    s = Session(u=rng.standard_normal((n, 2)), y=rng.standard_normal((n, 50)), sample_rate_hz=1000.0)
    path = save_session(s, tmp_path / "big.h5")
    size = path.stat().st_size
    with open_session_file(path) as f:
        assert f._y_map is not None and f._u_map is not None
        f.read(10, 20)  # the same code path once, so the counter below sees the windows' pages only
        before = _rss_file_bytes()
        peak = 0
        for a in range(0, n, 10_000):
            u, y, mask = f.read(a, a + 10_000)
            peak = max(peak, _rss_file_bytes() - before)
            np.testing.assert_array_equal(y, s.y[a:a + 10_000])
            np.testing.assert_array_equal(u, s.u[a:a + 10_000])
        assert y.flags.writeable and y.flags.owndata  # a fresh copy, not a view of the map
    assert peak < 0.15 * size


def test_hdf5_files_that_cannot_be_mapped_are_read_through_h5py(tmp_path, rng):
    # Written by another program: chunked without compression, and big-endian. Both must read correctly.
    s = _session(rng)
    save_session(s, tmp_path / "s.h5")
    for name, kw in (("chunked", {"chunks": (50, 3)}), ("big_endian", {"dtype": ">f8"})):
        path = tmp_path / f"{name}.h5"
        with h5py.File(tmp_path / "s.h5", "r") as src, h5py.File(path, "w") as dst:
            dst.attrs.update(src.attrs)
            for key in src:
                data = src[key][()]
                extra = kw if key == "outputs" else {}
                ds = dst.create_dataset(key, data=data, **extra)
                ds.attrs.update(src[key].attrs)
        with open_session_file(path) as f:
            assert f._y_map is None and f._u_map is not None
            u, y, mask = f.read(10, 300)
        np.testing.assert_array_equal(y, s.y[10:300])
        np.testing.assert_array_equal(u, s.u[10:300])
        np.testing.assert_array_equal(mask, s.mask[10:300])


def test_a_closed_file_refuses_reads_even_with_a_memory_map(tmp_path, rng):
    path = save_session(_session(rng), tmp_path / "s.h5")
    f = open_session_file(path)
    f.close()
    with pytest.raises(StimsteerError, match="is closed"):
        f.read(0, 10)


@pytest.mark.parametrize("compression", ["gzip", "lzf", "none"])
def test_every_hdf5_compression_round_trips_exactly_and_reads_lazily(tmp_path, rng, compression):
    s = _session(rng)
    path = save_session(s, tmp_path / f"s_{compression}.h5", compression=compression)
    back = load_session(path)
    np.testing.assert_array_equal(back.u, s.u)
    np.testing.assert_array_equal(back.y, s.y)
    assert back.content_hash() == s.content_hash()
    with h5py.File(path) as h:
        assert h["outputs"].compression == {"gzip": "gzip", "lzf": "lzf", "none": None}[compression]


def test_an_unknown_compression_is_refused_before_anything_is_written(tmp_path, rng):
    with pytest.raises(FileFormatError, match="compression must be one of"):
        save_session(_session(rng), tmp_path / "s.h5", compression="zstd")
    assert os.listdir(tmp_path) == []


def test_comment_lines_before_the_header_are_skipped(tmp_path, rng):
    # the table layout allows '#' lines before the header (stimsteer writes its caution there in schedules)
    s = _session(rng)
    path = save_session(s, tmp_path / "s.csv")
    text = path.read_text()
    commented = tmp_path / "c.csv"
    commented.write_text("# recorded in an invented test\n# second comment\n" + text)
    back = load_session(commented)
    np.testing.assert_array_equal(back.y, s.y)
    assert back.content_hash() == s.content_hash()


@pytest.mark.parametrize("compression", ["none", "gzip"])
def test_read_into_buffers_equals_a_plain_read(tmp_path, rng, compression):
    # Session.read and SessionFile.read (memory map or h5py) write the same window into column blocks of one array.
    s = _session(rng)
    path = save_session(s, tmp_path / f"s_{compression}.h5", compression=compression)
    with open_session_file(path) as f:
        for source in (s, f):
            Z = np.full((150, s.n_outputs + s.n_inputs), np.nan)
            u, y, mask = source.read(100, 250, out=(Z[:, s.n_outputs:], Z[:, : s.n_outputs]))
            np.testing.assert_array_equal(Z[:, : s.n_outputs], s.y[100:250])
            np.testing.assert_array_equal(Z[:, s.n_outputs:], s.u[100:250])
            np.testing.assert_array_equal(mask, s.mask[100:250])
            assert np.shares_memory(u, Z) and np.shares_memory(y, Z)
            with pytest.raises(SessionError, match=r"y_out must be a writeable float64 array of shape \(150, 3\)"):
                source.read(100, 250, out=(Z[:, s.n_outputs:], Z[:149, : s.n_outputs]))
            with pytest.raises(SessionError, match="out must be a pair"):
                source.read(100, 250, out=Z)


@pytest.mark.parametrize("compression", ["none", "gzip"])
def test_content_hash_of_a_file_streams_in_bounded_memory(tmp_path, rng, compression):
    import tracemalloc

    n = 200_000
    s = Session(u=rng.standard_normal((n, 2)), y=rng.standard_normal((n, 30)), sample_rate_hz=1000.0)
    path = save_session(s, tmp_path / "big.h5", compression=compression)
    with open_session_file(path) as f:
        tracemalloc.start()
        digest = f.content_hash()
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    assert digest == s.content_hash()
    assert peak < 0.5 * s.y.nbytes  # one block of 65,536 rows (16 MB) at a time, not the 48 MB dataset at once


def test_closing_a_file_while_a_view_of_its_map_lives_does_not_fail(tmp_path, rng):
    # A view of the map can outlive the read (e.g. inside a traceback); close() must still succeed, and the view
    # stay valid until it goes.
    s = _session(rng)
    with open_session_file(save_session(s, tmp_path / "s.h5")) as f:
        held = f._y_map._rows[10:20]
    np.testing.assert_array_equal(held, s.y[10:20])


def test_a_session_file_parses_its_metadata_when_first_read_and_says_when_it_is_not_json(tmp_path, rng, monkeypatch):
    good, bad, listed = tmp_path / "good.h5", tmp_path / "bad.h5", tmp_path / "list.h5"
    for path in (good, bad, listed):
        save_session(_session(rng), path)
    with h5py.File(bad, "a") as h:
        h.attrs["metadata_json"] = "{not json"
    with h5py.File(listed, "a") as h:
        h.attrs["metadata_json"] = "[1, 2]"
    parsed = []
    monkeypatch.setattr(json, "loads", lambda text, _loads=json.loads: parsed.append(len(text)) or _loads(text))
    with open_session_file(good) as f:  # the samples and header of a file are read without its metadata
        assert f.read(0, 5)[0].shape == (5, 2) and parsed == []
        assert f.metadata == _session(rng).metadata and f.metadata is f.metadata and len(parsed) == 1
    with open_session_file(bad) as f:  # readable samples; the metadata, when asked for, is a clear error
        assert f.read(0, 5)[0].shape == (5, 2)
        with pytest.raises(FileFormatError, match=r"bad\.h5 .*metadata_json to hold JSON"):
            f.metadata
    with pytest.raises(FileFormatError, match=r"metadata_json to hold a JSON object; found list"):
        open_session_file(listed)  # not an object at all: said at once
