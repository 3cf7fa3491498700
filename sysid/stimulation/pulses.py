"""Recorded pulse events onto the model grid (encode) and plans back into pulses (decode), by an :class:`InputMapping`.

A pulse table has one row per delivered pulse: ``time_s`` (onset, stimulation clock), ``site``, ``amplitude`` (the
leading phase, non-negative, in ``amplitude_unit`` or the site's declared unit), and optionally ``phase_width_us``,
``second_phase_amplitude``, ``leading_phase`` and, for optical sites, ``power_mw`` instead of an irradiance
amplitude (irradiance = power / illuminated area, by definition). Every pulse is checked before it is placed:

- a negative amplitude is refused (polarity is the site's ``leading_phase`` category, never a sign);
- a pulse whose ``leading_phase`` differs from its site's is refused (declare one site per configuration);
- a phase width other than the site's is refused (the mapping holds width and frequency fixed);
- a pulse that does not return its charge (``a₂ · PW₂ ≠ a₁ · PW₁``) is refused;
- two pulses of one site that overlap in time (an onset before the previous pulse has ended) are refused;
- an amplitude in a unit of another kind (mW/mm² on an electrical site) is refused.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..exceptions import SessionError
from .mapping import InputMapping
from .units import unit_factor

__all__ = ["encode_pulse_table", "decode_plan", "parameter_segments", "PULSE_COLUMNS"]

#: Columns of a decoded pulse list (units in the names).
PULSE_COLUMNS = ("onset_s", "stop_s", "site", "kind", "leading_phase", "amplitude_ua", "phase_width_us",
                 "interphase_gap_us", "second_phase_amplitude_ua", "second_phase_width_us", "charge_per_phase_uc",
                 "irradiance_mw_per_mm2", "pulse_width_ms", "contacts", "return")


def _rows(table) -> pd.DataFrame:
    frame = table if isinstance(table, pd.DataFrame) else pd.DataFrame(list(table))
    missing = [c for c in ("time_s", "site") if c not in frame.columns]
    if missing or ("amplitude" not in frame.columns and "power_mw" not in frame.columns):
        raise SessionError(f"the pulse table needs columns time_s, site and amplitude (or power_mw for optical "
                           f"sites); it has {list(frame.columns)}.")
    return frame.reset_index(drop=True)


def _amplitudes(frame, site, mapping) -> np.ndarray:
    """The physical amplitudes (µA; mW/mm² for optical) of one site's rows, every check applied."""
    where = f"site {site.name!r}"
    unit_col = frame["amplitude_unit"] if "amplitude_unit" in frame.columns else None
    kind = "irradiance" if site.kind == "optical" else "current"
    if site.kind == "optical" and "power_mw" in frame.columns and frame["power_mw"].notna().any():
        if not site.illuminated_area_mm2:
            raise SessionError(f"{where}: the pulse table gives power_mw but the site declares no illuminated_area; "
                               "declare it (irradiance = power / area).")
        amp = frame["power_mw"].to_numpy(np.float64) / site.illuminated_area_mm2
    else:
        if site.kind == "electrical" and "power_mw" in frame.columns and frame["power_mw"].notna().any():
            raise SessionError(f"{where}: an electrical site cannot take power_mw; give amplitudes in uA or mA.")
        raw = frame["amplitude"].to_numpy(np.float64)
        units = [site.amplitude_unit] * len(raw) if unit_col is None else [
            site.amplitude_unit if (u is None or (isinstance(u, float) and math.isnan(u))) else str(u)
            for u in unit_col]
        amp = np.array([a * unit_factor(u, kind, f"{where}: amplitude_unit", f"{where}: amplitude")
                        for a, u in zip(raw, units)])
    if not np.all(np.isfinite(amp)):
        raise SessionError(f"{where}: the pulse table holds non-finite amplitudes; fix or remove those rows.")
    if np.any(amp < 0):
        i = int(np.flatnonzero(amp < 0)[0])
        raise SessionError(f"{where}: amplitude {amp[i]:g} at {frame['time_s'].iloc[i]:g} s is negative; amplitudes "
                           "are magnitudes, polarity is the site's leading_phase (declare a second site for the "
                           "other polarity).")
    return amp


