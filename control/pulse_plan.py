"""Plans a stimulator can take: the per-site parameter table, the pulse list, every safety check and its margin.

:func:`safety_checks` measures a decoded pulse list (and the model inputs it came from) against the compiled
physical limits (:mod:`stimsteer.control.physical_limits`), one row per rule and site: the limit, the value the plan
reaches, the margin (limit − value, and as a fraction of the limit), whether it passed and the source of the rule.
:func:`write_pulse_plan` writes, into a folder being written atomically, ``plan_parameters.csv`` and
``plan_pulses.csv`` (each opening with comment lines: status, model and session hashes, versions, limits and every
check) and ``plan_pulses.nwb`` (two NWB ``TimeIntervals`` tables, ``planned_pulses`` and ``planned_parameters``,
with the same record as JSON in the file's notes) when pynwb is installed (the file follows its schema; it is written
with h5py, :mod:`stimsteer.sysid.io.nwb_intervals`, without importing pynwb).
"""

from __future__ import annotations

import json
import math
from dataclasses import replace
from datetime import datetime, timezone

import numpy as np
import pandas as pd

from ..sysid.stimulation import decode_plan, parameter_segments
from ..sysid.io.nwb_intervals import IntervalColumn, write_nwb_intervals
from .physical_limits import RULE_SOURCES, pulse_energy_uj

__all__ = ["safety_checks", "window_charges_uc", "window_energies_uj", "write_pulse_plan", "checks_pass"]


def window_charges_uc(pulses: pd.DataFrame, window_s: float) -> np.ndarray:
    """Charge per phase delivered in the window ``[t_i, t_i + window_s)`` starting at each electrical pulse, µC.

    The largest charge over all windows of that length is reached by one starting at a pulse onset, so the
    maximum of these values is the largest window charge of the whole list.
    """
    el = pulses[pulses["kind"] == "electrical"] if len(pulses) else pulses
    if not len(el):
        return np.zeros(0)
    return window_sums(el["onset_s"].to_numpy(np.float64), el["charge_per_phase_uc"].to_numpy(np.float64), window_s)


def window_energies_uj(pulses: pd.DataFrame, window_s: float, mapping, physical) -> np.ndarray:
    """Energy delivered in the window ``[t_i, t_i + window_s)`` starting at each pulse, µJ
    (:func:`~stimsteer.control.physical_limits.pulse_energy_uj` of every pulse)."""
    if not len(pulses):
        return np.zeros(0)
    e = np.zeros(len(pulses))
    for site in mapping.sites:
        rows = (pulses["site"] == site.name).to_numpy()
        col = "irradiance_mw_per_mm2" if site.kind == "optical" else "amplitude_ua"
        r = None if site.kind == "optical" else physical.sites[site.name].impedance_ohm
        e[rows] = pulse_energy_uj(site, pulses.loc[rows, col].to_numpy(np.float64), r)
    return window_sums(pulses["onset_s"].to_numpy(np.float64), e, window_s)


def window_sums(onsets, values, window_s: float) -> np.ndarray:
    """``Σ values`` over the pulses with onsets in ``[t_i, t_i + window_s)``, for each pulse ``i`` in onset order."""
    order = np.argsort(onsets, kind="stable")
    t, q = onsets[order], values[order]
    c = np.concatenate([[0.0], np.cumsum(q)])
    end = np.searchsorted(t, t + window_s - 1e-12, side="left")
    return c[end] - c[np.arange(t.size)]


def _row(rule, site, limit, value, unit, *, smaller_is_safe=True, name=None):
    # ``name`` tells apart two checks of one rule (the two ends of the frequency range); the source is the rule's
    margin = (limit - value) if smaller_is_safe else (value - limit)
    ok = bool(margin >= -1e-9 * max(abs(limit), 1e-12))
    frac = None if not limit or not math.isfinite(limit) else margin / abs(limit)
    return {"rule": name or rule, "site": site, "limit": limit, "value": value, "unit": unit, "margin": margin,
            "margin_fraction": frac, "passed": ok, "source": RULE_SOURCES[rule]}


def _electrical_rows(site, lim, sp, physical, rate, u_col) -> list:
    amp = float(sp["amplitude_ua"].max()) if len(sp) else 0.0
    peak = amp * max(1.0, site.second_phase_ratio)
    rows = [_row("amplitude", site.name, lim.amplitude_max_ua, peak, "uA")]
    q = amp * site.phase_width_us * 1e-6
    if lim.charge_per_phase_max_uc is not None:
        rows.append(_row("charge_per_phase", site.name, lim.charge_per_phase_max_uc, q, "uC"))
    area = site.contact_area_cm2
    if area >= physical.macro_area_min_cm2:
        k = -math.inf if q <= 0 else math.log10(q / area) + math.log10(q)
        rows.append(_row("shannon", site.name, physical.shannon_k, k, "k = log10(D) + log10(Q)"))
    if lim.injection_limit_uc_per_cm2 is not None:
        rows.append(_row("charge_injection", site.name, lim.injection_limit_uc_per_cm2, q / area, "uC/cm^2"))
    if len(sp):
        q1 = sp["amplitude_ua"] * sp["phase_width_us"]
        resid = np.abs(q1 - sp["second_phase_amplitude_ua"] * sp["second_phase_width_us"]) / q1
        # rounding only: the decoded pulses are balanced by construction; a residual above 1e-9 is a defect
        rows.append(_row("charge_balance", site.name, 1e-9, float(resid.max()),
                         "residual charge / phase charge, per pulse"))
    return rows


