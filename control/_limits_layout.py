"""The limits file layout (TOML, documented in :mod:`stimsteer.control.limits`): reading it and checking its keys.

:func:`read_limits_table` reads a file into a nested dict; :func:`limits_fields` turns such a dict into the keyword
arguments of :class:`~stimsteer.control.limits.StimLimits` (which then validates the values themselves).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..sysid.exceptions import LimitsError
from .shannon import DEFAULT_SHANNON_K

__all__ = ["read_limits_table", "limits_fields", "vec_field"]

_INPUT_KEYS = {"amplitude_min_ua", "amplitude_max_ua", "slew_max_ua", "pulse_width_us", "electrode_area_cm2"}
_CHARGE_KEYS = {"pulse_width_us", "electrode_area_cm2", "shannon_k"}
_TOP_KEYS = {"charge_density", "energy", "inputs", "outputs"}


def read_limits_table(path) -> dict:
    """The nested dict of a TOML limits file.

    Raises
    ------
    LimitsError
        If the file is not valid TOML (UTF-8).
    FileNotFoundError
        If the file does not exist.
    """
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib

    path = Path(path)
    text = path.read_bytes()
    try:
        return tomllib.loads(text.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise LimitsError(f"{path} is not a valid TOML limits file: {exc}. See the layout in "
                          "`stimsteer.control.limits`.") from None


def limits_fields(d) -> dict:
    """The :class:`~stimsteer.control.limits.StimLimits` keyword arguments of a dict in the TOML layout.

    Raises
    ------
    LimitsError
        For a non-table, unknown keys, missing amplitude bounds, non-numbers, or charge settings given for some
        inputs only.
    """
    if not isinstance(d, dict):
        raise LimitsError(f"limits must be a table (dict); got {type(d).__name__}.")
    if "physical" in d:
        raise LimitsError("these limits are in physical terms ([physical]); they need the stimulation description "
                          "of the inputs: use them with `stimsteer plan --stimulation FILE` (see "
                          "stimsteer.control.physical_limits).")
    _unknown("the top level", d, _TOP_KEYS)
    charge = _table(d, "charge_density")
    _unknown("[charge_density]", charge, _CHARGE_KEYS)
    energy = _table(d, "energy")
    _unknown("[energy]", energy, {"budget_ua2", "window_steps"})
    inputs = _table(d, "inputs")
    if not inputs:
        raise LimitsError("the limits declare no inputs; add one [inputs.<name>] table per stimulation input "
                          "with amplitude_min_ua and amplitude_max_ua.")
    cols = {k: [] for k in _INPUT_KEYS}
    for name, spec in inputs.items():
        if not isinstance(spec, dict):
            raise LimitsError(f"[inputs.{name}] must be a table; got {spec!r}.")
        _unknown(f"[inputs.{name}]", spec, _INPUT_KEYS)
        for key in ("amplitude_min_ua", "amplitude_max_ua"):
            if key not in spec:
                raise LimitsError(f"[inputs.{name}] has no {key}; every input needs both amplitude bounds (µA).")
        for key in _INPUT_KEYS:
            default = charge.get(key) if key in _CHARGE_KEYS else None
            cols[key].append(_number(f"inputs.{name}.{key}", spec.get(key, default)))
    slew = cols["slew_max_ua"]
    slew = None if all(v is None for v in slew) else [np.inf if v is None else v for v in slew]
    charge_cols = {}
    for key in ("pulse_width_us", "electrode_area_cm2"):
        vals = cols[key]
        if any(v is None for v in vals) and any(v is not None for v in vals):
            missing = [n for n, v in zip(inputs, vals) if v is None]
            raise LimitsError(f"{key} is given for some inputs but not for {missing}; set it in "
                              "[charge_density] or for every input.")
        charge_cols[key] = None if vals[0] is None else vals
    out_names, out_lo, out_hi = _outputs(_table(d, "outputs"))
    return dict(
        amplitude_min_ua=cols["amplitude_min_ua"], amplitude_max_ua=cols["amplitude_max_ua"],
        slew_max_ua=slew, energy_budget_ua2=_number("energy.budget_ua2", energy.get("budget_ua2")),
        energy_window_steps=_window(energy.get("window_steps")),
        shannon_k=_number("charge_density.shannon_k", charge.get("shannon_k", DEFAULT_SHANNON_K)),
        input_names=tuple(inputs), output_names=out_names, output_min=out_lo, output_max=out_hi,
        **charge_cols,
    )


def _table(d, key):
    v = d.get(key, {})
    if not isinstance(v, dict):
        raise LimitsError(f"[{key}] must be a table; got {v!r}.")
    return v


def _unknown(where, d, allowed):
    extra = sorted(set(d) - set(allowed))
    if extra:
        raise LimitsError(f"unknown keys {extra} in {where} of the limits; allowed: {sorted(allowed)}. Check the "
                          "spelling (units are part of the key names).")


def _number(where, v):
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise LimitsError(f"{where} must be a number; got {v!r}.")
    return float(v)


def _outputs(outputs):
    if not outputs:
        return None, None, None
    names, lo, hi = [], [], []
    for name, spec in outputs.items():
        if not isinstance(spec, dict):
            raise LimitsError(f"[outputs.{name}] must be a table with min and/or max; got {spec!r}.")
        _unknown(f"[outputs.{name}]", spec, {"min", "max"})
        if not spec:
            raise LimitsError(f"[outputs.{name}] is empty; give min and/or max, or remove the table.")
        names.append(str(name))
        lo.append(_number(f"outputs.{name}.min", spec.get("min", -np.inf)))
        hi.append(_number(f"outputs.{name}.max", spec.get("max", np.inf)))
    return tuple(names), lo, hi


def _window(v):
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, int) or v < 1:
        raise LimitsError(f"energy.window_steps must be a whole number of samples >= 1; got {v!r}.")
    return v


def vec_field(name, value, m, *, allow_inf=False):
    """``value`` (a number, or one per input) as a read-only (m,) float array; NaN (and inf unless allowed) refused."""
    a = np.asarray(value, dtype=np.float64)
    if a.ndim == 0:
        a = np.full(m, float(a))
    if a.shape != (m,):
        raise LimitsError(f"{name} must be a number or one value per input ({m}); got shape {a.shape}.")
    bad = np.isnan(a) if allow_inf else ~np.isfinite(a)
    if bad.any():
        kind = "NaN" if allow_inf else "NaN or infinite"
        raise LimitsError(f"{name} holds {kind} values at inputs {np.flatnonzero(bad).tolist()}; give numbers.")
    a = a.copy()
    a.setflags(write=False)
    return a