def _check_site_rows(frame, site) -> None:
    where = f"site {site.name!r}"
    if site.kind == "electrical" and "leading_phase" in frame.columns:
        bad = frame["leading_phase"].dropna().astype(str)
        bad = bad[bad != site.leading_phase]
        if len(bad):
            raise SessionError(f"{where}: a pulse at {frame['time_s'][bad.index[0]]:g} s leads with "
                               f"{bad.iloc[0]!r}, the site is declared {site.leading_phase!r}; declare one site per "
                               "polarity and contact configuration.")
    if site.kind == "electrical" and "phase_width_us" in frame.columns:
        pw = frame["phase_width_us"].to_numpy(np.float64)
        off = np.flatnonzero(np.isfinite(pw) & (np.abs(pw - site.phase_width_us) > 1e-6 * site.phase_width_us))
        if off.size:
            raise SessionError(f"{where}: a pulse at {frame['time_s'][off[0]]:g} s has phase width {pw[off[0]]:g} us, "
                               f"the site declares {site.phase_width_us:g} us; the mapping holds width fixed.")
    if site.kind == "electrical" and "second_phase_amplitude" in frame.columns:
        a1 = frame["amplitude"].to_numpy(np.float64)
        a2 = frame["second_phase_amplitude"].to_numpy(np.float64)
        imb = np.abs(a2 * site.second_phase_width_us - a1 * site.phase_width_us)
        bad = np.flatnonzero(np.isfinite(a2) & (imb > 1e-6 * np.maximum(a1 * site.phase_width_us, 1e-300)))
        if bad.size:
            i = int(bad[0])
            raise SessionError(f"{where}: the pulse at {frame['time_s'][i]:g} s is charge-imbalanced: "
                               f"{a1[i]:g} x {site.phase_width_us:g} us leading vs {a2[i]:g} x "
                               f"{site.second_phase_width_us:g} us returning; every pulse must return its charge.")
    t = np.sort(frame["time_s"].to_numpy(np.float64))
    gap = np.diff(t)
    hit = np.flatnonzero(gap < site.pulse_duration_us * 1e-6)
    if hit.size:
        i = int(hit[0])
        raise SessionError(f"{where}: pulses at {t[i]:.6g} s and {t[i + 1]:.6g} s overlap (each lasts "
                           f"{site.pulse_duration_us:g} us); remove the duplicate or fix the times.")


def encode_pulse_table(table, mapping: InputMapping, *, n_samples: int, start_time_s: float = 0.0,
                       offset_s: float = 0.0) -> tuple[np.ndarray, dict]:
    """Recorded pulses onto the model grid by the declared mapping (one column per site, in the site order).

    Parameters
    ----------
    table : pandas.DataFrame or sequence of dict
        The pulse table (module docstring).
    mapping : InputMapping
    n_samples, start_time_s
        The model grid (its rate is the mapping's).
    offset_s : float, default 0.0
        Stimulation clock to model clock: ``t_model = time_s + offset_s``.

    Returns
    -------
    u : ndarray, shape (n_samples, n_sites)
        Model inputs (non-negative).
    record : dict
        The mapping record, with the number of pulses placed and dropped (off the grid).

    Raises
    ------
    SessionError
        Any refused pulse (module docstring), an undeclared site or non-finite times.
    """
    frame = _rows(table)
    names = list(mapping.description.names)
    unknown = sorted(set(frame["site"].astype(str)) - set(names))
    if unknown:
        raise SessionError(f"the pulse table names sites {unknown} that the stimulation description does not "
                           f"declare ({names}); declare them or remove those pulses.")
    t_all = frame["time_s"].to_numpy(np.float64)
    if not np.all(np.isfinite(t_all)):
        raise SessionError("the pulse table holds non-finite times; fix or remove those rows.")
    rate, n = mapping.sample_rate_hz, int(n_samples)
    amp_grid = np.zeros((n, len(names)))
    placed = 0
    for j, site in enumerate(mapping.sites):
        rows = frame[frame["site"].astype(str) == site.name].reset_index(drop=True)
        if rows.empty:
            continue
        _check_site_rows(rows, site)
        amp = _amplitudes(rows, site, mapping)
        t = rows["time_s"].to_numpy(np.float64) + offset_s - start_time_s
        # the amplitude is held for one pulse period: it covers samples [k(t), k(t + 1/f)) (at least its own)
        k0 = np.floor(t * rate + 1e-9).astype(np.int64)
        k1 = np.maximum(np.ceil((t + 1.0 / site.frequency_hz) * rate - 1e-9).astype(np.int64), k0 + 1)
        on = (k0 >= 0) & (k0 < n)
        placed += int(on.sum())
        for a, b, v in zip(k0[on], np.minimum(k1[on], n), amp[on]):
            amp_grid[a:b, j] = np.maximum(amp_grid[a:b, j], v)
    if len(frame) and not placed:
        raise SessionError(f"no pulse falls on the recording: pulses span {t_all.min() + offset_s:.3f} to "
                           f"{t_all.max() + offset_s:.3f} s on the model clock, the recording {start_time_s:g} to "
                           f"{start_time_s + n / rate:g} s. Check the clock offset.")
    record = {**mapping.record(), "n_pulses": placed, "n_pulses_off_grid": int(len(frame) - placed),
              "offset_s": float(offset_s)}
    return mapping.to_model(amp_grid), record


