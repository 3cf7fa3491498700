"""Tests of stimsteer.control.limits: declaration, validation, TOML layout, charge bound, fallback, violations."""

import numpy as np
import pytest

from stimsteer.control.limits import (
    DEFAULT_SHANNON_K,
    StimLimits,
    load_limits,
    max_amplitude_ua,
    max_charge_uc,
    shannon_k,
)
from stimsteer.sysid.exceptions import LimitsError

TOML = """
[charge_density]
pulse_width_us = 100.0
electrode_area_cm2 = 0.06

[energy]
budget_ua2 = 5.0e4

[inputs.site_b]
amplitude_min_ua = -40.0
amplitude_max_ua = 40.0
slew_max_ua = 5.0

[inputs.site_a]
amplitude_min_ua = 0.0
amplitude_max_ua = 60.0
pulse_width_us = 50.0

[outputs.y1]
max = 1.5
"""


def _lim(**kw):
    base = dict(amplitude_min_ua=[-10.0, 0.0], amplitude_max_ua=[10.0, 20.0])
    base.update(kw)
    return StimLimits(**base)


def test_scalar_bounds_broadcast_to_n_inputs():
    lim = StimLimits(amplitude_min_ua=-1, amplitude_max_ua=2, n_inputs=3)
    assert lim.n_inputs == 3
    np.testing.assert_array_equal(lim.amplitude_max_ua, [2, 2, 2])
    assert lim.shannon_k == DEFAULT_SHANNON_K and lim.charge_bound_ua() is None


def test_default_k_sits_below_the_damage_threshold():
    # Shannon 1992 reports damage at k >= 1.85; the default is a margin below it (common practice, no source).
    assert DEFAULT_SHANNON_K < 1.85


def test_charge_bound_tightens_the_declared_amplitude():
    # 2e-6 cm², 400 µs, k = 1.75: Q = sqrt(10**1.75 * 2e-6) µC (Shannon 1992 solved for Q); I = Q / PW with
    # Q = I·PW (definition), 1 µC / 1 µs = 1e6 µA: about 26.5 µA, inside ±100 but above 20.
    lim = _lim(amplitude_min_ua=[-100.0, 0.0], amplitude_max_ua=[100.0, 20.0], pulse_width_us=400.0,
               electrode_area_cm2=2e-6)
    expected = np.sqrt(10**1.75 * 2e-6) / 400.0 * 1e6
    lo, hi = lim.input_bounds()
    np.testing.assert_allclose(hi, [expected, 20.0])
    np.testing.assert_allclose(lo, [-expected, 0.0])
    assert lim.bound_sources() == (("charge_density", "amplitude"), ("charge_density", "amplitude"))


def test_charge_helpers_are_consistent():
    q = max_charge_uc(1.7, 0.02)
    assert shannon_k(q, 0.02) == pytest.approx(1.7, abs=1e-12)
    assert max_amplitude_ua(1.7, 0.02, 80.0) == pytest.approx(q / 80.0 * 1e6)


def test_load_limits_reads_the_documented_layout(tmp_path):
    path = tmp_path / "limits.toml"
    path.write_text(TOML)
    lim = load_limits(path)
    assert lim.input_names == ("site_b", "site_a")
    np.testing.assert_array_equal(lim.slew_max_ua, [5.0, np.inf])
    np.testing.assert_array_equal(lim.pulse_width_us, [100.0, 50.0])
    assert lim.energy_budget_ua2 == 5e4 and lim.output_names == ("y1",)
    al = lim.aligned(["site_a", "site_b"], ["y0", "y1"])
    np.testing.assert_array_equal(al.amplitude_max_ua, [60.0, 40.0])
    np.testing.assert_array_equal(al.output_max, [np.inf, 1.5])
    assert al.to_dict()["input_names"] == ["site_a", "site_b"]


