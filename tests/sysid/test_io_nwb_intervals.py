"""NWB TimeIntervals files written with h5py (sysid/io/nwb_intervals.py), checked from outside: read back by pynwb
and passed through pynwb's schema validator (``pynwb.validate``, against the schema cached in the file and against
pynwb's own; Rübel et al. 2022, "The Neurodata Without Borders ecosystem for neurophysiological data science",
eLife 11:e78362), and compared with the same tables written by pynwb itself."""

from datetime import datetime, timezone

import h5py
import numpy as np
import pandas as pd
import pytest

pynwb = pytest.importorskip("pynwb")

from stimsteer.sysid.io import nwb_intervals
from stimsteer.sysid.io.nwb_intervals import IntervalColumn, write_nwb_intervals

START = datetime(1970, 1, 1, tzinfo=timezone.utc)


def _tables():
    pulses = [IntervalColumn("start_time", "", [0.0, 0.004, 0.008]),
              IntervalColumn("stop_time", "", [0.0002, 0.0042, 0.0082]),
              IntervalColumn("site", "site", ["a", None, "b µ"], text=True),
              IntervalColumn("amplitude_ua", "amplitude ua", [12.5, 0.0, np.nan])]
    empty = [IntervalColumn("start_time", "", []), IntervalColumn("stop_time", "", []),
             IntervalColumn("site", "site", [], text=True)]
    return [("planned_pulses", "one row per pulse", pulses), ("nothing_planned", "no rows", empty)]


def _write(path, writer=write_nwb_intervals):
    return writer(path, _tables(), identifier="id-1", session_description="a test", notes='{"checks": []}',
                  session_start_time=START)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("nwb_intervals")
    ours, theirs = folder / "h5py.nwb", folder / "pynwb.nwb"
    assert _write(ours) is True
    nwb_intervals._write_with_pynwb(theirs, _tables(), "id-1", "a test", '{"checks": []}', START)
    return ours, theirs


@pytest.mark.parametrize("cached", [True, False])
def test_the_file_passes_pynwbs_validator(files, cached):
    assert pynwb.validate(path=str(files[0]), use_cached_namespaces=cached) == []


def test_the_file_caches_the_installed_schema(files):
    with h5py.File(files[0], "r") as f:
        spec = f[f.attrs[".specloc"]]
        assert set(spec) == {"core", "hdmf-common", "hdmf-experimental"}
        catalog = pynwb.get_type_map().namespace_catalog
        for name in spec:
            assert list(spec[name]) == [catalog.get_namespace(name).version], name
        assert f.attrs["nwb_version"] == catalog.get_namespace("core").version


def test_pynwb_reads_back_the_tables_as_pynwb_wrote_them(files):
    with pynwb.NWBHDF5IO(str(files[0]), "r") as a, pynwb.NWBHDF5IO(str(files[1]), "r") as b:
        ours, theirs = a.read(), b.read()
        table = ours.intervals["planned_pulses"].to_dataframe()
        assert table["site"].tolist() == ["a", "", "b µ"] and np.isnan(table["amplitude_ua"].iloc[2])
        assert table["start_time"].tolist() == [0.0, 0.004, 0.008]
        pd.testing.assert_frame_equal(table, theirs.intervals["planned_pulses"].to_dataframe())
        for column in table.columns:
            assert ours.intervals["planned_pulses"][column].description == \
                theirs.intervals["planned_pulses"][column].description
        assert len(ours.intervals["nothing_planned"]) == 0
        assert ours.intervals["nothing_planned"].colnames == ("start_time", "stop_time", "site")
        for name in ("identifier", "session_description", "notes", "session_start_time",
                     "timestamps_reference_time"):
            assert getattr(ours, name) == getattr(theirs, name), name


def test_a_table_without_its_times_first_or_of_ragged_columns_is_refused(tmp_path):
    bad = [IntervalColumn("stop_time", "", [1.0]), IntervalColumn("start_time", "", [0.0])]
    with pytest.raises(ValueError, match="first two columns must be start_time and stop_time"):
        write_nwb_intervals(tmp_path / "x.nwb", [("t", "d", bad)], identifier="i", session_description="s",
                            notes="", session_start_time=START)
    ragged = [IntervalColumn("start_time", "", [0.0]), IntervalColumn("stop_time", "", [1.0, 2.0])]
    with pytest.raises(ValueError, match="different lengths"):
        write_nwb_intervals(tmp_path / "y.nwb", [("t", "d", ragged)], identifier="i", session_description="s",
                            notes="", session_start_time=START)
    assert not (tmp_path / "x.nwb").exists() and not (tmp_path / "y.nwb").exists()


def test_without_pynwb_nothing_is_written_and_another_major_schema_goes_through_pynwb(tmp_path, monkeypatch):
    monkeypatch.setattr(nwb_intervals, "_schema", lambda: None)
    assert _write(tmp_path / "none.nwb") is False and not (tmp_path / "none.nwb").exists()
    monkeypatch.setattr(nwb_intervals, "_schema", lambda: "other")
    assert _write(tmp_path / "other.nwb") is True
    with pynwb.NWBHDF5IO(str(tmp_path / "other.nwb"), "r") as io:
        assert len(io.read().intervals["planned_pulses"]) == 3
