"""Physical units of stimulation through one pint registry: parse, convert, or refuse with the reason.

Every value of a stimulation description or of a physical limit passes through :func:`convert`, which returns a
plain float in the unit the model or the rule works in, or raises :class:`~stimsteer.sysid.exceptions.SessionError`
naming the value, the unit it came with and the kind of quantity that was expected (a current given in mW/mm², a
width given in Hz, ...). Units are never compared as strings.

Limits-file keys carry their unit in their name (``amplitude_max_ua``, ``window_s``, ``irradiance_max_mw_per_mm2``);
:func:`key_unit` reads the unit from such a suffix, so ``amplitude_max_ma`` and ``amplitude_max_ua`` are both
accepted and converted.
"""

from __future__ import annotations

import math

from ..exceptions import SessionError
from .._lazy import LazyInstance, lazy_module

pint = lazy_module("pint")  # pint and its registry are made at the first unit read (sysid/_lazy.py)

__all__ = ["UREG", "convert", "parse_quantity", "key_unit", "unit_of", "MODEL_UNITS"]

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
    return x * _unit(unit.strip() or "dimensionless", what)


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


def key_unit(key: str):
    """``(name, unit)`` of a limits-file key whose suffix names its unit, e.g. ``amplitude_max_ma`` → mA.

    Returns ``(key, None)`` when no known unit suffix ends the key.
    """
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if key.endswith("_" + suffix):
            return key[: -len(suffix) - 1], UREG.Unit(_SUFFIXES[suffix])
    return key, None
