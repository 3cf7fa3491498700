"""The figure of a plan in physical terms: the pulses each site delivers, and how close every safety check comes.

Left, over the plan: one panel per site with a stem at every planned pulse (its leading-phase amplitude in the
site's own unit, µA or mA; mW/mm² for light), the charge per phase of the same pulses on the axis at the right
(``Q = I · PW``), and the site's amplitude bound as a dashed line named by the rule that sets it. Under them, when
the limits declare a rolling window, the charge delivered in the window ending at each moment (the inputs applied
before the plan included) against the declared budget. Right: one bar per check, the share of its limit the plan
uses, in linear physical quantities (the Shannon rule as the charge density reached over the density it allows at
that charge), with the value, the limit and the margin written beside it. Failed checks are red. The caution is
drawn into the figure.

Object API only (``matplotlib.figure.Figure``): no pyplot state, no backend switch, no global ``rcParams``.
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
from matplotlib.figure import Figure

from .._pulse_text import _fmt, _unit, check_usage, delivered
from ._glyphs import GlyphSafeFigure
from ._in_view import trim_ticks

__all__ = ["pulse_plan_figure", "pulse_plan_figure_of", "check_usage"]

_INK, _SOFT, _WARN, _FAIL, _LIMIT = "#24434f", "#9fb8c2", "#d9902a", "#b2302b", "#6b6b6b"
_ZONE = "#eef2ea"
# Titles here are given ``y=1.0``: a fixed place above the axes. Left to matplotlib, a title's place is found anew in
# each layout pass and in the draw, by measuring every tick of the axes' y axes (the charge axis too) for an offset
# text that could reach the title; these axes start at 0 in µA, mA, mW/mm² or µC and have no such text, and no tick
# labels on top. The picture is the same (compared pixel by pixel); the save takes about a tenth less time.
def pulse_plan_figure(pulses, mapping, compiled, checks, *, status: str, horizon_s: float, what: str = "",
                      window_pulses=None, caution: str = "") -> Figure:
    """Draw the pulses of a plan per site in physical units, and the margin of every safety check.

    Parameters
    ----------
    pulses : pandas.DataFrame
        The delivered pulse list (:func:`stimsteer.sysid.stimulation.decode_plan`).
    mapping : stimsteer.sysid.stimulation.InputMapping
    compiled : stimsteer.control.physical_limits.CompiledLimits
    checks : list of dict
        :func:`stimsteer.control.pulse_plan.safety_checks` rows.
    status : str
        The pulse plan's status (title).
    horizon_s : float
        Length of the plan, seconds.
    what : str, optional
        The model and route (title).
    window_pulses : pandas.DataFrame, optional
        The pulses of the inputs applied before the plan and of the plan, on the plan's clock (negative times
        before it): the rolling-window panel counts them.
    caution : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    sites = list(mapping.sites)
    m = len(sites)
    window = compiled.window_charge_uc is not None and compiled.physical.window_s
    rows = [(c, check_usage(c, _site(sites, c["site"]))) for c in checks]
    rows = [(c, u) for c, u in rows if u is not None]
    fig = GlyphSafeFigure(figsize=(12.5, 1.9 * m + (2.2 if window else 0.6) + 1.6), layout="constrained")
    outer = fig.add_gridspec(1, 2, width_ratios=[1.5, 1.0])
    left = outer[0].subgridspec(m + (1 if window else 0), 1)
    axes = [fig.add_subplot(left[i]) for i in range(m)]
    for ax in axes[1:]:
        ax.sharex(axes[0])
    for ax, site, bound, rule in zip(axes, sites, compiled.amplitude_max, compiled.binding_rule):
        _site_panel(ax, site, pulses, float(bound), rule, horizon_s)
    axes[-1].set_xlabel("time from the plan's start [ms]", fontsize=8)
    if window:
        ax_w = fig.add_subplot(left[m])
        _window_panel(ax_w, window_pulses if window_pulses is not None else pulses, compiled, horizon_s)
    _margin_chart(fig.add_subplot(outer[1]), rows)
    fig.suptitle(f"Pulses of the plan by {what}: {status}" if what else f"stimsteer plan, pulses: {status}",
                 fontsize=11, x=0.01, ha="left")
    if caution:
        fig.supxlabel(textwrap.fill(caution, 170), fontsize=7, color="#7a4a00", x=0.01, ha="left")
    trim_ticks(fig)
    return fig


def _site(sites, name):
    return next((s for s in sites if s.name == name), None)


