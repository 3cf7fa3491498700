"""NWB in full, on files written by pynwb itself: channel_conversion and conversion/offset, the electrodes table,
a processing module's LFP, trials/epochs/invalid_times, stimulation at 30 kHz beside LFP at 1 kHz."""

from datetime import datetime, timezone

import numpy as np
import pytest

pynwb = pytest.importorskip("pynwb")

from pynwb.ecephys import LFP, ElectricalSeries

from stimsteer.sysid import load_session
from stimsteer.sysid.description import parse_description
from stimsteer.sysid.exceptions import FileFormatError
from stimsteer.sysid.from_recording import build_session, read_recording
from stimsteer.sysid.io.nwb import read_nwb_recording

LFP_HZ, STIM_HZ, SECONDS = 1000.0, 30000.0, 4.0
GAINS = np.array([1.0, 2.0, 3.0, 4.0])  # the x1-4 per-channel factors a reader must not ignore


@pytest.fixture(scope="module")
def nwb_file(tmp_path_factory):
    rng = np.random.default_rng(20261201)
    nwb = pynwb.NWBFile(session_description="test", identifier="t1",
                        session_start_time=datetime(2026, 1, 1, tzinfo=timezone.utc))
    dev = nwb.create_device(name="probe")
    group = nwb.create_electrode_group(name="shank", description="d", location="STN", device=dev)
    nwb.add_electrode_column(name="label", description="contact label")
    for i in range(4):
        nwb.add_electrode(group=group, location="STN" if i < 2 else "GPi", label=f"C{i}")
    region = nwb.create_electrode_table_region(list(range(4)), "all contacts")
    counts = rng.integers(-2000, 2000, size=(int(LFP_HZ * SECONDS), 4)).astype(np.int16)
    lfp = ElectricalSeries(name="LFP", data=counts, electrodes=region, rate=LFP_HZ, conversion=1e-6,
                           channel_conversion=GAINS, offset=0.0)
    nwb.create_processing_module(name="ecephys", description="processed").add(LFP(electrical_series=lfp))
    stim = np.zeros(int(STIM_HZ * SECONDS))
    pulse_starts = (np.arange(0.5, 3.5, 1 / 130.0) * STIM_HZ).astype(int)
    for k in pulse_starts:
        stim[k:k + 3] = 100.0  # 100 µA-counts for 3 samples (100 µs) per pulse
    nwb.add_stimulus(pynwb.TimeSeries(name="STIM", data=stim, unit="amperes", rate=STIM_HZ, conversion=1e-6))
    for t in (0.5, 2.0):
        nwb.add_trial(start_time=t, stop_time=t + 1.0)
    nwb.add_epoch(start_time=1.0, stop_time=1.5, tags=["on"])
    nwb.add_invalid_time_interval(start_time=3.0, stop_time=3.1)
    path = tmp_path_factory.mktemp("nwb") / "rec.nwb"
    with pynwb.NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return path, counts, stim, pulse_starts


@pytest.mark.filterwarnings("ignore:The linked table for DynamicTableRegion")
def test_processing_lfp_with_channel_conversion_electrode_labels_and_intervals(nwb_file):
    path, counts, stim, _ = nwb_file
    rec = read_nwb_recording(path)
    for j in range(4):
        ch = rec.channel(f"C{j}")  # named by the electrodes table's label column
        assert ch.unit == "V" and ch.sample_rate_hz == LFP_HZ and ch.kind == "processing/ecephys"
        # NWB schema: value = data * conversion * channel_conversion + offset
        assert np.array_equal(ch.data, counts[:, j] * 1e-6 * GAINS[j])
    s = rec.channel("STIM")
    assert s.sample_rate_hz == STIM_HZ and s.unit == "A" and np.array_equal(s.data, stim * 1e-6)
    series = {x["series"]: x for x in rec.metadata["series"]}
    assert series["LFP"]["locations"] == ["STN", "STN", "GPi", "GPi"]
    assert series["LFP"]["channel_conversion"] == GAINS.tolist()
    assert [(e["label"], e["time_s"]) for e in rec.events] == [("trials", 0.5), ("on", 1.0), ("trials", 2.0)]
    assert rec.bad_intervals == [(3.0, 3.1)]