def test_example_limits_file_in_demo_data_loads():
    from pathlib import Path

    from stimsteer.sysid.io import open_session_file

    root = Path(__file__).resolve().parents[2] / "demo_data"
    lim = load_limits(root / "demo_limits.toml")
    with open_session_file(root / "demo_session.h5") as f:
        names_in, names_out = f.input_names, f.output_names
    aligned = lim.aligned(names_in, names_out)  # raises unless the names match the demo's channels
    # non-negative amplitudes (polarity is a category of the site), bounded by amplitude alone: the microcontact's
    # material limit is compiled into its amplitude bound (tests/test_demo_data.py), not a Shannon bound
    assert aligned.n_inputs == 3 and lim.bound_sources() == (("amplitude",) * 3, ("amplitude",) * 3)
    np.testing.assert_array_equal(aligned.input_bounds()[0], 0.0)


def test_safe_inputs_ramp_to_zero_within_slew():
    lim = _lim(slew_max_ua=[3.0, 4.0])
    ramp = lim.safe_inputs(4, last_input=[8.0, 10.0])
    np.testing.assert_allclose(ramp, [[5, 6], [2, 2], [0, 0], [0, 0]])
    assert lim.violations(ramp, [8.0, 10.0]) == {"amplitude": 0, "slew": 0, "energy_budget": 0}


def test_safe_inputs_clip_into_bounds_when_last_input_is_outside():
    lim = _lim(slew_max_ua=[1.0, 1.0])
    ramp = lim.safe_inputs(2, last_input=[30.0, 0.0])
    np.testing.assert_allclose(ramp, [[10.0, 0.0], [9.0, 0.0]])
    assert lim.violations(ramp)["amplitude"] == 0


def test_violations_count_each_limit():
    lim = _lim(slew_max_ua=[1.0, 1.0], energy_budget_ua2=10.0)
    u = np.array([[11.0, 0.0], [0.0, 3.0]])
    assert lim.violations(u, last_input=[0.0, 0.0]) == {"amplitude": 1, "slew": 3, "energy_budget": 1}


def test_violations_with_an_energy_window_count_every_window_over_the_budget():
    # by construction: squared sums 9, 9, 1, 0 per sample; windows of 2 sum to 18, 10, 1 against a budget of 10
    lim = _lim(slew_max_ua=[np.inf, 5.0], energy_budget_ua2=10.0)
    u = np.array([[3.0, 0.0], [3.0, 0.0], [1.0, 0.0], [0.0, 0.0]])
    assert lim.violations(u, energy_window_steps=2, rtol=0.0)["energy_budget"] == 1
    assert lim.violations(u, energy_window_steps=3, rtol=0.0)["energy_budget"] == 1  # 19 and 10: one over
    assert lim.violations(u, energy_window_steps=10, rtol=0.0)["energy_budget"] == 1  # whole sequence, 19
    assert lim.violations(u, energy_window_steps=1, rtol=0.0)["energy_budget"] == 0
    assert lim.violations(u, last_input=[10.0, 0.0], rtol=0.0)["slew"] == 0  # inf: no slew limit on input 0
    from stimsteer.sysid.exceptions import InvalidParameterError

    with pytest.raises(InvalidParameterError, match="energy_window_steps must be a whole number"):
        lim.violations(u, energy_window_steps=0)


@pytest.mark.parametrize(
    "kw, match",
    [
        (dict(amplitude_min_ua=[15.0, 0.0]), "amplitude_min_ua > amplitude_max_ua"),
        (dict(amplitude_min_ua=[1.0, 0.0]), "zero stimulation must lie inside"),
        (dict(amplitude_min_ua=[0.0, 0.0], amplitude_max_ua=[0.0, 0.0]), "nothing can be stimulated"),
        (dict(slew_max_ua=[0.0, 1.0]), "slew_max_ua must be positive"),
        (dict(energy_budget_ua2=0.0), "energy_budget_ua2 must be positive"),
        (dict(energy_budget_ua2=np.inf), "energy_budget_ua2 must be positive"),
        (dict(shannon_k=1.9), "at or above 1.85"),
        (dict(shannon_k=np.nan), "shannon_k must be a finite"),
        (dict(pulse_width_us=100.0), "needs both pulse width and electrode area"),
        (dict(pulse_width_us=-1.0, electrode_area_cm2=0.1), "pulse_width_us must be positive"),
        (dict(amplitude_max_ua=[1.0, 2.0, 3.0]), "disagree on the number of inputs"),
        (dict(amplitude_max_ua=[np.nan, 2.0]), "NaN or infinite"),
        (dict(output_min=[2.0], output_max=[1.0]), "output_min must be below output_max"),
        (dict(output_min=[np.inf], output_max=[np.inf]), "output_min must be below output_max"),
        (dict(input_names=("a", "a")), "disagree on the number of inputs|unique names"),
        (dict(output_names=("y0",)), "without output bounds"),
    ],
)
def test_bad_limits_are_refused_with_the_reason(kw, match):
    with pytest.raises(LimitsError, match=match):
        _lim(**kw)