def _site_text(site) -> str:
    if site.kind == "optical":
        return f"light pulses {_fmt(site.pulse_width_ms)} ms at {_fmt(site.frequency_hz)} Hz"
    ret = (f"{_fmt(site.second_phase_width_us)} µs at {_fmt(site.second_phase_ratio)} ×" if
           site.waveform == "asymmetric" else f"{_fmt(site.second_phase_width_us)} µs")
    area = f"; {_fmt(site.contact_area_cm2)} cm²" if site.contact_area_cm2 else ""
    material = f" {site.material}" if site.material else ""
    return (f"{site.leading_phase}-first {site.waveform} biphasic, {_fmt(site.frequency_hz)} Hz: "
            f"{_fmt(site.phase_width_us)} µs, gap {_fmt(site.interphase_gap_us)} µs, return {ret}{area}{material}")


def _site_panel(ax, site, pulses, bound_ua, rule, horizon_s) -> None:
    optical = site.kind == "optical"
    unit = _unit("mW/mm^2" if optical else site.amplitude_unit)
    per = 1.0 if optical else site.amplitude_factor_ua()  # µA per displayed unit
    sp = pulses[pulses["site"] == site.name] if len(pulses) else pulses
    col = "irradiance_mw_per_mm2" if optical else "amplitude_ua"
    t = sp["onset_s"].to_numpy(np.float64) * 1e3 if len(sp) else np.zeros(0)
    a = sp[col].to_numpy(np.float64) / per if len(sp) else np.zeros(0)
    top = bound_ua / per
    ax.axhspan(0.0, top, color=_ZONE, lw=0, zorder=0)
    ax.axhline(top, color=_LIMIT, lw=1.0, ls="--", zorder=1)
    ax.vlines(t, 0.0, a, color=_INK, lw=1.6, zorder=3)
    ax.plot(t, a, "o", ms=3, color=_INK, zorder=4)
    ax.set_xlim(-0.02 * horizon_s * 1e3, horizon_s * 1e3 * 1.02)
    ax.set_ylim(0.0, max(top, float(a.max(initial=0.0))) * 1.22)
    peak = float(a.max(initial=0.0))
    ax.text(0.995, top, f"bound {_fmt(top)} {unit}: {rule.replace('_', ' ')}", transform=ax.get_yaxis_transform(),
            ha="right", va="bottom", fontsize=7, color=_LIMIT)
    ax.set_title(f"{site.name}: {len(sp)} pulse(s), largest {_fmt(peak)} {unit}", fontsize=9, loc="left", y=1.0)
    ax.set_ylabel(f"amplitude [{unit}]", fontsize=8)
    ax.text(0.005, 0.97, _site_text(site), transform=ax.transAxes, fontsize=6.5, color=_LIMIT, va="top", ha="left")
    if not optical:
        pw = site.phase_width_us * 1e-6 * per  # µC per displayed unit
        sec = ax.secondary_yaxis("right", functions=(lambda x, k=pw: x * k, lambda q, k=pw: q / k))
        sec.set_ylabel("charge per phase [µC]", fontsize=8)
        sec.tick_params(labelsize=7)
    ax.spines["top"].set_visible(False)
    ax.tick_params(labelsize=7)


def _window_panel(ax, pulses, compiled, horizon_s) -> None:
    """Charge per phase delivered in the rolling window ending at each moment, against the budget."""
    w, budget = compiled.physical.window_s, compiled.window_charge_uc
    el = pulses[pulses["kind"] == "electrical"] if len(pulses) else pulses
    t_end = np.linspace(0.0, horizon_s, 400)
    if len(el):
        t = el["onset_s"].to_numpy(np.float64)
        q = el["charge_per_phase_uc"].to_numpy(np.float64)
        charge = np.array([q[(t > te - w) & (t <= te)].sum() for te in t_end])
    else:
        charge = np.zeros_like(t_end)
    ax.axhspan(0.0, budget, color=_ZONE, lw=0, zorder=0)
    ax.axhline(budget, color=_LIMIT, lw=1.0, ls="--")
    ax.plot(t_end * 1e3, charge, color=_INK, lw=1.5)
    ax.text(0.995, budget, f"budget {_fmt(budget)} µC per {_fmt(w)} s window "
            f"({_fmt(compiled.physical.charge_rate_max_uc_per_s)} µC/s)", transform=ax.get_yaxis_transform(),
            ha="right", va="bottom", fontsize=7, color=_LIMIT)
    ax.set_ylim(0.0, max(budget, float(charge.max(initial=0.0))) * 1.25)
    ax.set_xlim(-0.02 * horizon_s * 1e3, horizon_s * 1e3 * 1.02)
    ax.set_title(f"all sites: charge per phase in the last {_fmt(w)} s (earlier inputs included)", fontsize=9,
                 loc="left", y=1.0)
    ax.set_ylabel("charge [µC]", fontsize=8)
    ax.set_xlabel("time from the plan's start [ms]", fontsize=8)
    ax.spines[["top", "right"]].set_visible(False)
    ax.tick_params(labelsize=7)


