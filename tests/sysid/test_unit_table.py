"""The written-out unit factors (sysid/stimulation/units.py FACTORS) are pint's, bit for bit, and reading the demo's
physical limits and stimulation description needs no pint at all."""

import subprocess
import sys
import tomllib

import pint
import pytest

from stimsteer.demo_data import demo_file
from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.stimulation.units import (FACTORS, UREG, convert, parse_quantity, quantity_in,
                                               unit_factor)

# values of the shipped files and a spread of magnitudes (common practice, no source)
_VALUES = [1.0, 0.15, 1.5, 2e-5, 100.0, 0.001, 60.0, 0.3, 250.0, 0.005, 1.75, 123.456789, 7e-9, 3.3e12]


def test_every_written_factor_converts_as_pint_does_bit_for_bit():
    ureg = pint.UnitRegistry()  # a fresh registry of pint itself, not stimsteer's
    for target, factors in FACTORS.items():
        for unit, factor in factors.items():
            for x in _VALUES:
                assert x * factor == (x * ureg.Unit(unit)).to(ureg.Unit(target)).magnitude, (unit, target, x)


def test_the_table_and_the_pint_route_give_the_same_float_and_the_same_refusals():
    spellings = ["0.15 mA", "150 µA", "150 μA", "90 us", "2 W/cm^2", "0.001 cm^2", "2e-5 cm^2", "250 Hz", "0.2 s"]
    kinds = ["current", "current", "current", "time", "irradiance", "area", "area", "frequency", "duration"]
    for text, kind in zip(spellings, kinds):
        assert quantity_in(text, kind, "x") == convert(parse_quantity(text, "x"), kind, "x")
        unit = text.partition(" ")[2]
        assert unit_factor(unit, kind, "x") == convert(1.0 * UREG.Unit(unit.replace("µ", "u").replace("μ", "u")),
                                                       kind, "x")
    with pytest.raises(SessionError, match="is not a current"):
        quantity_in("3 mW/mm^2", "current", "amplitude")
    with pytest.raises(SessionError, match="not a unit stimsteer knows"):
        quantity_in("3 bananas", "current", "amplitude")
    with pytest.raises(SessionError, match="is not an energy"):
        unit_factor("uC", "energy", "[physical] window_energy_max_uc")
    assert unit_factor("kJ", "energy", "x") == 1e9  # not in the table: through pint


def test_the_demo_limits_and_description_are_read_without_pint():
    code = ("import sys, tomllib\n"
            "from stimsteer.demo_data import demo_file\n"
            "from stimsteer.control.physical_limits import PhysicalLimits\n"
            "from stimsteer.sysid.stimulation import load_stimulation\n"
            "d = load_stimulation(demo_file('demo_stimulation.toml'))\n"
            "p = PhysicalLimits.from_dict(tomllib.loads(demo_file('demo_physical_limits.toml').read_text())"
            "['physical'])\n"
            "print([s.amplitude_factor_ua() for s in d.sites], 'pint' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, check=True)
    assert out.stdout.strip() == "[1.0, 1.0, 1.0] False"


def test_the_demo_files_give_the_values_pint_gives():
    from stimsteer.control.physical_limits import PhysicalLimits
    from stimsteer.sysid.stimulation import load_stimulation

    site = load_stimulation(demo_file("demo_stimulation.toml")).sites[2]
    assert site.phase_width_us == convert(parse_quantity("60 us", "x"), "time", "x")
    assert site.contact_area_cm2 == convert(parse_quantity("2e-5 cm^2", "x"), "area", "x")
    limits = PhysicalLimits.from_dict(tomllib.loads(demo_file("demo_physical_limits.toml").read_text())["physical"])
    assert limits.charge_rate_max_uc_per_s == convert(2.0 * UREG.Unit("microcoulomb / second"), "charge_rate", "x")
