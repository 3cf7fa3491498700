"""Limits in physical terms: compiled bounds, outside checks, and the safety properties of delivered pulses.

The property tests decode model inputs into pulses and check every pulse and every rolling window of delivered
charge directly (numpy, continuous-time windows), independently of the compiled bounds they test.
"""

import dataclasses
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.mpc._budget import _RollingBudget
from stimsteer.control.physical_limits import PhysicalLimits, compile_limits
from stimsteer.control.plants import LinearNetworkPlant, record_session
from stimsteer.control.pulse_plan import checks_pass, safety_checks, window_charges_uc
from stimsteer.control.random_networks import random_network
from stimsteer.control.shannon import shannon_k
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.exceptions import LimitsError
from stimsteer.sysid.stimulation import InputMapping, StimulationDescription, decode_plan


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
def _random_case(draw_seed):
    g = np.random.default_rng(draw_seed)
    rate = float(g.choice([100.0, 250.0, 1000.0]))
    freq = float(g.uniform(5.0, 1.5 * rate))
    pw = float(g.uniform(20.0, 200.0))
    if pw * 2e-6 * freq >= 0.9:
        freq = 0.4 / (pw * 2e-6)
    area = float(10 ** g.uniform(-5.5, -0.5))
    unit = str(g.choice(["uA", "mA"]))
    m = _mapping(rate=rate, area=f"{area} cm^2", freq=f"{freq} Hz", pw=f"{pw} us", unit=unit,
                 asym=bool(g.random() < 0.3))
    site = {"amplitude_max_ua": float(g.uniform(10.0, 3000.0))}
    if g.random() < 0.5:
        site["charge_per_phase_max_uc"] = float(g.uniform(0.001, 0.3))
    if area < 1e-3 or g.random() < 0.3:
        site["injection_limit_uc_per_cm2"] = float(g.uniform(30.0, 3000.0))
    top = {}
    if g.random() < 0.7:
        top = {"window_s": float(g.uniform(0.05, 2.0)), "charge_rate_max_uc_per_s": float(10 ** g.uniform(-1, 2))}
    return g, m, {**top, "sites": {"a": site}}


@pytest.mark.slow
@settings(max_examples=1000, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1))
def test_any_input_inside_the_compiled_limits_delivers_only_safe_pulses(seed):
    g, m, table = _random_case(seed)
    try:
        c = compile_limits(PhysicalLimits.from_dict(table), m)
    except LimitsError as exc:  # refused (window smaller than one pulse): reported, never relaxed
        assert "smaller than one pulse" in str(exc)
        return
    lim = c.stim_limits
    lo, hi = lim.input_bounds()
    T = int(g.integers(20, 120))
    u = g.uniform(0, 1.2, size=(T, 1)) * hi  # some samples beyond the bound: clipped like a controller's box
    u = np.clip(u, lo, hi)
    if lim.energy_budget_ua2 is not None:
        bud = _RollingBudget(lim.energy_budget_ua2, lim.energy_window_steps, T, None)
        u = bud.blend(u, np.zeros_like(u), bud.history(np.zeros((0, 1))))
    pulses = decode_plan(u, m)
    site = m.sites[0]
    peak = pulses["amplitude_ua"].max() * max(1.0, site.second_phase_ratio) if len(pulses) else 0.0
    lim_a = table["sites"]["a"]
    assert peak <= lim_a["amplitude_max_ua"] * (1 + 1e-9)
    q = pulses["charge_per_phase_uc"].to_numpy()
    if "charge_per_phase_max_uc" in lim_a:
        assert np.all(q <= lim_a["charge_per_phase_max_uc"] * (1 + 1e-9))
    area = site.contact_area_cm2
    if area >= 1e-3 and len(q):
        assert np.all(np.log10(q / area) + np.log10(q) <= 1.75 + 1e-9)  # Shannon (1992)
    if "injection_limit_uc_per_cm2" in lim_a:
        assert np.all(q / area <= lim_a["injection_limit_uc_per_cm2"] * (1 + 1e-9))
    if "window_s" in table:
        worst = np.max(window_charges_uc(pulses, table["window_s"]), initial=0.0)
        assert worst <= table["window_s"] * table["charge_rate_max_uc_per_s"] * (1 + 1e-9)
    assert checks_pass(safety_checks(u, m, c)[1])