_ORDER = ("amplitude", "charge_per_phase", "shannon", "charge_injection", "irradiance", "frequency_max",
          "frequency_min", "duty_cycle", "train_length", "charge_rate_window")


def _grouped(rows) -> list:
    """Rows grouped by site (in the order the checks name them, "all" last), each group under a header."""
    sites = list(dict.fromkeys(c["site"] for c, _ in rows))
    sites = [x for x in sites if x != "all"] + (["all"] if "all" in sites else [])
    out = []
    for site in sites:
        mine = sorted((r for r in rows if r[0]["site"] == site),
                      key=lambda r: _ORDER.index(r[0]["rule"]) if r[0]["rule"] in _ORDER else len(_ORDER))
        out.append(("all sites" if site == "all" else site, None))
        out += mine
    return out


def _margin_chart(ax, rows) -> None:
    """One bar per check: the share of its limit used, its value, limit and margin written beside it."""
    entries = _grouped(rows)
    n = len(entries)
    y = np.arange(n)[::-1].astype(float)
    labels, bars = [], []  # bars: (y, share used, colour) of each check, drawn by two barh calls
    for yi, (c, u) in zip(y, entries):
        if u is None:  # a site's header
            labels.append("")
            ax.text(-0.02, yi - 0.1, c, transform=ax.get_yaxis_transform(), ha="right", va="center", fontsize=8.5,
                    fontweight="bold", color=_INK)
            continue
        used = min(u["used"], 1.25) if math.isfinite(u["used"]) else 1.25
        bars.append((yi, used, _FAIL if not u["passed"] else (_WARN if u["used"] > 0.9 else _INK)))
        ax.text(1.28, yi, u["text"] + ("" if u["passed"] else "  FAILED"), va="center", ha="left", fontsize=6.8,
                color=_FAIL if not u["passed"] else _INK)
        labels.append(u["label"])
    if bars:
        at, used, colours = zip(*bars)
        ax.barh(at, 1.0, height=0.62, color=_ZONE, lw=0, zorder=0)
        ax.barh(at, used, height=0.62, color=list(colours), lw=0, zorder=2)
    ax.axvline(1.0, color=_LIMIT, lw=1.0, ls="--", zorder=3)
    # each row's name where a tick label would be (3.5 points left of the axes), as a plain text: a tick per row
    # costs a tick's lines and texts, made and measured again in every layout pass, for a label and nothing else
    to_row = ax.get_yaxis_transform()
    for yi, label in zip(y, labels):
        if label:
            ax.annotate(label, xy=(0.0, yi), xycoords=to_row, xytext=(-3.5, 0.0), textcoords="offset points",
                        ha="right", va="center_baseline", fontsize=7.5, annotation_clip=False)
    ax.set_yticks([])
    ax.set_xlim(0.0, 3.3)  # the bars use 0 .. 1.25, their text the rest
    ax.set_ylim(-0.6, n - 0.4)
    ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0], ["0", "25", "50", "75", "100 %"], fontsize=7)
    ax.set_xlabel("share of the limit used (dashed: the limit; amber above 90 %, red: failed)",
                  fontsize=8, loc="left")
    ax.set_title("every safety check: value, limit and margin", fontsize=9, loc="left", y=1.0)
    ax.spines[["top", "right", "left"]].set_visible(False)


def pulse_plan_figure_of(physical, plan, *, what: str = "") -> Figure:
    """:func:`pulse_plan_figure` of a written physical plan (``control._plan_physical.PhysicalPlan``): the pulses it
    delivers (none when a check failed), its checks and status, the inputs applied before it in the window."""
    u, pulses, everything = delivered(physical, plan)
    return pulse_plan_figure(pulses, physical.mapping, physical.compiled, physical.record["checks"],
                             status=str(physical.record["status"]), horizon_s=u.shape[0] /
                             physical.mapping.sample_rate_hz, what=what, window_pulses=everything,
                             caution=getattr(plan, "caution", ""))