def _delivered(u, mapping: InputMapping, zero_tol: float) -> np.ndarray:
    """Physical amplitudes of model inputs, with values at or below ``zero_tol`` of the largest set to 0 (no pulse):
    the pulse list and the parameter table agree on which samples deliver."""
    amp = mapping.to_physical(np.maximum(u, 0.0))
    amp[amp <= zero_tol * max(float(np.max(amp, initial=0.0)), 1e-300)] = 0.0
    return amp


def _onsets(site, rate, n_samples, start_time_s):
    """Pulse onset times of a site's train over ``n_samples`` and the sample each falls in."""
    n_pulses = int(math.ceil(n_samples * site.frequency_hz / rate - 1e-9))
    idx = np.arange(n_pulses)
    k = np.floor(idx * rate / site.frequency_hz + 1e-9).astype(np.int64)
    keep = k < n_samples
    return start_time_s + idx[keep] / site.frequency_hz, k[keep]


def _runs(a, tol: float) -> list:
    """Row boundaries ``[0, ..., a.size]`` of ``a``: a row ends where on/off changes or a value leaves ``tol`` of the
    row's first value (within an exact run all values are equal, so only its first needs a look)."""
    if not a.size:
        return [0]
    starts = [0]
    for k in np.flatnonzero(np.diff(a) != 0) + 1:
        first = a[starts[-1]]
        if (a[k] > 0) != (first > 0) or abs(a[k] - first) > tol:
            starts.append(int(k))
    return starts + [a.size]


def decode_plan(u, mapping: InputMapping, *, start_time_s: float = 0.0, zero_tol: float = 1e-9) -> pd.DataFrame:
    """The pulses a plan of model inputs asks for: one per onset ``t₀ + n / f`` where the input is positive.

    Parameters
    ----------
    u : ndarray, shape (n_steps, n_sites)
        Model inputs; values at or below ``zero_tol`` (relative to the largest) deliver no pulse.
    mapping : InputMapping
    start_time_s : float, default 0.0

    Returns
    -------
    pandas.DataFrame
        One row per pulse, columns :data:`PULSE_COLUMNS`, sorted by onset then site.
    """
    u = np.asarray(u, np.float64).reshape(-1, len(mapping.sites))
    amp = _delivered(u, mapping, zero_tol)
    rows = []
    for j, site in enumerate(mapping.sites):
        t, k = _onsets(site, mapping.sample_rate_hz, u.shape[0], start_time_s)
        for tn, kn in zip(t, k):
            a = float(amp[kn, j])
            if a > 0:
                rows.append(_pulse_row(site, tn, a))
    frame = pd.DataFrame(rows, columns=list(PULSE_COLUMNS))
    return frame.sort_values(["onset_s", "site"], kind="stable").reset_index(drop=True)