def _loop_case(seed):
    """A random stable network driven through one site (positive gains, a far positive target, so the loop wants
    to stimulate), a train at the sample rate or half of it, and a charge-rate budget well below the full train."""
    g = np.random.default_rng(seed)
    n, p = int(g.integers(2, 4)), int(g.integers(1, 3))
    A = random_network(n, density=0.6, seed=g, scale=float(g.uniform(0.5, 0.9)), self_weight=0.3, signed=False)
    freq = "250 Hz" if seed % 2 else "125 Hz"
    m = _mapping(rate=250.0, area=str(g.choice(["0.06 cm^2", "2e-5 cm^2"])), freq=freq, unit="uA")
    site = {"amplitude_max_ua": float(g.uniform(50, 400)), "injection_limit_uc_per_cm2": 200.0}
    bound = compile_limits(PhysicalLimits.from_dict({"sites": {"a": site}}), m).amplitude_max[0]
    full = bound * 90e-6 * m.sites[0].frequency_hz  # µC/s of the full train at the bound
    table = {"window_s": float(g.uniform(0.05, 0.5)), "charge_rate_max_uc_per_s": float(g.uniform(0.2, 0.8)) * full,
             "sites": {"a": site}}
    if seed % 7 == 0:  # a budget a single pulse at the amplitude bound just fits: the loop can barely stimulate
        table["charge_rate_max_uc_per_s"] = 1.01 * bound * 90e-6 / table["window_s"]
    c = compile_limits(PhysicalLimits.from_dict(table), m)
    c = dataclasses.replace(c, stim_limits=dataclasses.replace(c.stim_limits, input_names=None))  # plant: "u0"
    plant = LinearNetworkPlant(A, np.abs(g.normal(size=(n, 1))) * 0.05, np.abs(g.normal(size=(p, n))),
                               measurement_noise_std=0.01, seed=int(g.integers(1 << 30)))
    target = g.uniform(20.0, 100.0, size=p)
    return g, m, c, table, plant, target


@pytest.mark.slow
def test_closed_loops_never_deliver_a_window_over_the_charge_budget_on_either_route():
    # >= 100 closed loops of 200 steps, model and data routes: pulses decoded from the applied inputs, every
    # continuous-time window checked against the declared charge-rate budget
    binding = 0
    for seed in range(100):
        g, m, c, table, plant, target = _loop_case(seed)
        if seed % 2 == 0:
            ss = StateSpaceModel(A=plant.A, B=plant.B, C=plant.C, past_steps=plant.A.shape[0])
            ctrl = ModelPredictiveController(model=ss, limits=c.stim_limits, horizon_steps=6,
                                             input_weight=1e-6).fit()
        else:
            from stimsteer.sysid.datadriven import LsqPredictor
            lo, hi = c.stim_limits.input_bounds()
            sess = record_session(plant, g.uniform(lo, hi, size=(300, 1)), seed=seed)
            pred = LsqPredictor(past_steps=plant.A.shape[0], horizon_steps=6).fit(sess)
            ctrl = DataPredictiveController(predictor=pred, limits=c.stim_limits, input_weight=1e-6).fit()
        loop = run_closed_loop(ctrl, plant, n_steps=200, target=target, seed=seed, use_fast_path=bool(seed % 3))
        pulses = decode_plan(loop.inputs, m)
        worst = np.max(window_charges_uc(pulses, table["window_s"]), initial=0.0)
        assert worst <= table["window_s"] * table["charge_rate_max_uc_per_s"] * (1 + 1e-9), seed
        assert np.max(pulses["amplitude_ua"].to_numpy(), initial=0.0) <= c.amplitude_max[0] * (1 + 1e-9)
        assert loop.violations["amplitude"] == 0 and loop.violations["energy_budget"] == 0
        binding += worst >= 0.6 * table["window_s"] * table["charge_rate_max_uc_per_s"]
    assert binding >= 25  # the budget binds (closest for trains at the sample rate: the bound is conservative)


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
    with pytest.raises(LimitsError, match=r"duty cycle 0.1 exceeds"):  # 5 ms x 20 Hz = 10 % light-on
        compile_limits(PhysicalLimits.from_dict({"sites": {"a": {"amplitude_max_ua": 100.0},
                                                           "o": {"irradiance_max_mw_per_mm2": 5.0,
                                                                 "duty_cycle_max_fraction": 0.05}}}), m)