def test_zero_inputs_and_bad_areas_are_refused():
    with pytest.raises(LimitsError, match="at least one input"):
        StimLimits(amplitude_min_ua=0.0, amplitude_max_ua=1.0, n_inputs=0)
    with pytest.raises(LimitsError, match="electrode_area_cm2 must be positive"):
        _lim(pulse_width_us=100.0, electrode_area_cm2=[0.1, 0.0])


def test_no_size_information_is_refused():
    with pytest.raises(LimitsError, match="cannot tell the number of inputs"):
        StimLimits(amplitude_min_ua=0.0, amplitude_max_ua=1.0)


def test_helpers_refuse_nonpositive_charge_or_area():
    with pytest.raises(LimitsError, match="charge_uc must be positive"):
        shannon_k(0.0, 0.06)
    with pytest.raises(LimitsError, match="area_cm2 must be positive"):
        max_charge_uc(1.5, -1.0)
    with pytest.raises(LimitsError, match="shannon_k must be finite"):
        max_charge_uc(np.inf, 0.06)


def test_aligned_refuses_mismatched_names():
    lim = _lim(input_names=("a", "b"))
    with pytest.raises(LimitsError, match=r"no limits for \['c'\]; unknown \['b'\]"):
        lim.aligned(["a", "c"], ["y0"])
    with pytest.raises(LimitsError, match="the limits are for 2 inputs but the model has 3"):
        _lim().aligned(["a", "b", "c"], ["y0"])
    with pytest.raises(LimitsError, match="does not have"):
        _lim(output_min=[0.0], output_max=[1.0], output_names=("z",)).aligned(["a", "b"], ["y0"])
    with pytest.raises(LimitsError, match="output bounds are for 1 outputs but the model has 2"):
        _lim(output_min=[0.0], output_max=[1.0]).aligned(["a", "b"], ["y0", "y1"])


@pytest.mark.parametrize(
    "text, match",
    [
        ("[inputs.a]\namplitude_min_ua = 0\namplitude_max_uA = 1\n", "unknown keys"),
        ("[inputs.a]\namplitude_min_ua = 0\n", "has no amplitude_max_ua"),
        ("[energy]\nbudget_ua2 = 1.0\n", "declare no inputs"),
        ("[inputs.a]\namplitude_min_ua = 0\namplitude_max_ua = 'big'\n", "must be a number"),
        ("[inputs.a]\namplitude_min_ua = 0\namplitude_max_ua = 1\n[outputs.y]\n", "is empty"),
        ("[inputs.a]\namplitude_min_ua = 0\namplitude_max_ua = 1\npulse_width_us = 10\n"
         "[inputs.b]\namplitude_min_ua = 0\namplitude_max_ua = 1\n", "given for some inputs but not"),
        ("colour = 3\n[inputs.a]\namplitude_min_ua = 0\namplitude_max_ua = 1\n", "unknown keys"),
        ("inputs = 3\n", r"\[inputs\] must be a table"),
        ("[inputs.a]\namplitude_min_ua = 0\namplitude_max_ua = 1\n[outputs]\ny = 2\n", r"\[outputs.y\] must be a table"),
        ("[inputs]\na = 1\n", r"\[inputs.a\] must be a table"),
        ("this is = = not toml", "not a valid TOML"),
    ],
)
def test_bad_limits_files_are_refused(tmp_path, text, match):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(LimitsError, match=match):
        load_limits(path)


def test_from_dict_refuses_a_non_table():
    with pytest.raises(LimitsError, match="must be a table"):
        StimLimits.from_dict([1, 2])


def test_limits_file_is_not_modified(tmp_path):
    path = tmp_path / "limits.toml"
    path.write_text(TOML)
    before = path.read_bytes()
    load_limits(path)
    assert path.read_bytes() == before
