"""Physical units of stimulation through one pint registry: parse, convert, or refuse with the reason.

Every value of a stimulation description or of a physical limit passes through :func:`convert`, which returns a
plain float in the unit the model or the rule works in, or raises :class:`~stimsteer.sysid.exceptions.SessionError`
naming the value, the unit it came with and the kind of quantity that was expected (a current given in mW/mm², a
width given in Hz, ...). Units are never compared as strings.

Limits-file keys carry their unit in their name (``amplitude_max_ua``, ``window_s``, ``irradiance_max_mw_per_mm2``);
:func:`key_unit` reads the unit from such a suffix, so ``amplitude_max_ma`` and ``amplitude_max_ua`` are both
accepted and converted.

The units the shipped files and the documentation spell (µA, mA, µs, Hz, cm², µC/cm², mW/mm², ...) convert through
:data:`FACTORS`, pint's own conversion factors written out, so that reading a limits file or a stimulation
description does not import pint and build its registry (about 0.8 s of CPU on a 2-core machine). pint converts a
float as ``value * factor`` with exactly these factors (``tests/sysid/test_unit_table.py`` checks every entry bit
for bit against pint); any other unit, and every refusal, goes through pint as before.
"""

from __future__ import annotations

import math

from ..exceptions import SessionError
from .._lazy import LazyInstance, lazy_module

pint = lazy_module("pint")  # pint and its registry are made at the first unit read (sysid/_lazy.py)

__all__ = ["UREG", "convert", "parse_quantity", "key_unit", "unit_of", "MODEL_UNITS", "FACTORS", "unit_factor",
           "quantity_in", "key_unit_name", "plain_unit"]

#: The one unit registry of stimsteer (pint), built at its first use; µ is accepted for micro.
UREG = LazyInstance(lambda: pint.UnitRegistry())

#: The unit each kind of quantity is handled in internally (and the dimension it must have).
MODEL_UNITS = {
    "current": "microampere",
    "charge": "microcoulomb",
    "time": "microsecond",
    "duration": "second",
    "frequency": "hertz",
    "area": "centimeter ** 2",
    "charge_density": "microcoulomb / centimeter ** 2",
    "charge_rate": "microcoulomb / second",
    "irradiance": "milliwatt / millimeter ** 2",
    "optical_width": "millisecond",
}

# key suffixes of the limits file and the units they stand for (longest first when matching)
_SUFFIXES = {
    "uc_per_cm2": "microcoulomb / centimeter ** 2", "mc_per_cm2": "millicoulomb / centimeter ** 2",
    "uc_per_s": "microcoulomb / second", "nc_per_s": "nanocoulomb / second",
    "mw_per_mm2": "milliwatt / millimeter ** 2", "w_per_cm2": "watt / centimeter ** 2",
    "cm2": "centimeter ** 2", "mm2": "millimeter ** 2", "um2": "micrometer ** 2",
    "ua": "microampere", "ma": "milliampere", "na": "nanoampere",
    "uc": "microcoulomb", "nc": "nanocoulomb",
    "us": "microsecond", "ms": "millisecond", "s": "second",
    "hz": "hertz", "khz": "kilohertz", "fraction": "dimensionless",
}


#: pint's factor from each listed unit (as written, µ read as u) to a target unit: ``FACTORS[target][unit]``, so
#: that ``value * factor`` is pint's ``(value * unit).to(target).magnitude`` bit for bit. Made with pint 0.25
#: (``(1.0 * UREG.Unit(unit)).to(UREG.Unit(target)).magnitude``); checked against pint by the tests.
FACTORS = {
    "microampere": {"uA": 1.0, "mA": 1000.0, "nA": 0.001, "A": 1000000.0, "microampere": 1.0, "milliampere": 1000.0,
        "nanoampere": 0.001, "ampere": 1000000.0},
    "microcoulomb": {"uC": 1.0, "nC": 0.001, "mC": 1000.0, "C": 1000000.0, "microcoulomb": 1.0, "nanocoulomb": 0.001,
        "millicoulomb": 1000.0, "coulomb": 1000000.0},
    "microsecond": {"us": 1.0, "ms": 1000.0, "s": 1000000.0, "microsecond": 1.0, "millisecond": 1000.0,
        "second": 1000000.0},
    "second": {"s": 1.0, "ms": 0.001, "us": 1e-06, "second": 1.0, "millisecond": 0.001, "microsecond": 1e-06},
    "hertz": {"Hz": 1.0, "kHz": 1000.0, "hertz": 1.0, "kilohertz": 1000.0},
    "centimeter ** 2": {"cm^2": 1.0, "mm^2": 0.01, "um^2": 1e-08, "centimeter ** 2": 1.0, "millimeter ** 2": 0.01,
        "micrometer ** 2": 1e-08},
    "microcoulomb / centimeter ** 2": {"uC/cm^2": 1.0, "mC/cm^2": 1000.0, "microcoulomb / centimeter ** 2": 1.0,
        "millicoulomb / centimeter ** 2": 1000.0},
    "microcoulomb / second": {"uC/s": 1.0, "nC/s": 0.001, "microcoulomb / second": 1.0, "nanocoulomb / second": 0.001},
    "milliwatt / millimeter ** 2": {"mW/mm^2": 1.0, "W/cm^2": 10.0, "milliwatt / millimeter ** 2": 1.0,
        "watt / centimeter ** 2": 10.0},
    "millisecond": {"ms": 1.0, "us": 0.001, "s": 1000.0, "millisecond": 1.0, "microsecond": 0.001, "second": 1000.0},
    "microjoule": {"uJ": 1.0, "mJ": 1000.0, "nJ": 0.001, "J": 1000000.0, "microjoule": 1.0, "millijoule": 1000.0,
        "nanojoule": 0.001, "joule": 1000000.0},
    "ohm": {"ohm": 1.0, "kohm": 1000.0, "kiloohm": 1000.0},
}
_KIND_UNITS = {**MODEL_UNITS, "energy": "microjoule", "resistance": "ohm"}


