"""Bad stimulation inputs to `stimsteer plan` with physical limits, run as real commands.

Each case: exit code 2, one line on stderr naming the problem, no traceback, nothing written, inputs unchanged.
Plus the good case: the pulse files are written with every check, and a session in mA plans the same pulses as the
same session in µA.
"""

import json
import re

import numpy as np
import pandas as pd
import pytest

from stimsteer.sysid import Session
from stimsteer.sysid.io.dispatch import save_session
from stimsteer.sysid.stimulation import InputMapping, load_stimulation

from .conftest import run_cli, tree_hash

pytestmark = pytest.mark.slow  # each case runs the command (fit and plan) as a user does

_STIM = """
[mapping]
kind = "amplitude"
[sites.a]
kind = "electrical"
phase_width = "90 us"
frequency = "125 Hz"
amplitude_unit = "{unit}"
contact_area = "{area}"
contacts = ["c1"]
{extra}
"""
_LIMITS = """
[physical]
{top}
[physical.sites.a]
amplitude_max_ua = 200.0
{site}
"""


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    """ARX models of one simulated session recorded in mA and in µA."""
    d = tmp_path_factory.mktemp("stim_models")
    g = np.random.default_rng(3)
    T, u = 1500, np.abs(g.normal(size=(1500, 1))) * 0.05
    x, y = np.zeros(2), np.zeros((T, 2))
    A, B = np.array([[0.8, 0.1], [0.0, 0.7]]), np.array([[10.0], [4.0]])
    for k in range(T):
        y[k] = x + 0.01 * g.normal(size=2)
        x = A @ x + B @ u[k]
    out = {}
    (d / "stim.toml").write_text(_STIM.format(unit="mA", area="0.06 cm^2", extra=""))
    recorded = InputMapping(load_stimulation(d / "stim.toml"), 250.0).record()
    for unit, scale in (("mA", 1.0), ("uA", 1000.0), ("rec", 1.0)):
        s = Session(u=u * scale, y=y, sample_rate_hz=250.0, input_names=["a"], output_names=["r1", "r2"],
                    input_units=["mA" if unit == "rec" else unit], output_units=["uV", "uV"],
                    trials=[[0, 500], [500, 1000], [1000, 1500]],
                    metadata={"stimulation": recorded} if unit == "rec" else None)
        save_session(s, d / f"s_{unit}.h5")
        r = run_cli("fit", d / f"s_{unit}.h5", "--route", "indirect", "--method", "arx", "--out",
                    d / f"m_{unit}.h5", "--past-steps", "4", "--horizon-steps", "20")
        assert r.code == 0, r
        out[unit] = d / f"m_{unit}.h5"
    return out


def _files(tmp_path, unit="mA", area="0.06 cm^2", extra="", top="", site=""):
    stim, lim = tmp_path / "stim.toml", tmp_path / "limits.toml"
    stim.write_text(_STIM.format(unit=unit, area=area, extra=extra))
    lim.write_text(_LIMITS.format(top=top, site=site))
    return stim, lim


def _plan(model, stim, lim, out):
    return run_cli("plan", model, "--target", "r1=50", "--limits", lim, "--stimulation", stim, "--out", out,
                   "--horizon-steps", "30")