def test_stimulation_at_30_khz_beside_lfp_at_1_khz_is_aligned_with_the_stated_anti_aliasing(nwb_file):
    path, counts, stim, pulse_starts = nwb_file
    desc = parse_description({"channels": {"inputs": ["STIM"], "outputs": ["C0", "C1"], "output_unit": "uV",
                                           "input_unit": "uA"},
                              "trials": {"events": ["trials"], "before_s": 0.0, "after_s": 1.0}})
    s = build_session(read_recording(path, desc), desc)
    assert s.sample_rate_hz == LFP_HZ and s.input_units == ("uA",) and s.output_units == ("uV", "uV")
    assert np.allclose(s.y[:, 1], counts[:, 1] * 2.0)  # 1e-6 V x 2 = 2 µV per count
    # the mean of the 30 source samples in each 1 ms model sample: the delivered charge per sample is kept
    expected = (stim * 1e-6 * 1e6).reshape(-1, 30).mean(axis=1)
    assert np.allclose(s.u[:, 0], expected)
    assert s.u[:, 0].sum() / LFP_HZ == pytest.approx(stim.sum() / STIM_HZ)
    align = {a["channel"]: a for a in s.metadata["clock_alignment"]}
    assert align["STIM"]["anti_aliasing"] == "mean" and "mean of the source samples" in align["STIM"]["method"]
    assert align["STIM"]["source_rate_hz"] == STIM_HZ and align["STIM"]["target_rate_hz"] == LFP_HZ
    assert s.trials.tolist() == [[500, 1500], [2000, 3000]]
    assert np.flatnonzero(~s.mask).tolist() == list(range(3000, 3100))


def test_load_session_names_the_way_out_for_processing_series(nwb_file):
    with pytest.raises(FileFormatError, match=r"without acquisition TimeSeries.*processing modules.*stimsteer convert"):
        load_session(nwb_file[0])


def test_load_session_applies_channel_conversion_in_acquisition(tmp_path):
    # Before: ElectricalSeries.channel_conversion was ignored, so channels came back off by x1-4.
    nwb = pynwb.NWBFile(session_description="t", identifier="t2",
                        session_start_time=datetime(2026, 1, 1, tzinfo=timezone.utc))
    dev = nwb.create_device(name="probe")
    group = nwb.create_electrode_group(name="g", description="d", location="CA1", device=dev)
    for _ in range(4):
        nwb.add_electrode(group=group, location="CA1")
    region = nwb.create_electrode_table_region(list(range(4)), "all")
    counts = np.arange(40, dtype=np.int16).reshape(10, 4)
    nwb.add_acquisition(ElectricalSeries(name="ephys", data=counts, electrodes=region, rate=100.0, conversion=0.5,
                                         channel_conversion=GAINS))
    nwb.add_stimulus(pynwb.TimeSeries(name="stim", data=np.ones(10), unit="uA", rate=100.0))
    path = tmp_path / "a.nwb"
    with pynwb.NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    s = load_session(path)
    assert np.array_equal(s.y, counts * 0.5 * GAINS[None, :])


def test_an_nwb_session_opens_lazily_with_the_same_numbers(tmp_path):
    import h5py

    from stimsteer.sysid import Session, save_session
    from stimsteer.sysid.arx import RidgeArx
    from stimsteer.sysid.io.nwb_lazy import open_nwb_session
    from stimsteer.sysid.trial_sources import open_session_source

    rng = np.random.default_rng(11)
    u = rng.standard_normal((3000, 2))
    y = np.cumsum(rng.standard_normal((3000, 1)), axis=0) * 0.1 + 0.3 * np.roll(u[:, :1], 1, axis=0)
    mask = np.ones(3000, dtype=bool)
    mask[1200:1210] = False
    s = Session(u=u, y=y, sample_rate_hz=500.0, trials=[(0, 1500), (1500, 3000)], mask=mask,
                input_names=["a", "b"], output_names=["lfp"], input_units=["uA", "uA"], output_units=["uV"])
    path = save_session(s, tmp_path / "s.nwb")
    loaded = load_session(path)
    with open_nwb_session(path) as f:
        assert isinstance(f._y[0]["ts"].data, h5py.Dataset)  # kept in the file, read by window
        u_w, y_w, m_w = f.read(1195, 1215)
        assert np.array_equal(u_w, loaded.u[1195:1215]) and np.array_equal(m_w, loaded.mask[1195:1215])
        assert f.segments() == loaded.segments() and f.content_hash() == loaded.content_hash()
        assert np.array_equal(f.to_session().y, loaded.y)
        lazy_fit = RidgeArx(output_lags=2, input_lags=2).fit(f)
    whole_fit = RidgeArx(output_lags=2, input_lags=2).fit(loaded)
    assert np.allclose(lazy_fit.input_coefs_, whole_fit.input_coefs_, rtol=1e-10, atol=1e-12)
    with open_session_source(path) as src:
        assert type(src).__name__ == "NwbSessionFile"