def plain_unit(text) -> str:
    """A unit's text as the table reads it: stripped, µ (either code point) read as u."""
    return str(text).strip().replace("µ", "u").replace("μ", "u")


def unit_factor(unit: str, kind: str, what: str, value_what: str | None = None) -> float:
    """``convert(1.0 * unit_of(unit, what), kind, value_what or what)``: the internal units of ``kind`` per
    ``unit``, from :data:`FACTORS` when it lists the unit (no pint), else through pint (which refuses with the
    reason). ``kind`` may also be ``"energy"`` (µJ) or ``"resistance"`` (Ω)."""
    factor = FACTORS[_KIND_UNITS[kind]].get(plain_unit(unit))
    if factor is not None:
        return factor
    if kind in MODEL_UNITS:
        return convert(1.0 * _unit(unit, what), kind, value_what or what)
    source, target = _unit(unit, what), UREG.Unit(_KIND_UNITS[kind])
    if (1.0 * source).dimensionality != (1.0 * target).dimensionality:
        raise SessionError(f"{what}: {source:~P} is not {'an' if kind == 'energy' else 'a'} {kind} (expected a unit "
                           f"like {target:~P}).")
    return float((1.0 * source).to(target).magnitude)


def quantity_in(value, kind: str, what: str, default_unit: str | None = None) -> float:
    """``convert(parse_quantity(value, what, default_unit), kind, what)``, without pint for the units of
    :data:`FACTORS` (the same float: pint multiplies by the same factor)."""
    x, unit = _split(value, what, default_unit)
    factor = FACTORS[MODEL_UNITS[kind]].get(plain_unit(unit)) if plain_unit(unit) else None
    if factor is not None:
        return x * factor
    return convert(x * _unit(unit.strip() or "dimensionless", what), kind, what)


def _unit(text: str, what: str):
    try:
        return UREG.Unit(str(text).replace("µ", "u").replace("μ", "u"))
    except (pint.errors.UndefinedUnitError, ValueError, AttributeError, TypeError, AssertionError) as exc:
        raise SessionError(f"{what}: {text!r} is not a unit stimsteer knows ({exc}); write e.g. uA, mA, us, Hz, "
                           "mW/mm^2.") from None


def unit_of(text: str, what: str = "unit"):
    """A pint unit from its text (``"uA"``, ``"µA"``, ``"mW/mm^2"``), or an error naming ``what``."""
    return _unit(text, what)


def parse_quantity(value, what: str, default_unit: str | None = None):
    """A pint quantity from ``"0.15 mA"``, ``[0.15, "mA"]`` or a bare number with ``default_unit``.

    Raises
    ------
    SessionError
        A value that is not a finite number with a unit (or a bare number without a default unit).
    """
    x, unit = _split(value, what, default_unit)
    return x * _unit(unit.strip() or "dimensionless", what)


def _split(value, what: str, default_unit: str | None):
    """``(number, unit text)`` of a quantity as :func:`parse_quantity` takes it, or the error it raises."""
    if isinstance(value, (list, tuple)) and len(value) == 2:
        number, unit = value
    elif isinstance(value, str):
        head, _, unit = value.strip().partition(" ")
        number = head
    elif isinstance(value, (int, float)) and not isinstance(value, bool) and default_unit is not None:
        number, unit = value, default_unit
    else:
        raise SessionError(f"{what}: expected a number with its unit, e.g. \"150 uA\"; got {value!r}.")
    try:
        x = float(number)
    except (TypeError, ValueError):
        raise SessionError(f"{what}: {number!r} is not a number; write e.g. \"150 uA\".") from None
    if not math.isfinite(x):
        raise SessionError(f"{what}: {value!r} is not finite; give a finite number.")
    return x, str(unit)


def convert(quantity, kind: str, what: str) -> float:
    """``quantity`` as a float in the internal unit of ``kind`` (:data:`MODEL_UNITS`), or refuse with the reason.

    Parameters
    ----------
    quantity : pint.Quantity
    kind : str
        A key of :data:`MODEL_UNITS` (``"current"``, ``"charge"``, ...).
    what : str
        The value's name in messages.

    Raises
    ------
    SessionError
        When the quantity's dimension is not that of ``kind`` (e.g. mW/mm² for a current).

    Examples
    --------
    >>> convert(parse_quantity("0.15 mA", "amplitude"), "current", "amplitude")
    150.0
    """
    target = UREG.Unit(MODEL_UNITS[kind])
    try:
        return float(quantity.to(target).magnitude)
    except pint.errors.DimensionalityError:
        raise SessionError(f"{what}: {quantity:~P} is not a {kind.replace('_', ' ')} (expected a unit like "
                           f"{target:~P}); a value in these units cannot be used here.") from None


def key_unit_name(key: str):
    """``(name, unit text)`` of a limits-file key whose suffix names its unit, e.g. ``amplitude_max_ma`` →
    ``("amplitude_max", "milliampere")``; ``(key, None)`` when no known suffix ends it (no pint: see
    :func:`key_unit`)."""
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if key.endswith("_" + suffix):
            return key[: -len(suffix) - 1], _SUFFIXES[suffix]
    return key, None


def key_unit(key: str):
    """``(name, unit)`` of a limits-file key whose suffix names its unit, e.g. ``amplitude_max_ma`` → mA.

    Returns ``(key, None)`` when no known unit suffix ends the key.
    """
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if key.endswith("_" + suffix):
            return key[: -len(suffix) - 1], UREG.Unit(_SUFFIXES[suffix])
    return key, None
