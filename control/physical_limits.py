"""Limits in physical terms: the ``[physical]`` section of the limits file, compiled onto a model's inputs.

The section speaks of what a stimulator delivers (every key says its unit; pint converts ``_ma`` and ``_ua`` alike)::

    [physical]
    shannon_k = 1.75                   # Shannon's k for macro contacts (below 1.85)
    macro_area_min_cm2 = 0.001         # contacts at least this large are "macro": the Shannon rule applies
    window_s = 1.0                     # rolling window of delivered stimulation, s
    charge_rate_max_uc_per_s = 40.0    # average charge per phase delivered per second over every such window

    [physical.sites.stn_left]          # one table per site of the stimulation description
    amplitude_max_ma = 3.0             # largest phase amplitude (either phase), mA or uA
    charge_per_phase_max_uc = 0.3      # largest charge per phase, µC
    injection_limit_uc_per_cm2 = 100   # material charge-injection limit: required for contacts below macro size
    frequency_min_hz = 2.0             # the declared frequency range
    frequency_max_hz = 185.0
    duty_cycle_max_fraction = 1.0      # fraction of time a train may be on (train_on / (train_on + train_off))
    train_length_max_s = 60.0          # longest continuous train

    [physical.sites.opto_1]
    irradiance_max_mw_per_mm2 = 10.0   # largest irradiance at the fibre tip
    duty_cycle_max_fraction = 0.2      # light-on fraction (pulse width x frequency x train duty): heating

How each rule becomes a bound on the model input (:func:`compile_limits`): the largest allowed leading-phase
amplitude ``I_max`` of a site is the least of the amplitude limit (divided by ``max(1, PW₁/PW₂)`` for an
asymmetric waveform, whose second phase is stronger when shorter), ``Q_max / PW`` (charge per phase, ``Q = I · PW``,
common practice), ``sqrt(10**k · A) / PW`` for a macro contact (Shannon 1992) or ``D_inj · A / PW`` for a smaller
contact (the declared material limit; planning is refused without one). The model input is ``gain · I``
(:class:`~stimsteer.sysid.stimulation.InputMapping`), so the bound is ``[0, gain · I_max]``.

The charge-rate budget ``R`` over windows of ``window_s`` seconds is a charge ``Q_w = R · window_s`` per window.
A window of ``window_s`` seconds meets at most ``W = ceil(window_s · rate) + 1`` sample periods, each delivering
at most ``c_i · u_i`` µC per site (``c_i`` = pulses per sample · PW / gain). By Cauchy–Schwarz
``Σ_k Σ_i c_i u_ik <= sqrt(W · Σ_i c_i²) · ‖u‖₂``, so the energy budget ``Σ u² <= Q_w² / (W · Σ_i c_i²)`` over every
window of ``W`` samples (the rolling budget every controller and closed loop already enforces from the applied
inputs, :mod:`stimsteer.control.mpc._budget`) keeps the delivered charge of every window within ``Q_w``. It is exact
for a constant train on one site whose ``c_i`` is the only one, and conservative otherwise (the more so the more
the sites' ``c_i`` differ, and when the frequency is below the sample rate, since ``c_i`` counts a pulse in every
sample; optical inputs, if any, count in the window sum too).

Refused (:class:`~stimsteer.sysid.exceptions.LimitsError`, one line): a site's frequency outside its declared range,
a contact below macro size without an injection limit, a contact without an area, a unit a site cannot take
(mW/mm² on an electrical site, a current on an optical one), a window budget smaller than one pulse at the site's
amplitude bound, duty cycles or trains of the description beyond their limits.

References
----------
Shannon R.V. (1992), A model of safe levels for electrical stimulation, IEEE Trans. Biomed. Eng. 39(4):424–426.
Cogan S.F. (2008), Neural stimulation and recording electrodes, Annu. Rev. Biomed. Eng. 10:275–309 (material
charge-injection limits; the values a user declares come from such sources or their own measurements).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..sysid.exceptions import LimitsError, SessionError
from ..sysid.stimulation.units import UREG, convert, key_unit
from .limits import StimLimits
from .shannon import DEFAULT_SHANNON_K, SHANNON_DAMAGE_K, max_charge_uc

__all__ = ["PhysicalLimits", "SiteLimits", "compile_limits", "RULE_SOURCES"]

#: Each rule and the source it cites (also written in every plan).
RULE_SOURCES = {
    "amplitude": "declared by the user (device and protocol limit); applies to both phases",
    "charge_per_phase": "Q = I x PW (common practice, no source); limit declared by the user",
    "shannon": "Shannon R.V. (1992), A model of safe levels for electrical stimulation, IEEE TBME 39(4):424-426; "
               "k = log10(Q/A) + log10(Q), macroelectrode data, so applied to macro contacts only",
    "charge_injection": "material charge-injection limit declared by the user, D = Q / A (see Cogan S.F. (2008), "
                        "Neural stimulation and recording electrodes, Annu. Rev. Biomed. Eng. 10:275-309)",
    "charge_balance": "every biphasic pulse returns its charge: a2 x PW2 = a1 x PW1 (common practice, no source)",
    "frequency": "declared frequency range of the site",
    "duty_cycle": "declared largest on-fraction (electrical: train duty; optical: light-on fraction, heating)",
    "train_length": "declared longest continuous train",
    "charge_rate_window": "declared average charge per phase per second over every rolling window of delivered "
                          "stimulation (enforced from the inputs already applied in a closed loop)",
    "irradiance": "declared largest irradiance; irradiance = power / illuminated area (definition)",
}

_SITE_KEYS = {"amplitude_max": "current", "charge_per_phase_max": "charge", "injection_limit": "charge_density",
              "frequency_min": "frequency", "frequency_max": "frequency", "duty_cycle_max": None,
              "train_length_max": "duration", "irradiance_max": "irradiance"}
_TOP_KEYS = {"shannon_k": None, "macro_area_min": "area", "window": "duration", "charge_rate_max": "charge_rate"}


@dataclass(frozen=True)
class SiteLimits:
    """Physical limits of one site, in internal units (µA, µC, µC/cm², Hz, s, mW/mm²); None: not declared."""

    name: str
    amplitude_max_ua: float | None = None
    charge_per_phase_max_uc: float | None = None
    injection_limit_uc_per_cm2: float | None = None
    frequency_min_hz: float = 0.0
    frequency_max_hz: float = math.inf
    duty_cycle_max_fraction: float = 1.0
    train_length_max_s: float = math.inf
    irradiance_max_mw_per_mm2: float | None = None


@dataclass(frozen=True)
class PhysicalLimits:
    """The ``[physical]`` section (module docstring), values in internal units."""

    sites: dict = field(default_factory=dict)
    shannon_k: float = DEFAULT_SHANNON_K
    macro_area_min_cm2: float = 1e-3
    window_s: float | None = None
    charge_rate_max_uc_per_s: float | None = None

    @classmethod
    def from_dict(cls, d) -> "PhysicalLimits":
        """From the ``[physical]`` table; keys end in their unit (converted by pint), unknown keys are refused."""
        if not isinstance(d, dict):
            raise LimitsError(f"[physical] must be a table; got {d!r}.")
        top = {k: v for k, v in d.items() if k != "sites"}
        values = _converted(top, _TOP_KEYS, "[physical]")
        sites = d.get("sites", {})
        if not isinstance(sites, dict) or not sites:
            raise LimitsError("[physical] declares no site; add one [physical.sites.<name>] table per site.")
        site_limits = {str(n): SiteLimits(name=str(n), **{_field(k): v for k, v in _converted(
            spec if isinstance(spec, dict) else {"?": spec}, _SITE_KEYS, f"[physical.sites.{n}]").items()})
            for n, spec in sites.items()}
        out = cls(sites=site_limits, **{_field(k): v for k, v in values.items()})
        out._validate()
        return out

    def _validate(self):
        if not math.isfinite(self.shannon_k) or self.shannon_k >= SHANNON_DAMAGE_K:
            raise LimitsError(f"[physical] shannon_k = {self.shannon_k:g} must be below {SHANNON_DAMAGE_K}, where "
                              "Shannon (1992) reports tissue damage.")
        if (self.window_s is None) != (self.charge_rate_max_uc_per_s is None):
            raise LimitsError("[physical] give window_s and charge_rate_max_uc_per_s together (the budget is an "
                              "average over a rolling window of delivered stimulation).")
        for name, v in (("window_s", self.window_s), ("charge_rate_max_uc_per_s", self.charge_rate_max_uc_per_s),
                        ("macro_area_min_cm2", self.macro_area_min_cm2)):
            if v is not None and not (math.isfinite(v) and v > 0):
                raise LimitsError(f"[physical] {name} must be positive and finite; got {v!r}.")
        for s in self.sites.values():
            if not 0 < s.duty_cycle_max_fraction <= 1:
                raise LimitsError(f"[physical.sites.{s.name}] duty_cycle_max_fraction must be in (0, 1]; got "
                                  f"{s.duty_cycle_max_fraction:g}.")
            if s.frequency_min_hz > s.frequency_max_hz:
                raise LimitsError(f"[physical.sites.{s.name}] frequency_min_hz > frequency_max_hz.")

    def to_dict(self) -> dict:
        return {"shannon_k": self.shannon_k, "macro_area_min_cm2": self.macro_area_min_cm2,
                "window_s": self.window_s, "charge_rate_max_uc_per_s": self.charge_rate_max_uc_per_s,
                "sites": {n: {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                              for k, v in vars(s).items()} for n, s in self.sites.items()},
                "sources": RULE_SOURCES}


def _field(base: str) -> str:
    """The dataclass field of a key base (``amplitude_max`` → ``amplitude_max_ua``)."""
    return {"amplitude_max": "amplitude_max_ua", "charge_per_phase_max": "charge_per_phase_max_uc",
            "injection_limit": "injection_limit_uc_per_cm2", "frequency_min": "frequency_min_hz",
            "frequency_max": "frequency_max_hz", "duty_cycle_max": "duty_cycle_max_fraction",
            "train_length_max": "train_length_max_s", "irradiance_max": "irradiance_max_mw_per_mm2",
            "macro_area_min": "macro_area_min_cm2", "window": "window_s", "charge_rate_max": "charge_rate_max_uc_per_s",
            "shannon_k": "shannon_k"}[base]


def _converted(d, allowed, where) -> dict:
    out = {}
    for key, v in d.items():
        base, unit = key_unit(key) if key != "shannon_k" else (key, None)
        if base not in allowed or (allowed[base] is not None and unit is None) or (
                allowed[base] is None and unit not in (None, UREG.dimensionless)):
            raise LimitsError(f"unknown key {key!r} in {where}; allowed (each ending in its unit): "
                              f"{sorted(allowed)} (e.g. amplitude_max_ua, window_s, duty_cycle_max_fraction).")
        if isinstance(v, bool) or not isinstance(v, (int, float)) or math.isnan(v):
            raise LimitsError(f"{where} {key} must be a number; got {v!r}.")
        if allowed[base] is None:
            out[base] = float(v)
            continue
        try:
            out[base] = convert(float(v) * unit, allowed[base], f"{where} {key}")
        except SessionError as exc:
            raise LimitsError(str(exc)) from None
    return out


# ---------------------------------------------------------------------------------------------------- compile
@dataclass(frozen=True)
class CompiledLimits:
    """Physical limits on a mapping's model inputs: the :class:`StimLimits` every controller enforces, the largest
    leading-phase amplitude per site (µA; mW/mm² optical) with the rule that sets it, and the window in samples."""

    stim_limits: StimLimits
    amplitude_max: np.ndarray
    binding_rule: tuple
    window_samples: int | None
    window_charge_uc: float | None
    physical: PhysicalLimits


def compile_limits(physical: PhysicalLimits, mapping, *, output_names=None, output_min=None,
                   output_max=None) -> CompiledLimits:
    """Turn physical limits into bounds on the model inputs of ``mapping`` (module docstring).

    Raises
    ------
    LimitsError
        Any refusal listed in the module docstring.
    """
    names = mapping.description.names
    missing = [n for n in names if n not in physical.sites]
    extra = [n for n in physical.sites if n not in names]
    if missing or extra:
        raise LimitsError(f"[physical.sites] must name the described sites {list(names)} (no limits for {missing}; "
                          f"unknown {extra}).")
    amp, rule = [], []
    for site in mapping.sites:
        a, r = _site_bound(site, physical.sites[site.name], physical)
        amp.append(a)
        rule.append(r)
    amp = np.array(amp)
    gain = mapping.gain()
    hi = gain * amp
    budget, window, q_w = _window_budget(physical, mapping, amp, hi)
    lim = StimLimits(amplitude_min_ua=np.zeros(len(names)), amplitude_max_ua=hi, input_names=names,
                     energy_budget_ua2=budget, energy_window_steps=window, output_names=output_names,
                     output_min=output_min, output_max=output_max)
    return CompiledLimits(stim_limits=lim, amplitude_max=amp, binding_rule=tuple(rule), window_samples=window,
                          window_charge_uc=q_w, physical=physical)


def _site_bound(site, lim: SiteLimits, physical: PhysicalLimits) -> tuple[float, str]:
    where = f"site {site.name!r}"
    if not lim.frequency_min_hz <= site.frequency_hz <= lim.frequency_max_hz:
        raise LimitsError(f"{where}: frequency {site.frequency_hz:g} Hz is outside the declared range "
                          f"[{lim.frequency_min_hz:g}, {lim.frequency_max_hz:g}] Hz; change the description or the "
                          "range.")
    _check_train(site, lim, where)
    if site.kind == "optical":
        if lim.amplitude_max_ua is not None or lim.charge_per_phase_max_uc is not None:
            raise LimitsError(f"{where} is optical: it cannot take a current or charge limit; declare "
                              "irradiance_max_mw_per_mm2.")
        if lim.irradiance_max_mw_per_mm2 is None:
            raise LimitsError(f"{where} is optical and has no irradiance_max_mw_per_mm2; declare it.")
        return lim.irradiance_max_mw_per_mm2, "irradiance"
    if lim.irradiance_max_mw_per_mm2 is not None:
        raise LimitsError(f"{where} is electrical: it cannot take irradiance_max_mw_per_mm2 (mW/mm^2); declare "
                          "amplitude_max_ua or amplitude_max_ma.")
    if lim.amplitude_max_ua is None:
        raise LimitsError(f"{where} has no amplitude_max_ua (or _ma); every electrical site needs one.")
    if site.contact_area_cm2 is None:
        raise LimitsError(f"{where} declares no contact_area; the charge-density rules need the geometric area of "
                          "the stimulating contact.")
    pw = site.phase_width_us * 1e-6  # s; µA · s = µC
    bounds = {"amplitude": lim.amplitude_max_ua / max(1.0, site.second_phase_ratio)}
    if lim.charge_per_phase_max_uc is not None:
        bounds["charge_per_phase"] = lim.charge_per_phase_max_uc / pw
    if site.contact_area_cm2 >= physical.macro_area_min_cm2:
        bounds["shannon"] = max_charge_uc(physical.shannon_k, site.contact_area_cm2) / pw
    elif lim.injection_limit_uc_per_cm2 is None:
        raise LimitsError(f"{where}: contact area {site.contact_area_cm2:g} cm^2 is below the macro range "
                          f"({physical.macro_area_min_cm2:g} cm^2), where the Shannon rule has no data; declare "
                          "injection_limit_uc_per_cm2 for the electrode material.")
    if lim.injection_limit_uc_per_cm2 is not None:
        bounds["charge_injection"] = lim.injection_limit_uc_per_cm2 * site.contact_area_cm2 / pw
    rule = min(bounds, key=bounds.get)
    return float(bounds[rule]), rule


def _check_train(site, lim, where):
    train = site.train
    duty = train.duty * (site.pulse_duty if site.kind == "optical" else 1.0)
    if duty > lim.duty_cycle_max_fraction * (1 + 1e-12):
        raise LimitsError(f"{where}: duty cycle {duty:.4g} exceeds the declared {lim.duty_cycle_max_fraction:g}; "
                          "lengthen train_off or shorten the pulses.")
    if train.on_s is not None and train.on_s > lim.train_length_max_s:
        raise LimitsError(f"{where}: train_on {train.on_s:g} s exceeds train_length_max_s "
                          f"{lim.train_length_max_s:g} s.")


def _window_budget(physical, mapping, amp, hi):
    if physical.window_s is None:
        return None, None, None
    rate = mapping.sample_rate_hz
    q_w = physical.charge_rate_max_uc_per_s * physical.window_s
    c = mapping.charge_per_model_unit_uc()
    elec = c > 0
    if not elec.any():
        raise LimitsError("[physical] charge_rate_max_uc_per_s is declared but no site is electrical; remove it.")
    pulse = np.array([s.phase_width_us * 1e-6 * a if s.kind == "electrical" else 0.0
                      for s, a in zip(mapping.sites, amp)])
    if np.any(pulse[elec] > q_w):
        i = int(np.argmax(np.where(elec, pulse, -1)))
        raise LimitsError(f"the window budget {q_w:.4g} uC ({physical.charge_rate_max_uc_per_s:g} uC/s over "
                          f"{physical.window_s:g} s) is smaller than one pulse of site {mapping.sites[i].name!r} "
                          f"at its amplitude bound ({pulse[i]:.4g} uC per phase); raise the budget or lower the "
                          "amplitude limit.")
    window = int(math.ceil(physical.window_s * rate - 1e-9)) + 1
    budget = q_w**2 / (window * float(np.sum(c[hi > 0] ** 2)))
    return budget, window, q_w