def _train_rows(site, lim, col, n_past, rate) -> list:
    """The plan's longest train and largest on-fraction over duty windows, counting the applied past before it."""
    g = max(1, int(math.ceil(round(rate / site.frequency_hz, 9))))  # the train stays on one pulse period
    c = np.concatenate([np.zeros(g, np.int64), np.cumsum(np.asarray(col) > 0)])
    on = (c[g:] - c[:-g]) > 0
    idx = np.arange(on.size)
    run = idx - np.maximum.accumulate(np.where(on, -1, idx))  # samples since the last off one
    rows = [_row("train_length", site.name, lim.train_length_max_s,
                 float(np.max(run[n_past:], initial=0)) / rate, "s")]
    span = lim.duty_window_s
    if span is not None and lim.duty_cycle_max_fraction < 1:
        w = max(1, int(round(span * rate)))
        c = np.concatenate([np.zeros(w, np.int64), np.cumsum(on)])
        most = float(np.max((c[w:] - c[:-w])[n_past:], initial=0)) / w
        light = site.pulse_duty if site.kind == "optical" else 1.0
        rows.append(_row("duty_cycle_window", site.name, lim.duty_cycle_max_fraction, most * light,
                         f"on-fraction per {span:g} s window"))
    return rows


def safety_checks(u, mapping, compiled, *, u_past=None) -> tuple[pd.DataFrame, list]:
    """Every check of a plan of model inputs against the compiled physical limits.

    Parameters
    ----------
    u : ndarray, shape (n_steps, n_sites)
        The planned model inputs.
    mapping : stimsteer.sysid.stimulation.InputMapping
    compiled : stimsteer.control.physical_limits.CompiledLimits
    u_past : ndarray, shape (n_past, n_sites), optional
        Inputs applied just before the plan: their pulses count in the charge-rate windows.

    Returns
    -------
    pulses : pandas.DataFrame
        The plan's pulse list (:func:`stimsteer.sysid.stimulation.decode_plan`).
    checks : list of dict
        ``rule, site, limit, value, unit, margin, margin_fraction, passed, source`` for every rule and site.
    """
    u = np.asarray(u, np.float64)
    pulses = decode_plan(u, mapping)
    physical, rate = compiled.physical, mapping.sample_rate_hz
    seq = u if u_past is None or not len(u_past) else np.vstack([np.asarray(u_past, np.float64), u])
    n_past = len(seq) - len(u)
    checks = []
    for j, site in enumerate(mapping.sites):
        lim = physical.sites[site.name]
        checks.append(_row("frequency", site.name, lim.frequency_max_hz, site.frequency_hz, "Hz",
                           name="frequency_max"))
        checks.append(_row("frequency", site.name, lim.frequency_min_hz, site.frequency_hz, "Hz",
                           smaller_is_safe=False, name="frequency_min"))
        if site.train.on_s is not None:  # the declared train cycle (the plan's own on/off: duty_cycle_window)
            duty = site.train.duty * (site.pulse_duty if site.kind == "optical" else 1.0)
            checks.append(_row("duty_cycle", site.name, lim.duty_cycle_max_fraction, duty, "fraction"))
        checks += _train_rows(site, replace(lim, duty_window_s=lim.duty_window_s or physical.window_s),
                              seq[:, j], n_past, rate)
        sp = pulses[pulses["site"] == site.name]
        if site.kind == "optical":
            top = float(sp["irradiance_mw_per_mm2"].max()) if len(sp) else 0.0
            checks.append(_row("irradiance", site.name, lim.irradiance_max_mw_per_mm2, top, "mW/mm^2"))
        else:
            checks += _electrical_rows(site, lim, sp, physical, rate, u[:, j])
    if compiled.window_charge_uc is not None or compiled.window_energy_uj is not None:
        every = decode_plan(seq, mapping, start_time_s=-n_past / rate)
    if compiled.window_charge_uc is not None:
        worst = float(np.max(window_charges_uc(every, physical.window_s), initial=0.0))
        checks.append(_row("charge_rate_window", "all", compiled.window_charge_uc, worst,
                           f"uC per {physical.window_s:g} s window"))
    if compiled.window_energy_uj is not None:
        worst = float(np.max(window_energies_uj(every, physical.window_s, mapping, physical), initial=0.0))
        checks.append(_row("energy_window", "all", compiled.window_energy_uj, worst,
                           f"uJ per {physical.window_s:g} s window"))
    return pulses, checks


