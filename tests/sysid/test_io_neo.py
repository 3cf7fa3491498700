"""Neo blocks written by Neo's own NeoMatlabIO, read back through stimsteer: AnalogSignal units, rates and start
times, Events, Epochs and SpikeTrains; a session with a binned spike rate as a derived output."""

import numpy as np
import pytest

neo = pytest.importorskip("neo")
pq = pytest.importorskip("quantities")

from neo.io import NeoMatlabIO

from stimsteer.sysid.description import parse_description
from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid import Session
from stimsteer.sysid.from_recording import build_session, read_recording, session_from_neo
from stimsteer.sysid.io.detect import detect_recording
from stimsteer.sysid.io.neo import recording_from_neo

LFP_HZ, STIM_HZ = 2000.0, 10000.0


@pytest.fixture(scope="module")
def block():
    rng = np.random.default_rng(20261201)
    seg = neo.Segment(name="s0")
    lfp = rng.standard_normal((4000, 2))  # 2 s at 2 kHz, in mV
    seg.analogsignals.append(neo.AnalogSignal(lfp, units="mV", sampling_rate=2 * pq.kHz, t_start=0.5 * pq.s,
                                              name="lfp"))
    stim = np.zeros((20000, 1))
    stim[5000:5010] = 50.0  # one 1 ms block of 50 µA at 1.0 s
    seg.analogsignals.append(neo.AnalogSignal(stim, units="uA", sampling_rate=10 * pq.kHz, t_start=0.5 * pq.s,
                                              name="stim"))
    seg.events.append(neo.Event(times=[1.0, 1.8] * pq.s, labels=np.array(["go", "go"]), name="trig"))
    seg.epochs.append(neo.Epoch(times=[1200.0] * pq.ms, durations=[50.0] * pq.ms, labels=np.array(["train"]),
                                name="ep"))
    spikes = np.sort(rng.uniform(0.5, 2.5, 300))
    seg.spiketrains.append(neo.SpikeTrain(spikes * pq.s, t_start=0.5 * pq.s, t_stop=2.5 * pq.s, name="unit1"))
    b = neo.Block()
    b.segments.append(seg)
    return b, lfp, stim, spikes


@pytest.fixture(scope="module")
def mat_file(block, tmp_path_factory):
    path = tmp_path_factory.mktemp("neo") / "rec.mat"
    NeoMatlabIO(str(path)).write_block(block[0])  # Neo's own writer
    return path


def test_a_neo_file_reads_back_values_units_rates_events_and_spikes(block, mat_file):
    _, lfp, stim, spikes = block
    assert detect_recording(mat_file) == "neo-matlab"
    rec = read_recording(mat_file, parse_description({"channels": {"inputs": ["stim"], "outputs": ["lfp_0"]}}))
    for j in range(2):
        ch = rec.channel(f"lfp_{j}")
        assert ch.unit == "mV" and ch.sample_rate_hz == LFP_HZ and ch.start_time_s == 0.5
        assert np.array_equal(ch.data, lfp[:, j])
    s = rec.channel("stim")
    assert s.unit == "uA" and s.sample_rate_hz == STIM_HZ and np.array_equal(s.data, stim[:, 0])
    assert [(e["label"], e["time_s"], e["duration_s"]) for e in rec.events] == [
        ("go", 1.0, 0.0), ("train", pytest.approx(1.2), pytest.approx(0.05)), ("go", 1.8, 0.0)]
    assert np.array_equal(rec.spike_times["unit1"], spikes)


def test_a_session_from_a_block_aligns_rates_converts_units_and_bins_spikes(block):
    b, lfp, _stim, spikes = block
    desc = {"channels": {"inputs": ["stim"], "outputs": ["lfp_0", "lfp_1"], "output_unit": "uV"},
            "biomarkers": [{"kind": "spike_rate", "units": ["unit1"]}],
            "trials": {"events": ["go"], "before_s": 0.1, "after_s": 0.2}}
    s = session_from_neo(b, desc)
    assert s.sample_rate_hz == LFP_HZ and s.output_units == ("uV", "uV", "Hz")
    same = Session.from_neo(b, desc)  # the classmethod is the same call
    assert np.array_equal(same.y, s.y) and np.array_equal(same.u, s.u)
    assert np.allclose(s.y[:, 0], lfp[:, 0] * 1000.0)
    # the 1 ms block of 50 µA at 10 kHz is 2 model samples of 50 µA at 2 kHz (mean over each model period)
    assert np.flatnonzero(s.u[:, 0]).tolist() == [1000, 1001] and np.allclose(s.u[1000:1002, 0], 50.0)
    rate = s.y[:, 2]
    assert rate.sum() / LFP_HZ == pytest.approx(np.sum((spikes >= 0.5) & (spikes < 2.5)))
    assert s.metadata["derived_outputs"]["unit1_rate"]["unit"] == "Hz"
    assert s.trials.tolist() == [[800, 1400], [2400, 3000]]
    assert s.metadata["start_time_s"] == 0.5


def test_neo_bad_input(block):
    b = block[0]
    with pytest.raises(SessionError, match=r"segment 3 does not exist"):
        recording_from_neo(b, segment=3)
    with pytest.raises(SessionError, match=r"spike units \['unit9'\] are not in the recording; it has \['unit1'\]"):
        session_from_neo(b, {"channels": {"inputs": ["stim"], "outputs": ["lfp_0"]},
                             "biomarkers": [{"kind": "spike_rate", "units": ["unit9"]}]})
    with pytest.raises(SessionError, match=r"'lfp_0' is in 'mV', which cannot be converted to 's'"):
        session_from_neo(b, {"channels": {"inputs": ["stim"], "outputs": ["lfp_0"], "output_unit": "s"}})
