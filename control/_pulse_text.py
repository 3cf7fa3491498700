"""Words and numbers of a plan in physical terms: each check as the share of its limit used, and the console lines
of ``plan --stimulation`` (per site: pulses, amplitude range, waveform, charge per phase and the tightest check).

Shared by the command line and the pulse-plan figure (:mod:`stimsteer.control.figures.pulse_plan`).
"""

from __future__ import annotations

import math

import numpy as np

from ..sysid.stimulation import decode_plan

__all__ = ["check_usage", "delivered", "pulse_plan_lines"]

_RULE_NAMES = {"amplitude": "amplitude (both phases)", "charge_per_phase": "charge per phase",
               "shannon": "charge density, Shannon", "charge_injection": "charge density, material",
               "frequency": "frequency", "duty_cycle": "duty cycle", "train_length": "train length",
               "irradiance": "irradiance", "charge_rate_window": "charge in every window"}


def _unit(text: str) -> str:
    """Units as a reader writes them: µ for the ``u`` prefix, ² for ``^2``."""
    out = []
    for word in str(text).split(" "):
        if len(word) > 1 and word[0] == "u" and word[1] in "ACsVm":
            word = "µ" + word[1:]
        out.append(word.replace("^2", "²"))
    return " ".join(out)


def _fmt(v: float) -> str:
    return f"{v:.3g}" if abs(v) >= 1e-3 or v == 0 else f"{v:.2e}"


def check_usage(check: dict, site=None) -> dict | None:
    """One check as the share of its limit the plan uses, in a linear physical quantity (None: not drawn).

    Returns ``{"label", "used", "text", "passed"}``; ``used`` is value / limit (1 = at the limit). The Shannon
    check (a log rule, ``k = log10(D) + log10(Q)``) is shown as the charge density reached over the density the rule
    allows at that charge: with ``Q_max = sqrt(10**k · A)``, ``D / D_max = Q / Q_max``. Checks without a finite
    limit and the charge-balance check (rounding only) are not drawn.

    Examples
    --------
    >>> u = check_usage({"rule": "amplitude", "site": "s", "limit": 50.0, "value": 40.0, "unit": "uA",
    ...                  "margin": 10.0, "passed": True})
    >>> round(u["used"], 2), u["text"]
    (0.8, '40 of 50 µA, margin 10 (20 %)')
    """
    rule, limit, value = check["rule"], check["limit"], check["value"]
    if rule == "charge_balance" or limit is None or not math.isfinite(limit) or limit <= 0:
        return None
    if (rule == "duty_cycle" and limit >= 1.0) or (rule == "frequency_min" and check["passed"]):
        return None  # a duty of 1 allows anything; the lowest frequency is drawn only when it fails
    if rule == "shannon":
        if site is None:
            return None
        area = site.contact_area_cm2
        q = 0.0 if not math.isfinite(value) else math.sqrt(10.0 ** value * area)  # Q² / A = 10**k
        q_max = math.sqrt(10.0 ** limit * area)
        used = q / q_max
        text = (f"{_fmt(q / area)} of {_fmt(q_max / area)} µC/cm² (k {_fmt(value) if q else '-inf'} ≤ "
                f"{_fmt(limit)}), margin {100 * (1 - used):.0f} %")
        return {"label": _RULE_NAMES[rule], "used": used, "text": text, "passed": bool(check["passed"])}
    if rule == "frequency_min":
        used, label = limit / value if value else math.inf, "frequency (lowest allowed)"
    else:
        used, label = value / limit, _RULE_NAMES.get(rule.replace("_max", ""), rule)
    unit = check["unit"].split(" per ")[0] if rule == "charge_rate_window" else check["unit"]
    margin = check["margin"]
    text = f"{_fmt(value)} of {_fmt(limit)} {_unit(unit)}, margin {_fmt(margin)} ({100 * margin / abs(limit):.0f} %)"
    return {"label": label, "used": used, "text": text, "passed": bool(check["passed"])}


def delivered(physical, plan):
    """``(u, pulses, everything)`` of a written physical plan: the model inputs it delivers (zero when a check
    failed), their pulse list, and the pulses of the inputs applied before it and of the plan (plan clock)."""
    u = np.asarray(plan.inputs, np.float64)
    if not physical.delivered:
        u = np.zeros_like(u)
    rate = physical.mapping.sample_rate_hz
    past = np.zeros((0, u.shape[1])) if physical.u_past is None else np.asarray(physical.u_past, np.float64)
    everything = decode_plan(np.vstack([past, u]), physical.mapping, start_time_s=-past.shape[0] / rate)
    return u, decode_plan(u, physical.mapping), everything


def pulse_plan_lines(physical, plan) -> list[str]:
    """One line per site (pulses, amplitudes in the site's unit, waveform, charge per phase, the check closest to
    its limit) and one for the checks of all sites together."""
    _, pulses, _ = delivered(physical, plan)
    checks = physical.record["checks"]
    lines = []
    for site in physical.mapping.sites:
        sp = pulses[pulses["site"] == site.name] if len(pulses) else pulses
        lines.append(f"  {site.name}: " + (_site_pulses(site, sp) if len(sp) else "no pulse") + "; "
                     + _tightest([c for c in checks if c["site"] == site.name], site))
    rest = [c for c in checks if c["site"] == "all"]
    if rest:
        lines.append("  all sites: " + _tightest(rest, None))
    return lines


def _site_pulses(site, sp) -> str:
    if site.kind == "optical":
        v = sp["irradiance_mw_per_mm2"]
        return (f"{len(sp)} light pulse(s) of {_fmt(site.pulse_width_ms)} ms at {_fmt(site.frequency_hz)} Hz, "
                f"{_fmt(v.min())} .. {_fmt(v.max())} mW/mm²")
    per = site.amplitude_factor_ua()
    a = sp["amplitude_ua"] / per
    return (f"{len(sp)} pulse(s) at {_fmt(site.frequency_hz)} Hz, {_fmt(a.min())} .. {_fmt(a.max())} "
            f"{_unit(site.amplitude_unit)}, {site.leading_phase}-first {site.waveform} biphasic, "
            f"{_fmt(site.phase_width_us)} µs leading phase, up to {_fmt(sp['charge_per_phase_uc'].max())} µC per phase")


def _tightest(checks, site) -> str:
    rows = [(c, check_usage(c, site)) for c in checks]
    rows = [(c, u) for c, u in rows if u is not None]
    if not rows:
        return "no declared limit to check"
    failed = [u for _, u in rows if not u["passed"]]
    if failed:
        return "FAILED " + "; ".join(f"{u['label']}: {u['text']}" for u in failed)
    chosen = [r for r in rows if not r[0]["rule"].startswith("frequency")] or rows  # the plan sets no frequency
    _, u = max(chosen, key=lambda r: r[1]["used"])
    return f"closest to its limit: {u['label']}, {u['text']}"