CASES = {
    "charge-imbalanced waveform": (dict(extra='waveform = "asymmetric"\nsecond_phase_width = "360 us"\n'
                                              "second_phase_amplitude_ratio = 0.5"), r"not charge-balanced"),
    "mW/mm^2 on an electrical site": (dict(site="irradiance_max_mw_per_mm2 = 5.0"),
                                      r"cannot take irradiance_max_mw_per_mm2"),
    "mW/mm^2 as an electrical amplitude unit": (dict(unit="mW/mm^2"), r"is not a current"),
    "micro contact without injection limit": (dict(area="2e-5 cm^2"), r"injection_limit_uc_per_cm2"),
    "frequency outside the declared range": (dict(site="frequency_max_hz = 100.0"), r"outside the declared range"),
    "window budget smaller than one pulse": (dict(top="window_s = 0.1\ncharge_rate_max_uc_per_s = 0.01"),
                                             r"smaller than one pulse"),
    "pulses that overlap their successor": (dict(extra='interphase_gap = "8000 us"'), r"overlap their successor"),
    "energy budget without an impedance": (dict(top="window_s = 0.5\nwindow_energy_max_uj = 1.0"),
                                           r"needs the electrode impedance"),
    "energy budget in a unit of charge": (dict(top="window_s = 0.5\nwindow_energy_max_uc = 1.0"),
                                          r"unknown key 'window_energy_max_uc'|is not an energy"),
    "duty cycle without its window": (dict(site="duty_cycle_max_fraction = 0.5"), r"duty_window_s"),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_bad_stimulation_input_is_one_line_exit_2_and_nothing_written(models, tmp_path, case):
    kwargs, match = CASES[case]
    stim, lim = _files(tmp_path, **kwargs)
    before = tree_hash(stim, lim, models["mA"])
    r = _plan(models["mA"], stim, lim, tmp_path / "out")
    assert r.code == 2, r
    assert len(r.err.strip().splitlines()) == 1 and "Traceback" not in r.err, r
    assert re.search(match, r.err), r
    assert not (tmp_path / "out").exists() and tree_hash(stim, lim, models["mA"]) == before


def test_plan_writes_the_pulse_files_with_checks_and_the_same_pulses_from_ma_and_ua(models, tmp_path):
    tables = {}
    for unit in ("mA", "uA"):
        (tmp_path / unit).mkdir()
        stim, lim = _files(tmp_path / unit, unit=unit, site="charge_per_phase_max_uc = 0.015")
        r = _plan(models[unit], stim, lim, tmp_path / unit / "out")
        assert r.code == 0, r
        out = tmp_path / unit / "out"
        for name in ("plan_parameters.csv", "plan_pulses.csv", "plan_pulses.nwb"):
            assert (out / name).is_file()
        head = (out / "plan_pulses.csv").read_text().splitlines()
        assert head[0] == "# status: optimal" and any(h.startswith("# model_sha256: ") for h in head)
        assert any("check: charge_per_phase site=a" in h and "passed" in h for h in head)
        rec = json.loads((out / "plan.json").read_text())["pulse_plan"]
        assert rec["all_checks_passed"] and rec["session_content_hash"] and rec["versions"]["stimsteer"]
        tables[unit] = pd.read_csv(out / "plan_pulses.csv", comment="#")
        assert tables[unit]["charge_per_phase_uc"].max() <= 0.015 * (1 + 1e-9)
    # the pattern is headed in the model's unit (it was always [uA]), so `predict` takes it back (issue 16)
    assert "in:a [mA]" in (tmp_path / "mA" / "out" / "plan_pattern.csv").read_text()
    r = run_cli("predict", models["mA"], "--pattern", tmp_path / "mA" / "out" / "plan_pattern.csv", "--out",
                tmp_path / "pred")
    assert r.code == 0, r
    a, b = tables["mA"], tables["uA"]
    assert len(a) == len(b) > 0
    assert np.allclose(a["amplitude_ua"], b["amplitude_ua"], rtol=1e-4, atol=1e-3)


def test_the_nwb_pulse_table_reads_back_as_time_intervals(models, tmp_path):
    pynwb = pytest.importorskip("pynwb")
    stim, lim = _files(tmp_path)
    assert _plan(models["mA"], stim, lim, tmp_path / "out").code == 0
    with pynwb.NWBHDF5IO(str(tmp_path / "out" / "plan_pulses.nwb"), "r") as io:
        f = io.read()
        pulses = f.intervals["planned_pulses"].to_dataframe()
        csv = pd.read_csv(tmp_path / "out" / "plan_pulses.csv", comment="#")
        assert np.allclose(pulses["start_time"], csv["onset_s"]) and np.allclose(pulses["amplitude_ua"],
                                                                                 csv["amplitude_ua"])
        assert "checks" in json.loads(f.notes)
        params = f.intervals["planned_parameters"].to_dataframe()
        table = pd.read_csv(tmp_path / "out" / "plan_parameters.csv", comment="#")
        assert np.allclose(params["stop_time"], table["stop_s"]) and len(params) == len(table)
    # the file is written with h5py (sysid/io/nwb_intervals.py): pynwb's schema validator is the outside check
    assert pynwb.validate(path=str(tmp_path / "out" / "plan_pulses.nwb")) == []


def test_plan_takes_the_description_recorded_in_the_model(models, tmp_path):
    _, lim = _files(tmp_path)
    r = run_cli("plan", models["rec"], "--target", "r1=50", "--limits", lim, "--out", tmp_path / "out",
                "--horizon-steps", "30")
    assert r.code == 0, r
    assert "checks all passed" in r.out and (tmp_path / "out" / "plan_pulses.csv").is_file()
    # physical limits and a model without a recorded description: refused, naming the fix
    r = run_cli("plan", models["mA"], "--target", "r1=50", "--limits", lim, "--out", tmp_path / "out2",
                "--horizon-steps", "30")
    assert r.code == 2 and "--stimulation FILE" in r.err and not (tmp_path / "out2").exists(), r


# the windows bind within the 30-step plan: 0.4 and 0.36 µC against up to 30 x 0.018 µC (the charge budget is exact
# since it is linear; the earlier Σ u² stand-in bound at 2.0 and 2.1 µC/s already)
@pytest.mark.parametrize("window", [("0.5", "0.8"), ("0.3", "1.2")])
def test_a_binding_charge_rate_window_plans_the_same_pulses_from_ma_and_ua(models, tmp_path, window):
    """The unit round trip of issue 16 with the charge-rate window binding: both plans optimal, exit 0, and the same
    pulse list in µA to 1e-3 µA (1/200 000 of the 200 µA bound). Before the cone rows were scaled by the amplitude
    bound (control/mpc/_core.py, _budget.py), the µA plans came back "optimal_inaccurate" up to 0.085 µA (window
    0.5 s) and 0.012 µA (0.3 s) away from the mA plans, and other windows failed (safe fallback, exit 3) with an
    amplitude 0.0065 µA past its bound. Common practice (the same physical problem gives the same plan), no source."""
    window_s, rate = window
    tables = {}
    for unit in ("mA", "uA"):
        (tmp_path / unit).mkdir()
        stim, lim = _files(tmp_path / unit, unit=unit, top=f"window_s = {window_s}\ncharge_rate_max_uc_per_s = {rate}")
        out = tmp_path / unit / "out"
        r = _plan(models[unit], stim, lim, out)
        assert r.code == 0, r
        rec = json.loads((out / "plan.json").read_text())
        assert rec["status"] == "optimal" and not rec["fallback"], rec["message"]
        assert rec["active_counts"]["energy_budget"] == 1  # the window binds
        window = next(c for c in rec["pulse_plan"]["checks"] if c["rule"] == "charge_rate_window")
        # a 125 Hz train on a 250 Hz grid: every sample may hold a pulse as far as the plan knows, so about half
        assert window["value"] <= window["limit"] * (1 + 1e-9) and window["value"] >= 0.45 * window["limit"]
        assert rec["pulse_plan"]["all_checks_passed"]
        tables[unit] = pd.read_csv(out / "plan_pulses.csv", comment="#")
    a, b = tables["mA"], tables["uA"]
    assert len(a) == len(b) > 0
    assert np.allclose(a["onset_s"], b["onset_s"], rtol=0, atol=1e-12)
    assert np.max(np.abs(a["amplitude_ua"] - b["amplitude_ua"])) <= 1e-3
    assert np.max(a["amplitude_ua"]) <= 200.0 and np.max(b["amplitude_ua"]) <= 200.0


def test_plan_json_limit_keys_say_the_models_unit(models, tmp_path):
    """plan.json wrote the compiled limits of a model in mA as ``amplitude_max_ua: [0.2]``: 0.2 mA under a µA key.
    The keys now carry the real unit; the µA model keeps ``_ua`` (common practice: a key names its unit, no source)."""
    keys = {}
    for unit in ("mA", "uA"):
        (tmp_path / unit).mkdir()
        stim, lim = _files(tmp_path / unit, unit=unit)
        r = _plan(models[unit], stim, lim, tmp_path / unit / "out")
        assert r.code == 0, r
        keys[unit] = json.loads((tmp_path / unit / "out" / "plan.json").read_text())["limits"]
    assert keys["mA"]["amplitude_max_ma"] == [pytest.approx(0.2)] and "amplitude_max_ua" not in keys["mA"]
    assert keys["uA"]["amplitude_max_ua"] == [pytest.approx(200.0)] and "amplitude_max_ma" not in keys["uA"]
    assert keys["mA"]["effective_max_ma"] == [pytest.approx(0.2)]


def test_an_energy_budget_in_microjoules_is_kept_by_the_plan_and_its_pulse_files(models, tmp_path):
    # Joule's law on a resistive electrode (common practice, no source): 200 µA in 1 kΩ for 2 x 90 µs is 7.2 nJ per
    # pulse; the 30-step plan (0.12 s) holds 15 pulses, 0.108 µJ at full amplitude. A 0.1 µJ budget binds; a train at
    # half the sample rate reaches about half of it (every sample may hold a pulse as far as the plan knows).
    stim, lim = _files(tmp_path, top="window_s = 0.5\nwindow_energy_max_uj = 0.1", site="impedance_kohm = 1.0")
    r = _plan(models["mA"], stim, lim, tmp_path / "out")
    assert r.code == 0, r
    rec = json.loads((tmp_path / "out" / "plan.json").read_text())
    row = next(c for c in rec["pulse_plan"]["checks"] if c["rule"] == "energy_window")
    assert row["passed"] and 0.45 * 0.1 <= row["value"] <= 0.1 * (1 + 1e-9)
    assert rec["active_counts"]["energy_budget"] == 1
    assert "Joule" in row["source"]
