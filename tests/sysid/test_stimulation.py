"""The stimulation description, its units (pint), the declared mapping, and pulses onto the grid and back."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.stimulation import (InputMapping, StimulationDescription, convert, decode_plan,
                                         encode_pulse_table, parameter_segments, parse_quantity)


def _desc(unit="uA", mapping="amplitude", **extra):
    a = {"kind": "electrical", "phase_width": "90 us", "frequency": "250 Hz", "amplitude_unit": unit,
         "contact_area": "0.06 cm^2", "contacts": ["c1"], **extra}
    o = {"kind": "optical", "pulse_width": "5 ms", "frequency": "20 Hz", "illuminated_area": "0.04 mm^2"}
    sites = {"a": a} if mapping == "charge_rate" else {"a": a, "o": o}
    return StimulationDescription.from_dict({"mapping": {"kind": mapping}, "sites": sites})


def test_units_convert_through_pint_or_are_refused_with_the_reason():
    assert convert(parse_quantity("0.15 mA", "x"), "current", "x") == pytest.approx(150.0)
    assert convert(parse_quantity("90 µs", "x"), "time", "x") == pytest.approx(90.0)
    assert convert(parse_quantity("2 W/cm^2", "x"), "irradiance", "x") == pytest.approx(20.0)  # 1 W/cm² = 10 mW/mm²
    with pytest.raises(SessionError, match=r"is not a current"):
        convert(parse_quantity("3 mW/mm^2", "amplitude"), "current", "amplitude")
    with pytest.raises(SessionError, match=r"not a unit stimsteer knows"):
        parse_quantity("3 bananas", "amplitude")


def test_the_description_reads_every_field_in_its_units():
    d = _desc(unit="mA", waveform="asymmetric", second_phase_width="360 us", interphase_gap="20 us",
              leading_phase="anodic", train_on="2 s", train_off="3 s", ramp_up="0.2 s")
    a = d.site("a")
    assert (a.phase_width_us, a.second_phase_width_us, a.interphase_gap_us) == (90.0, 360.0, 20.0)
    assert a.second_phase_ratio == pytest.approx(0.25) and a.leading_phase == "anodic"
    assert a.train.duty == pytest.approx(0.4) and a.amplitude_factor_ua() == pytest.approx(1000.0)
    assert d.site("o").illuminated_area_mm2 == pytest.approx(0.04)


@pytest.mark.parametrize("extra, match", [
    ({"second_phase_amplitude_ratio": 0.5, "waveform": "asymmetric", "second_phase_width": "360 us"},
     r"not charge-balanced"),
    ({"waveform": "symmetric", "second_phase_width": "100 us"}, r"symmetric biphasic waveform has equal phases"),
    ({"leading_phase": "negative"}, r"leading_phase must be one of"),
    ({"frequency": "6 kHz"}, r"overlap their successor"),
    ({"amplitude_unit": "mW/mm^2"}, r"is not a current"),
    ({"train_on": "1 s"}, r"train_on and train_off together"),
])
def test_bad_descriptions_are_refused_with_one_clear_reason(extra, match):
    with pytest.raises(SessionError, match=match):
        _desc(**extra)


def test_the_mapping_is_recorded_and_non_negative_in_model_units():
    m = InputMapping(_desc(unit="mA"), 250.0)
    assert m.model_units() == ("mA", "mW/mm^2") and m.gain().tolist() == pytest.approx([1e-3, 1.0])
    rec = m.record()
    assert rec["name"] == "amplitude" and "held one pulse period" in rec["rule"]
    assert rec["description"]["sites"]["a"]["leading_phase"] == "cathodic"  # polarity: a category
    # charge-rate mapping: u = I · PW · f, µC/s (100 µA, 90 µs, 250 Hz -> 2.25 µC/s; Q = I·PW, common practice)
    mc = InputMapping(_desc(mapping="charge_rate"), 250.0)
    assert mc.to_model([[100.0]])[0, 0] == pytest.approx(100e-6 * 90.0 * 250.0)


def test_pulses_onto_the_grid_and_back_are_the_same_when_a_pulse_falls_in_every_sample():
    m = InputMapping(_desc(unit="uA"), 250.0)  # 250 Hz train on a 250 Hz grid: one pulse per sample
    u = np.zeros((40, 2))
    u[5:15, 0] = np.linspace(10, 100, 10)
    pulses = decode_plan(u, m)
    el = pulses[pulses["kind"] == "electrical"]
    assert len(el) == 10 and el["onset_s"].iloc[0] == pytest.approx(5 / 250.0)
    # Q = I · PW (common practice): 100 µA for 90 µs is 0.009 µC per phase
    assert el["charge_per_phase_uc"].iloc[-1] == pytest.approx(100e-6 * 90.0)
    table = el.rename(columns={"onset_s": "time_s", "amplitude_ua": "amplitude"}).assign(amplitude_unit="uA")
    back, rec = encode_pulse_table(table[["time_s", "site", "amplitude", "amplitude_unit"]], m, n_samples=40)
    assert np.allclose(back[:, 0], u[:, 0]) and rec["n_pulses"] == 10
    # the same pulses in mA give the same model input in µA
    back_ma, _ = encode_pulse_table(table.assign(amplitude=table["amplitude"] / 1000, amplitude_unit="mA")[
        ["time_s", "site", "amplitude", "amplitude_unit"]], m, n_samples=40)
    assert np.allclose(back_ma, back)
    seg = parameter_segments(u, m)
    assert set(seg["state"]) == {"on", "off"} and (seg["stop_s"] > seg["start_s"]).all()


def test_parameter_rows_at_a_bound_merge_to_rounding_and_split_on_a_real_step():
    """Seen in the demo's plan_pulses: four samples on the 50 µA bound, off it by 0 to 4e-14 µA, were four rows
    of plan_parameters.csv (exact equality), so the table changed with rounding upstream."""
    m = InputMapping(_desc(unit="uA"), 250.0)
    u = np.zeros((8, 2))
    u[:, 0] = [10.0, 50.0, 50.0 - 1e-14, 50.0 + 1e-14, 50.0 - 2e-14, 49.99, 49.99, 0.0]
    a = parameter_segments(u, m)
    a = a[a["site"] == "a"]
    # the rounding-level run is one row (its largest amplitude); 0.01 µA, 2e-4 of the value, is a row of its own
    assert a["amplitude_ua"].tolist() == [10.0, 50.0 + 1e-14, 49.99, 0.0]
    assert a["start_s"].tolist() == pytest.approx([0.0, 0.004, 0.02, 0.028])
    # against the bound (200 µA): 1e-9 of it is 2e-7 µA; a step of 1e-6 µA splits, one of 1e-7 µA does not
    u[1:5, 0] = [50.0, 50.0 + 1e-7, 50.0, 50.0 + 1e-6]
    b = parameter_segments(u, m, scale=[200.0, 5.0])
    assert b[b["site"] == "a"]["amplitude_ua"].tolist() == [10.0, 50.0 + 1e-7, 50.0 + 1e-6, 49.99, 0.0]
    # on and off never merge, however small the "on" amplitude next to the off sample
    u[:, 0] = [0.0, 1e-6, 1e-6, 0.0, 0.0, 0.0, 0.0, 10.0]
    c = parameter_segments(u, m, scale=[200.0, 5.0])
    assert c[c["site"] == "a"]["state"].tolist() == ["off", "on", "off", "on"]


def test_the_parameter_table_and_the_pulse_list_agree_on_which_samples_deliver():
    # Seen in the demo's plan_pulses: a solver's 5.6e-14 µA was "on" in plan_parameters.csv with no pulse in
    # plan_pulses.csv (the pulse list drops values at or below 1e-9 of the largest, the table did not).
    m = InputMapping(_desc(unit="uA"), 250.0)  # one pulse per sample
    u = np.zeros((10, 2))
    u[:, 0] = [5.6e-14, 0.0, 20.0, 20.0, 7.9e-15, 0.0, 30.0, 0.0, 0.0, 3.8]
    pulses = decode_plan(u, m)
    seg = parameter_segments(u, m)
    a = seg[seg["site"] == "a"]
    on = a[a["state"] == "on"]
    onsets = pulses[pulses["site"] == "a"]["onset_s"].to_numpy()
    # every "on" segment holds pulses, and every pulse lies in an "on" segment
    assert all(((onsets >= r.start_s - 1e-12) & (onsets < r.stop_s - 1e-12)).any() for r in on.itertuples())
    assert all(((on["start_s"] <= t + 1e-12) & (t < on["stop_s"] - 1e-12)).any() for t in onsets)
    assert on["amplitude_ua"].tolist() == [20.0, 30.0, 3.8] and len(onsets) == 4


def test_irradiance_is_power_over_illuminated_area():
    # definition: irradiance = power / area; 0.4 mW on 0.04 mm² = 10 mW/mm²
    m = InputMapping(_desc(), 250.0)
    u, _ = encode_pulse_table(pd.DataFrame({"time_s": [0.1], "site": ["o"], "power_mw": [0.4]}), m, n_samples=50)
    assert u[25, 1] == pytest.approx(10.0)


@pytest.mark.parametrize("rows, match", [
    ([{"time_s": 0.1, "site": "a", "amplitude": 10.0}, {"time_s": 0.10005, "site": "a", "amplitude": 10.0}],
     r"overlap"),
    ([{"time_s": 0.1, "site": "a", "amplitude": 10.0, "second_phase_amplitude": 5.0}], r"charge-imbalanced"),
    ([{"time_s": 0.1, "site": "a", "amplitude": -10.0}], r"negative; amplitudes are magnitudes"),
    ([{"time_s": 0.1, "site": "a", "amplitude": 10.0, "amplitude_unit": "mW/mm^2"}], r"is not a current"),
    ([{"time_s": 0.1, "site": "a", "amplitude": 10.0, "leading_phase": "anodic"}], r"declare one site per"),
    ([{"time_s": 0.1, "site": "a", "amplitude": 10.0, "phase_width_us": 60.0}], r"holds width fixed"),
    ([{"time_s": 0.1, "site": "zz", "amplitude": 10.0}], r"does not\s+declare"),
])
def test_bad_pulse_tables_are_refused_naming_the_pulse(rows, match):
    m = InputMapping(_desc(), 250.0)
    with pytest.raises(SessionError, match=match):
        encode_pulse_table(rows, m, n_samples=100)


def test_events_encode_by_the_description_and_the_session_record_carries_the_mapping():
    from stimsteer.sysid import Session
    from stimsteer.sysid._records import session_record
    from stimsteer.sysid.events import encode_pulses

    d = _desc(unit="mA")
    rows = [{"time_s": 0.02, "site": "a", "amplitude": 0.1}, {"time_s": 0.06, "site": "o", "amplitude": 2.0}]
    u, rec = encode_pulses(rows, ["o", "a"], sample_rate_hz=250.0, n_samples=50, stimulation=d)
    assert u[5].tolist() == pytest.approx([0.0, 0.1]) and u[15].tolist() == pytest.approx([2.0, 0.0])
    assert rec["model_units"] == ["mW/mm^2", "mA"] and rec["name"] == "amplitude"
    s = Session(u=u, y=np.zeros((50, 1)), sample_rate_hz=250.0, input_names=["o", "a"], output_names=["y"],
                input_units=rec["model_units"], metadata={"stimulation": rec})
    assert session_record(s)["stimulation"]["description"]["sites"]["a"]["amplitude_unit"] == "mA"
