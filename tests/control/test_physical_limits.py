"""Limits in physical terms: compiled bounds, outside checks, and the safety properties of delivered pulses.

The property tests decode model inputs into pulses and check every pulse and every rolling window of delivered
charge directly (numpy, continuous-time windows), independently of the compiled bounds they test.
"""

import dataclasses
import math

import numpy as np
import pytest

from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.physical_limits import PhysicalLimits, compile_limits
from stimsteer.control.pulse_plan import checks_pass, safety_checks
from stimsteer.control.shannon import shannon_k
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.exceptions import LimitsError
from stimsteer.sysid.stimulation import InputMapping, StimulationDescription


def _mapping(rate=250.0, area="0.06 cm^2", freq="125 Hz", pw="90 us", unit="uA", asym=False, optical=False):
    a = {"kind": "electrical", "phase_width": pw, "frequency": freq, "amplitude_unit": unit, "contact_area": area}
    if asym:
        a.update(waveform="asymmetric", second_phase_width="45 us")  # shorter return phase: stronger
    sites = {"a": a}
    if optical:
        sites["o"] = {"kind": "optical", "pulse_width": "5 ms", "frequency": "20 Hz"}
    return InputMapping(StimulationDescription.from_dict({"sites": sites}), rate)


def _limits(**site):
    return PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ua": 500.0, **site}}})


# ------------------------------------------------------------------------------------------------ outside checks
def test_shannon_worked_value_and_the_bound_it_gives_on_a_macro_contact():
    # Shannon (1992): 30 µC/cm² on 0.06 cm² (Q = 1.8 µC) gives k = log10(30) + log10(1.8) = 1.732
    assert shannon_k(1.8, 0.06) == pytest.approx(1.732, abs=5e-4)
    # the compiled bound sits exactly on k = 1.75 for a 0.06 cm² contact at 90 µs (Q = I·PW, D = Q/A)
    c = compile_limits(_limits(amplitude_max_ua=1e6), _mapping())
    q = c.amplitude_max[0] * 90e-6
    assert c.binding_rule == ("shannon",) and shannon_k(q, 0.06) == pytest.approx(1.75, abs=1e-12)


def test_charge_per_phase_and_density_on_a_common_macro_contact():
    # a cylindrical DBS contact 1.27 mm across, 1.5 mm long: A = π·d·h = 0.0599 cm² (common practice: area from
    # the stated dimensions); 3 mA for 90 µs gives Q = I·PW = 0.27 µC and D = Q/A = 4.51 µC/cm²
    area = math.pi * 0.127 * 0.15
    m = _mapping(area=f"{area} cm^2", unit="mA")
    c = compile_limits(_limits(amplitude_max_ua=3000.0), m)
    _, checks = safety_checks(np.full((10, 1), 3.0), m, c)
    shannon = next(r for r in checks if r["rule"] == "shannon")
    assert area == pytest.approx(0.0599, abs=1e-4)
    assert shannon["value"] == pytest.approx(math.log10(0.27 / area) + math.log10(0.27))
    assert checks_pass(checks)


def test_the_two_ends_of_the_frequency_range_are_named_apart():
    """A plan file listed both frequency checks as "frequency" (one with limit 300, one with limit 2) and a reader
    could not tell the floor from the ceiling."""
    m = _mapping()
    _, checks = safety_checks(np.full((10, 1), 1.0), m, compile_limits(_limits(amplitude_max_ua=100.0), m))
    ends = {r["rule"]: r for r in checks if r["rule"].startswith("frequency")}
    assert set(ends) == {"frequency_max", "frequency_min"}
    assert ends["frequency_max"]["limit"] >= ends["frequency_min"]["limit"]
    assert ends["frequency_max"]["source"] == ends["frequency_min"]["source"]


def test_micro_contacts_use_the_declared_injection_limit_not_shannon():
    # platinum: ~50-150 µC/cm² (from memory; Cogan 2008 reviews such values); 100 µC/cm² on 2000 µm² at 100 µs:
    # Q = 100 · 2e-5 = 0.002 µC, I = 20 µA
    m = _mapping(area="2e-5 cm^2", pw="100 us")
    with pytest.raises(LimitsError, match=r"below the macro range.*injection_limit_uc_per_cm2"):
        compile_limits(_limits(), m)
    c = compile_limits(_limits(injection_limit_uc_per_cm2=100.0), m)
    assert c.binding_rule == ("charge_injection",) and c.amplitude_max[0] == pytest.approx(20.0)


def test_an_asymmetric_waveform_bounds_its_stronger_return_phase():
    c = compile_limits(_limits(amplitude_max_ua=200.0), _mapping(asym=True))
    assert c.amplitude_max[0] == pytest.approx(100.0)  # PW₁/PW₂ = 2: the return phase is twice as strong