def _pulse_row(site, onset, a) -> dict:
    if site.kind == "optical":
        return {"onset_s": onset, "stop_s": onset + site.pulse_width_ms * 1e-3, "site": site.name, "kind": "optical",
                "irradiance_mw_per_mm2": a, "pulse_width_ms": site.pulse_width_ms}
    return {"onset_s": onset, "stop_s": onset + site.pulse_duration_us * 1e-6, "site": site.name,
            "kind": "electrical", "leading_phase": site.leading_phase, "amplitude_ua": a,
            "phase_width_us": site.phase_width_us, "interphase_gap_us": site.interphase_gap_us,
            "second_phase_amplitude_ua": a * site.second_phase_ratio,
            "second_phase_width_us": site.second_phase_width_us,
            "charge_per_phase_uc": a * site.phase_width_us * 1e-6, "contacts": "+".join(site.contacts),
            "return": "+".join(site.return_contacts)}


def parameter_segments(u, mapping: InputMapping, *, start_time_s: float = 0.0, zero_tol: float = 1e-9,
                       merge_rtol: float = 1e-9, scale=None) -> pd.DataFrame:
    """The per-site parameter table over time: one row per run of equal amplitude (``on`` or ``off``).

    Values at or below ``zero_tol`` of the largest are off, as in :func:`decode_plan` (no pulse there).

    Neighbouring samples of one site belong to one row when both are on (or both off) and their amplitudes agree
    within ``merge_rtol × scale`` of the row's first value (the row then gives its largest amplitude). Why a
    tolerance: a plan that sits on a bound holds it only to rounding (the solver, the projection onto the limits and
    the unit conversion leave differences of about 1e-14 of the bound), and with exact equality the rows split or
    join on the last bit, so the table changed with rounding-level changes upstream. Why ``1e-9`` of the bound: far
    above rounding (double precision is 2.2e-16 relative; the solves lose a few more digits) and far below any
    stimulator's amplitude step (current and light sources set amplitude with a DAC of 8 to 16 bits, steps of 1/256
    to 1/65536 of their range; from memory, no source): rows a stimulator cannot tell apart are merged, rows it can
    are never.

    Parameters
    ----------
    u : ndarray, shape (n_steps, n_sites)
        Model inputs.
    mapping : InputMapping
    start_time_s : float, default 0.0
    zero_tol : float, default 1e-9
        Values at or below this fraction of the largest deliver nothing (``off``).
    merge_rtol : float, default 1e-9
        Amplitudes within this fraction of ``scale`` are one row.
    scale : array-like, shape (n_sites,), optional
        Per-site amplitude scale in the physical unit: the amplitude bound (what :mod:`stimsteer.control.pulse_plan`
        passes). Default: the site's largest amplitude in ``u``.

    Returns
    -------
    pandas.DataFrame
        Columns: ``start_s``, ``stop_s``, ``site``, ``state`` (on/off), ``amplitude`` in the physical unit (µA;
        mW/mm² for optical) under ``amplitude_ua`` or ``irradiance_mw_per_mm2``, ``phase_width_us`` (µs; optical:
        the pulse width in µs), ``frequency_hz``, ``leading_phase``, ``waveform``, ``contacts``, ``return``.
    """
    u = np.asarray(u, np.float64).reshape(-1, len(mapping.sites))
    amp = _delivered(u, mapping, zero_tol)
    scale = np.max(amp, axis=0, initial=0.0) if scale is None else np.asarray(scale, np.float64)
    rate, rows = mapping.sample_rate_hz, []
    for j, site in enumerate(mapping.sites):
        a = amp[:, j]
        cut = _runs(a, merge_rtol * float(scale[j]))
        for lo, hi in zip(cut[:-1], cut[1:]):
            v = float(a[lo:hi].max())
            elec = site.kind == "electrical"
            rows.append({"start_s": start_time_s + lo / rate, "stop_s": start_time_s + hi / rate,
                         "site": site.name, "state": "on" if v > 0 else "off",
                         "amplitude_ua": v if elec else np.nan, "irradiance_mw_per_mm2": np.nan if elec else v,
                         "phase_width_us": site.phase_width_us if elec else site.pulse_width_ms * 1e3,
                         "frequency_hz": site.frequency_hz,
                         "leading_phase": site.leading_phase if elec else "",
                         "waveform": f"{site.waveform} biphasic" if elec else "light pulse",
                         "contacts": "+".join(site.contacts) if elec else "",
                         "return": "+".join(site.return_contacts) if elec else ""})
    return pd.DataFrame(rows)
