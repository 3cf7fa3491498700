"""The plan figure in physical terms: pulses per site in their own unit, and the margin of every safety check."""

import dataclasses
import math
from types import SimpleNamespace

import numpy as np
import pytest

from stimsteer.control._plan_physical import PhysicalPlan
from stimsteer.control.commands.plan import write_plan
from stimsteer.control.figures.pulse_plan import check_usage, pulse_plan_figure_of
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.physical_limits import PhysicalLimits, compile_limits
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.stimulation import InputMapping, StimulationDescription

_BASE = {"model_file": None, "model_sha256": None, "session_content_hash": None, "versions": {}}


def _mapping(unit="uA"):
    site = {"kind": "electrical", "phase_width": "100 us", "frequency": "250 Hz", "amplitude_unit": unit,
            "contact_area": "0.06 cm^2"}
    return InputMapping(StimulationDescription.from_dict({"sites": {"a": site}}), 250.0)


def _plan(mapping, amplitude_max, target, past=None):
    c = compile_limits(PhysicalLimits.from_dict({"window_s": 0.2, "charge_rate_max_uc_per_s": 2.0, "sites": {
        "a": {"amplitude_max_ua": amplitude_max, "charge_per_phase_max_uc": 0.015}}}), mapping)
    lim = dataclasses.replace(c.stim_limits, input_names=None)
    model = StateSpaceModel(A=[[0.9]], B=[[mapping.gain()[0] ** -1 * 0.01]], C=[[1.0]], past_steps=1)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=10).fit()
    past = np.zeros((60, 1)) if past is None else past
    plan = ctrl.plan(past, np.zeros((60, 1)), target=np.full((10, 1), target))
    return PhysicalPlan(mapping=mapping, compiled=c, u_past=past), plan


def _texts(fig) -> str:
    return "\n".join(t.get_text() for t in fig.findobj(lambda a: hasattr(a, "get_text")))


def test_the_shannon_check_is_drawn_as_the_charge_density_over_the_density_the_rule_allows():
    # Shannon R.V. (1992), IEEE TBME 39(4): 30 µC/cm² on 0.06 cm² gives Q = 1.8 µC and k = 1.732. At the damage line
    # k = 1.85 the density with log10(D) + log10(D · A) = k is D = sqrt(10**k / A); the bar is D / D_max.
    k = math.log10(30.0) + math.log10(30.0 * 0.06)
    assert round(k, 3) == 1.732
    row = check_usage({"rule": "shannon", "site": "s", "limit": 1.85, "value": k, "unit": "k", "margin": 1.85 - k,
                       "passed": True}, SimpleNamespace(contact_area_cm2=0.06))
    assert row["used"] == pytest.approx(30.0 / math.sqrt(10 ** 1.85 / 0.06), rel=1e-12)
    assert row["text"].startswith(f"30 of {math.sqrt(10 ** 1.85 / 0.06):.3g} µC/cm² (k 1.73 ≤ 1.85)")


def test_checks_without_a_limit_or_only_rounding_are_not_drawn():
    assert check_usage({"rule": "train_length", "site": "a", "limit": math.inf, "value": 0.1, "unit": "s",
                        "margin": math.inf, "passed": True}) is None
    assert check_usage({"rule": "charge_balance", "site": "a", "limit": 1e-9, "value": 0.0, "unit": "", "margin": 1e-9,
                        "passed": True}) is None
    assert check_usage({"rule": "duty_cycle", "site": "a", "limit": 1.0, "value": 1.0, "unit": "fraction",
                        "margin": 0.0, "passed": True}) is None  # a duty of 1 allows anything


@pytest.mark.parametrize("unit, per", [("uA", 1.0), ("mA", 1000.0)])
def test_a_physical_plan_writes_the_pulse_figure_with_the_margin_of_every_check(tmp_path, unit, per):
    # Before: plan.png showed model inputs only; no figure said how close a plan came to each physical limit.
    pp, plan = _plan(_mapping(unit), 100.0, 30.0)
    files = write_plan(plan, tmp_path / "p", sample_rate_hz=250.0, physical=pp, input_units=[unit])
    assert files["plan_pulses_png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    fig = pulse_plan_figure_of(pp, plan, what="a test model")
    text = _texts(fig)
    checks = pp.record["checks"]
    amp = next(c for c in checks if c["rule"] == "amplitude")
    peak = float(np.max(plan.inputs)) * per  # model units (the site's unit) to µA
    assert amp["value"] == pytest.approx(peak, rel=1e-9) and amp["passed"]
    # every drawn check shows its value, limit and margin; the amplitude one is limit − peak (µA)
    assert f"margin {100 - peak:.3g} µA".replace(" µA", "") in text
    for c in checks:
        row = check_usage(c, pp.mapping.sites[0])
        if row is not None:
            assert row["text"] in text
    # the pulses are drawn in the site's own unit, with the bound and the rule that sets it
    assert f"amplitude [{'µA' if unit == 'uA' else 'mA'}]" in text and "bound " in text and "FAILED" not in text
    assert "charge per phase [µC]" in text and plan.caution.split()[0] in text


def test_a_failed_check_is_red_and_says_failed(tmp_path):
    # an applied past over the window budget: the plan is not delivered and its window check fails
    pp, plan = _plan(_mapping(), 100.0, 30.0, past=np.full((60, 1), 100.0))
    pp.write(tmp_path, plan, dict(_BASE))
    fig = pulse_plan_figure_of(pp, plan)
    assert "FAILED" in _texts(fig) and not pp.delivered
    bars = [p for ax in fig.axes for p in ax.patches if p.get_facecolor()[:3] == (0xb2 / 255, 0x30 / 255, 0x2b / 255)]
    assert bars  # the failed check's bar is red


@pytest.mark.parametrize("unit, per", [("uA", 1.0), ("mA", 1000.0)])
def test_the_console_names_each_sites_pulses_in_its_unit_and_its_tightest_check(tmp_path, unit, per):
    # Before: `plan --stimulation` printed only "pulses: optimal; checks all passed".
    from stimsteer.control._pulse_text import pulse_plan_lines
    from stimsteer.sysid.stimulation import decode_plan

    pp, plan = _plan(_mapping(unit), 100.0, 30.0)
    pp.write(tmp_path, plan, dict(_BASE))
    lines = pulse_plan_lines(pp, plan)
    pulses = decode_plan(plan.inputs, pp.mapping)
    a = pulses["amplitude_ua"] / per  # in the site's own unit
    shown = "µA" if unit == "uA" else "mA"
    assert lines[0].startswith(f"  a: {len(pulses)} pulse(s) at 250 Hz, {a.min():.3g} .. {a.max():.3g} {shown}, "
                               "cathodic-first symmetric biphasic, 100 µs leading phase")
    # Q = I · PW (common practice, no source): the largest charge per phase is the largest amplitude x 100 µs
    assert f"up to {pulses['amplitude_ua'].max() * 100e-6:.3g} µC per phase" in lines[0]
    assert "closest to its limit: " in lines[0] and lines[-1].startswith("  all sites: closest to its limit: charge")


def test_the_console_says_which_check_failed(tmp_path):
    from stimsteer.control._pulse_text import pulse_plan_lines

    pp, plan = _plan(_mapping(), 100.0, 30.0, past=np.full((60, 1), 100.0))
    pp.write(tmp_path, plan, dict(_BASE))
    lines = pulse_plan_lines(pp, plan)
    assert lines[0] == "  a: no pulse; closest to its limit: " + lines[0].split("closest to its limit: ")[1]
    assert lines[-1].startswith("  all sites: FAILED charge in every window")