def checks_pass(checks) -> bool:
    """True when every check passed."""
    return all(c["passed"] for c in checks)


def _header(record) -> str:
    lines = [f"# status: {record['status']}"]
    for key in ("model_file", "model_sha256", "session_content_hash"):
        lines.append(f"# {key}: {record.get(key)}")
    lines.append("# versions: " + json.dumps(record.get("versions", {}), sort_keys=True))
    lines.append("# mapping: " + record["mapping"]["rule"])
    lines.append("# limits: " + json.dumps(record["physical_limits"], default=_json_default, sort_keys=True))
    for c in record["checks"]:
        lines.append(f"# check: {c['rule']} site={c['site']} value={c['value']:.6g} limit={c['limit']:.6g} "
                     f"[{c['unit']}] margin={c['margin']:.6g} {'passed' if c['passed'] else 'FAILED'}")
    return "\n".join(lines) + "\n"


def _json_default(v):
    return None if isinstance(v, float) and not math.isfinite(v) else str(v)


def write_pulse_plan(folder, u, mapping, compiled, record, *, u_past=None) -> dict:
    """Write the parameter table and the pulse list (CSV, and NWB when pynwb is installed) into ``folder``.

    Parameters
    ----------
    folder : Path
        A folder being written atomically (the plan's temporary folder).
    u : ndarray, shape (n_steps, n_sites)
        The model inputs to deliver (the plan, or its safe fallback).
    mapping, compiled
        The mapping and compiled limits the plan was made under.
    record : dict
        ``status``, ``model_file``, ``model_sha256``, ``session_content_hash``, ``versions``; completed here with
        the mapping, the physical limits and the checks, and returned.
    u_past : ndarray, optional
        Inputs applied before the plan (count in the charge windows).

    Returns
    -------
    dict
        The completed record (what the files say), with ``files`` (names written).
    """
    pulses, checks = safety_checks(u, mapping, compiled, u_past=u_past)
    params = parameter_segments(u, mapping, scale=compiled.amplitude_max)  # one row per amplitude, to 1e-9 of its bound
    record = {**record, "mapping": mapping.record(), "physical_limits": compiled.physical.to_dict(),
              "amplitude_bound": {s.name: float(a) for s, a in zip(mapping.sites, compiled.amplitude_max)},
              "amplitude_bound_rule": dict(zip(mapping.description.names, compiled.binding_rule)),
              "checks": checks, "all_checks_passed": checks_pass(checks)}
    head = _header(record)
    files = ["plan_parameters.csv", "plan_pulses.csv"]
    for name, frame in (("plan_parameters.csv", params), ("plan_pulses.csv", pulses)):
        with open(folder / name, "w", encoding="utf-8", newline="") as fh:
            fh.write(head)
            frame.to_csv(fh, index=False, float_format="%.10g", lineterminator="\n")
    if _write_nwb(folder / "plan_pulses.nwb", pulses, params, record):
        files.append("plan_pulses.nwb")
    return {**record, "files": files}


def _write_nwb(path, pulses, params, record) -> bool:
    """Both tables as NWB TimeIntervals (:func:`stimsteer.sysid.io.nwb_intervals.write_nwb_intervals`; False when
    pynwb, whose schema the file follows, is not installed)."""
    tables = [(name, f"{what}; status {record['status']}", _interval_columns(frame, start, stop))
              for name, frame, start, stop, what in (
                  ("planned_pulses", pulses, "onset_s", "stop_s",
                   "one row per planned pulse (physical units in names)"),
                  ("planned_parameters", params, "start_s", "stop_s",
                   "per-site parameters over time (on/off segments)"))]
    return write_nwb_intervals(
        path, tables, session_description="stimsteer plan: planned stimulation pulses and parameters",
        identifier=str(record.get("model_sha256") or "stimsteer-plan"),
        session_start_time=datetime(1970, 1, 1, tzinfo=timezone.utc),  # plan time 0 = start of delivery
        notes=json.dumps({k: v for k, v in record.items() if k != "files"}, default=_json_default))


def _interval_columns(frame, start, stop) -> list:
    """``frame`` as the columns of one TimeIntervals table: ``start_time`` and ``stop_time`` from ``start`` and
    ``stop``, then every other column under its own name (text columns as text, missing text as "")."""
    cols = [IntervalColumn("start_time", "", frame[start]), IntervalColumn("stop_time", "", frame[stop])]
    for c in frame.columns:
        if c not in (start, stop):
            text = c in _TEXT
            values = [None if isinstance(v, float) and math.isnan(v) else v for v in frame[c]] if text else frame[c]
            cols.append(IntervalColumn(c, c.replace("_", " "), values, text=text))
    return cols


_TEXT = {"site", "kind", "leading_phase", "contacts", "return", "state", "waveform"}