@pytest.mark.parametrize("site, window, match", [
    ({"frequency_max_hz": 100.0}, {}, r"frequency 125 Hz is outside the declared range"),
    ({"irradiance_max_mw_per_mm2": 5.0}, {}, r"cannot take irradiance_max_mw_per_mm2"),
    ({}, {"window_s": 0.1, "charge_rate_max_uc_per_s": 0.01}, r"smaller than one pulse"),
    ({"amplitude_max_lightyears": 1.0}, {}, r"unknown key"),
    ({"duty_cycle_max_fraction": 0.0}, {}, r"duty_cycle_max_fraction must be in"),
])
def test_bad_physical_limits_are_refused(site, window, match):
    with pytest.raises(LimitsError, match=match):
        lim = PhysicalLimits.from_dict({**window, "sites": {"a": {"amplitude_max_ua": 500.0, **site}}})
        compile_limits(lim, _mapping())


def test_amplitude_keys_in_ma_and_ua_are_the_same_limit():
    a = PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ma": 0.25}}})
    b = PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ua": 250.0}}})
    assert a.sites["a"].amplitude_max_ua == pytest.approx(b.sites["a"].amplitude_max_ua)


# ------------------------------------------------------------------------------------------------ properties
# The property tests live in tests/control/test_sequence_limits.py (every limit kind, random problems and closed
# loops on both routes, infeasible histories).


def test_an_applied_past_over_the_charge_budget_is_reported_infeasible_and_nothing_is_delivered(tmp_path):
    from stimsteer.control._plan_physical import PhysicalPlan

    m = _mapping(rate=250.0, freq="250 Hz")
    c = compile_limits(PhysicalLimits.from_dict(
        {"window_s": 0.2, "charge_rate_max_uc_per_s": 2.0, "sites": {"a": {"amplitude_max_ua": 200.0}}}), m)
    lim = dataclasses.replace(c.stim_limits, input_names=None)
    model = StateSpaceModel(A=[[0.9]], B=[[1.0]], C=[[1.0]], past_steps=1)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=10).fit()
    past = np.full((60, 1), 200.0)  # a window of full-amplitude pulses: 51 x 0.018 µC >> 0.4 µC
    plan = ctrl.plan(past, np.zeros((60, 1)), target=np.full((10, 1), 50.0))
    assert plan.status == "infeasible" and not plan.ok  # reported, never relaxed
    pp = PhysicalPlan(mapping=m, compiled=c, u_past=past)
    rec = pp.write(tmp_path, plan, {"model_file": None, "model_sha256": None, "session_content_hash": None,
                                    "versions": {}})
    assert rec["status"].startswith("not delivered") and not pp.delivered
    import pandas as pd

    assert len(pd.read_csv(tmp_path / "plan_pulses.csv", comment="#")) == 0  # zero stimulation: no pulse
    window = next(r for r in rec["planned_checks"] if r["rule"] == "charge_rate_window")
    assert not window["passed"] and window["value"] > window["limit"]  # the applied past already broke it


def test_optical_sites_are_bounded_by_irradiance_and_refuse_currents_and_hot_duty():
    # irradiance = power / illuminated area (definition): the bound is on mW/mm², converted from W/cm² keys too
    m = _mapping(optical=True)
    lim = PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ua": 100.0},
                                              "o": {"irradiance_max_w_per_cm2": 0.5}}})
    c = compile_limits(lim, m)
    assert c.amplitude_max[1] == pytest.approx(5.0) and c.binding_rule[1] == "irradiance"
    _, checks = safety_checks(np.column_stack([np.zeros(20), np.full(20, 5.0)]), m, c)
    assert checks_pass(checks) and any(r["rule"] == "irradiance" for r in checks)
    with pytest.raises(LimitsError, match=r"is optical: it cannot take a current"):
        compile_limits(PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ua": 100.0},
                                                           "o": {"amplitude_max_ua": 5.0}}}), m)
    # 5 ms x 20 Hz = 10 % light-on while the train is on: a 5 % limit leaves the plan on half of every window
    c = compile_limits(PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ua": 100.0},
                                                           "o": {"irradiance_max_mw_per_mm2": 5.0,
                                                                 "duty_cycle_max_fraction": 0.05,
                                                                 "duty_window_s": 1.0}}}), m)
    t = c.stim_limits.train_limits
    assert t.duty_max_steps[1] == 125 and t.duty_window_steps[1] == 250 and t.duty_max_steps[0] is None
    trained = _mapping(optical=True).description.to_dict()  # a declared train cycle runs whatever the plan does
    with pytest.raises(LimitsError, match=r"duty cycle 0.1 exceeds"):
        sites = {"a": {"kind": "electrical", "phase_width": "90 us", "frequency": "125 Hz", "contact_area": "0.06 cm^2"},
                 "o": {"kind": "optical", "pulse_width": "5 ms", "frequency": "20 Hz", "train_on": "1 s",
                       "train_off": "0 s"}}
        compile_limits(PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ua": 100.0},
                                                           "o": {"irradiance_max_mw_per_mm2": 5.0,
                                                                 "duty_cycle_max_fraction": 0.05}}}),
                       InputMapping(StimulationDescription.from_dict({"sites": sites}), 250.0))
    assert trained["sites"]["o"]["train_on_s"] is None
