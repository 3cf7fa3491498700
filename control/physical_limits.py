"""Limits in physical terms: the ``[physical]`` section of the limits file, compiled onto a model's inputs.

The section speaks of what a stimulator delivers (every key says its unit; pint converts ``_ma`` and ``_ua`` alike)::

    [physical]
    shannon_k = 1.75                   # Shannon's k for macro contacts (below 1.85)
    macro_area_min_cm2 = 0.001         # contacts at least this large are "macro": the Shannon rule applies
    window_s = 1.0                     # rolling window of delivered stimulation, s
    charge_rate_max_uc_per_s = 40.0    # average charge per phase delivered per second over every such window
    window_energy_max_uj = 50.0        # energy delivered in every such window (needs impedance_ohm per site)

    [physical.sites.stn_left]          # one table per site of the stimulation description
    amplitude_max_ma = 3.0             # largest phase amplitude (either phase), mA or uA
    charge_per_phase_max_uc = 0.3      # largest charge per phase, µC
    injection_limit_uc_per_cm2 = 100   # material charge-injection limit: required for contacts below macro size
    frequency_min_hz = 2.0             # the declared frequency range
    frequency_max_hz = 185.0
    duty_cycle_max_fraction = 1.0      # fraction of time a train may be on (train_on / (train_on + train_off))
    duty_window_s = 10.0               # the window the duty cycle holds over (default window_s)
    train_length_max_s = 60.0          # longest continuous train
    impedance_ohm = 1000.0             # electrode impedance (or _kohm), for the energy budget: E = I^2 R t

    [physical.sites.opto_1]
    irradiance_max_mw_per_mm2 = 10.0   # largest irradiance at the fibre tip
    duty_cycle_max_fraction = 0.2      # light-on fraction (pulse width x frequency x train duty): heating

How each rule becomes a bound on the model input (:func:`compile_limits`): the largest allowed leading-phase
amplitude ``I_max`` of a site is the least of the amplitude limit (divided by ``max(1, PW₁/PW₂)`` for an
asymmetric waveform, whose second phase is stronger when shorter), ``Q_max / PW`` (charge per phase, ``Q = I · PW``,
common practice), ``sqrt(10**k · A) / PW`` for a macro contact (Shannon 1992) or ``D_inj · A / PW`` for a smaller
contact (the declared material limit; planning is refused without one). The model input is ``gain · I``
(:class:`~stimsteer.sysid.stimulation.InputMapping`), so the bound is ``[0, gain · I_max]``.

The budgets over a rolling window of ``window_s`` seconds become window budgets on the model inputs
(:class:`~stimsteer.control.sequence_limits.WindowBudget`), which every controller enforces from the inputs already
applied (:mod:`stimsteer.control.mpc._budget`), so no window of the applied sequence exceeds them:

* charge: ``Q_w = R · window_s`` per window, with the *linear* load ``Σ_i c_i u_ik`` (``c_i`` = pulses per sample
  · PW / gain, µC per model unit; ``Q = I · PW``, common practice). Linear in the amplitude, so the window rows are
  exact (until this session a quadratic Σ u² budget through Cauchy–Schwarz stood in for it, and plans used only
  0.22–0.94 of the charge a window allows).
* energy: ``window_energy_max_uj`` per window, with the quadratic load ``I² · R · PW₁ (1 + PW₁/PW₂)`` per pulse for an
  electrical site (both phases in the declared impedance, Joule's law: a resistive electrode model, common practice,
  no source) and the linear ``irradiance · area · width`` for an optical one (definition).

The window counts ``W`` samples (:func:`window_steps`): the samples any ``window_s`` of pulses can fall in, whatever
the train's phase on the grid — exactly ``ceil(window_s · f)`` for one site whose train runs at the sample rate (the
budget is then exact for a constant train), more samples than pulses for a train below the sample rate (each sample
may hold an onset; the plan does not know the phase, so such trains reach about ``f / rate`` of the budget).

Duty cycle and train length are constraints of every plan too (:class:`~stimsteer.control.sequence_limits.TrainLimits`):
no run of on samples longer than ``train_length_max_s``, and at most ``duty_cycle_max_fraction`` of the samples of
every ``duty_window_s`` window on (for an optical site, the light-on fraction: on samples × pulse width ×
frequency). A sample is on while the train is: from a nonzero model input for one pulse period (``ceil(rate / f)``
samples), so a train below the sample rate cannot pass for several short ones. Planned by an on/off mask from the applied history (see that module); a history that already
breaks a duty window is reported as infeasible, never relaxed.

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
from ..sysid.stimulation.units import key_unit_name, unit_factor
from .limits import StimLimits
from .sequence_limits import TrainLimits, WindowBudget
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
    "energy_window": "declared energy per rolling window of delivered stimulation; electrical E = I^2 R t in the "
                     "declared impedance (Joule's law, resistive electrode model, common practice, no source), "
                     "optical E = irradiance x area x width (definition)",
    "duty_cycle_window": "declared largest on-fraction of the planned stimulation over every rolling duty window",
    "irradiance": "declared largest irradiance; irradiance = power / illuminated area (definition)",
}

_SITE_KEYS = {"amplitude_max": "current", "charge_per_phase_max": "charge", "injection_limit": "charge_density",
              "frequency_min": "frequency", "frequency_max": "frequency", "duty_cycle_max": None,
              "train_length_max": "duration", "irradiance_max": "irradiance", "duty_window": "duration",
              "impedance": "resistance"}
_TOP_KEYS = {"shannon_k": None, "macro_area_min": "area", "window": "duration", "charge_rate_max": "charge_rate",
             "window_energy_max": "energy"}
# units of the two kinds this module adds to the conversions of stimsteer.sysid.stimulation.units
_OWN_SUFFIXES = {"uj": "microjoule", "mj": "millijoule", "nj": "nanojoule", "j": "joule", "ohm": "ohm",
                 "kohm": "kiloohm"}


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
    duty_window_s: float | None = None
    impedance_ohm: float | None = None


@dataclass(frozen=True)
class PhysicalLimits:
    """The ``[physical]`` section (module docstring), values in internal units."""

    sites: dict = field(default_factory=dict)
    shannon_k: float = DEFAULT_SHANNON_K
    macro_area_min_cm2: float = 1e-3
    window_s: float | None = None
    charge_rate_max_uc_per_s: float | None = None
    window_energy_max_uj: float | None = None

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
        budgets = self.charge_rate_max_uc_per_s is not None or self.window_energy_max_uj is not None
        if (self.window_s is None) == budgets:
            raise LimitsError("[physical] give window_s together with charge_rate_max_uc_per_s or "
                              "window_energy_max_uj (each budget holds over every rolling window of window_s "
                              "seconds of delivered stimulation), or none of them.")
        for name, v in (("window_s", self.window_s), ("charge_rate_max_uc_per_s", self.charge_rate_max_uc_per_s),
                        ("window_energy_max_uj", self.window_energy_max_uj),
                        ("macro_area_min_cm2", self.macro_area_min_cm2)):
            if v is not None and not (math.isfinite(v) and v > 0):
                raise LimitsError(f"[physical] {name} must be positive and finite; got {v!r}.")
        for s in self.sites.values():
            if not 0 < s.duty_cycle_max_fraction <= 1:
                raise LimitsError(f"[physical.sites.{s.name}] duty_cycle_max_fraction must be in (0, 1]; got "
                                  f"{s.duty_cycle_max_fraction:g}.")
            if s.frequency_min_hz > s.frequency_max_hz:
                raise LimitsError(f"[physical.sites.{s.name}] frequency_min_hz > frequency_max_hz.")
            for name in ("duty_window_s", "impedance_ohm", "train_length_max_s"):
                v = getattr(s, name)
                if v is not None and not v > 0:
                    raise LimitsError(f"[physical.sites.{s.name}] {name} must be positive; got {v!r}.")

    def to_dict(self) -> dict:
        return {"shannon_k": self.shannon_k, "macro_area_min_cm2": self.macro_area_min_cm2,
                "window_s": self.window_s, "charge_rate_max_uc_per_s": self.charge_rate_max_uc_per_s,
                "window_energy_max_uj": self.window_energy_max_uj,
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
            "shannon_k": "shannon_k", "duty_window": "duty_window_s", "impedance": "impedance_ohm",
            "window_energy_max": "window_energy_max_uj"}[base]


def _key_unit(key: str):
    """:func:`key_unit_name`, plus the energy and resistance suffixes of this module (``_uj``, ``_ohm``, ...)."""
    for suffix in sorted(_OWN_SUFFIXES, key=len, reverse=True):
        if key.endswith("_" + suffix):
            return key[: -len(suffix) - 1], _OWN_SUFFIXES[suffix]
    return key_unit_name(key)


def _converted(d, allowed, where) -> dict:
    out = {}
    for key, v in d.items():
        base, unit = _key_unit(key) if key != "shannon_k" else (key, None)
        if base not in allowed or (allowed[base] is not None and unit is None) or (
                allowed[base] is None and unit not in (None, "dimensionless")):
            raise LimitsError(f"unknown key {key!r} in {where}; allowed (each ending in its unit): "
                              f"{sorted(allowed)} (e.g. amplitude_max_ua, window_s, duty_cycle_max_fraction).")
        if isinstance(v, bool) or not isinstance(v, (int, float)) or math.isnan(v):
            raise LimitsError(f"{where} {key} must be a number; got {v!r}.")
        if allowed[base] is None:
            out[base] = float(v)
            continue
        try:
            # pint's factor from the table of stimsteer.sysid.stimulation.units (no pint), else pint itself
            out[base] = float(v) * unit_factor(unit, allowed[base], f"{where} {key}")
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
    window_energy_uj: float | None = None


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
    hi = mapping.gain() * amp
    budgets = _window_budgets(physical, mapping, amp)
    by_name = {b.name: b for b in budgets}
    lim = StimLimits(amplitude_min_ua=np.zeros(len(names)), amplitude_max_ua=hi, input_names=names,
                     window_budgets=tuple(budgets), train_limits=_train_limits(physical, mapping),
                     output_names=output_names, output_min=output_min, output_max=output_max)
    charge, energy = by_name.get("charge_rate_window"), by_name.get("energy_window")
    return CompiledLimits(stim_limits=lim, amplitude_max=amp, binding_rule=tuple(rule),
                          window_samples=None if not budgets else budgets[0].window_steps,
                          window_charge_uc=None if charge is None else charge.budget, physical=physical,
                          window_energy_uj=None if energy is None else energy.budget)


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
    # a declared train cycle runs whatever the plan does; without one the plan's own on/off is constrained instead
    if train.on_s is not None and duty > lim.duty_cycle_max_fraction * (1 + 1e-12):
        raise LimitsError(f"{where}: duty cycle {duty:.4g} exceeds the declared {lim.duty_cycle_max_fraction:g}; "
                          "lengthen train_off or shorten the pulses.")
    if train.on_s is not None and train.on_s > lim.train_length_max_s:
        raise LimitsError(f"{where}: train_on {train.on_s:g} s exceeds train_length_max_s "
                          f"{lim.train_length_max_s:g} s.")


def window_steps(physical, mapping, loaded) -> int:
    """Samples that hold every pulse of any rolling window of ``window_s`` seconds (sites with a load: ``loaded``).

    ``P = ceil(window_s · f)`` consecutive pulses of one site span ``(P − 1) / f`` seconds, so they fall in at most
    ``ceil((P − 1) · rate / f) + 1`` consecutive samples, whatever the phase of the train on the grid; a train at the
    sample rate gives exactly ``P`` samples (the budget is then exact for it). Pulses of several sites with a load
    lie within ``ceil(window_s · rate) + 1`` samples.
    """
    rate, ws = mapping.sample_rate_hz, physical.window_s
    sites = [s for s, on in zip(mapping.sites, loaded) if on]
    if len(sites) != 1:
        return int(math.ceil(round(ws * rate, 9))) + 1
    f = sites[0].frequency_hz
    pulses = max(1, int(math.ceil(round(ws * f, 9))))
    return int(math.ceil(round((pulses - 1) * rate / f, 9))) + 1


def pulse_energy_uj(site, amplitude, impedance_ohm) -> np.ndarray:
    """Energy of one pulse at ``amplitude`` (µA; mW/mm² optical), µJ.

    Electrical: both phases dissipate ``I² · R · t`` in the declared impedance (Joule's law; a resistive electrode
    model, common practice, no source): ``I² R PW₁ + (r I)² R PW₂ = I² R PW₁ (1 + r)`` with ``r = PW₁ / PW₂``.
    Optical: irradiance × illuminated area × pulse width (mW/mm² · mm² · ms = µJ, definition).
    """
    a = np.asarray(amplitude, np.float64)
    if site.kind == "optical":
        return a * site.illuminated_area_mm2 * site.pulse_width_ms
    return a**2 * impedance_ohm * site.phase_width_us * 1e-6 * (1.0 + site.second_phase_ratio) * 1e-12 * 1e6


def _window_budgets(physical, mapping, amp) -> list:
    """The charge-rate and energy budgets as window budgets on the model inputs (linear and quadratic loads)."""
    if physical.window_s is None:
        return []
    out = []
    gain, n = mapping.gain(), mapping.pulses_per_sample()
    if physical.charge_rate_max_uc_per_s is not None:
        q_w = physical.charge_rate_max_uc_per_s * physical.window_s
        c = mapping.charge_per_model_unit_uc()
        if not np.any(c > 0):
            raise LimitsError("[physical] charge_rate_max_uc_per_s is declared but no site is electrical; remove it.")
        pulse = np.array([s.phase_width_us * 1e-6 * a if s.kind == "electrical" else 0.0
                          for s, a in zip(mapping.sites, amp)])
        _one_pulse_fits(pulse, q_w, "uC", f"({physical.charge_rate_max_uc_per_s:g} uC/s over "
                        f"{physical.window_s:g} s)", mapping)
        out.append(WindowBudget("charge_rate_window", q_w, window_steps(physical, mapping, c > 0), c, np.zeros_like(c),
                                "uC"))
    if physical.window_energy_max_uj is not None:
        lin, quad, pulse = _energy_weights(physical, mapping, amp, gain, n)
        _one_pulse_fits(pulse, physical.window_energy_max_uj, "uJ", f"(per {physical.window_s:g} s)", mapping)
        out.append(WindowBudget("energy_window", physical.window_energy_max_uj,
                                window_steps(physical, mapping, (lin > 0) | (quad > 0)), lin, quad, "uJ"))
    return out


def _energy_weights(physical, mapping, amp, gain, n):
    lin, quad, pulse = np.zeros(len(amp)), np.zeros(len(amp)), np.zeros(len(amp))
    for i, site in enumerate(mapping.sites):
        where = f"site {site.name!r}"
        if site.kind == "optical":
            if not site.illuminated_area_mm2:
                raise LimitsError(f"{where}: window_energy_max_uj needs the light energy of its pulses; declare "
                                  "illuminated_area in the stimulation description (energy = irradiance x area x "
                                  "width).")
            lin[i] = n[i] * float(pulse_energy_uj(site, 1.0, None)) / gain[i]
            pulse[i] = float(pulse_energy_uj(site, amp[i], None))
            continue
        r = physical.sites[site.name].impedance_ohm
        if r is None:
            raise LimitsError(f"{where}: window_energy_max_uj needs the electrode impedance to turn current into "
                              "energy (I^2 R t); declare impedance_ohm (or _kohm) for the site.")
        quad[i] = n[i] * float(pulse_energy_uj(site, 1.0, r)) / gain[i] ** 2
        pulse[i] = float(pulse_energy_uj(site, amp[i], r))
    return lin, quad, pulse


def _one_pulse_fits(pulse, budget, unit, how, mapping):
    if np.any(pulse > budget):
        i = int(np.argmax(pulse))
        raise LimitsError(f"the window budget {budget:.4g} {unit} {how} is smaller than one pulse of site "
                          f"{mapping.sites[i].name!r} at its amplitude bound ({pulse[i]:.4g} {unit}); raise the "
                          "budget or lower the amplitude limit.")


def _train_limits(physical, mapping):
    """Train length and duty of the plan's own on/off (module docstring) in samples; None when none binds."""
    rate = mapping.sample_rate_hz
    runs, duty, windows = [], [], []
    for site in mapping.sites:
        lim = physical.sites[site.name]
        where = f"[physical.sites.{site.name}]"
        if math.isfinite(lim.train_length_max_s):
            steps = int(math.floor(round(lim.train_length_max_s * rate, 9)))
            if steps < 1:
                raise LimitsError(f"{where} train_length_max_s = {lim.train_length_max_s:g} s is shorter than one "
                                  f"sample ({1 / rate:g} s); lengthen it or plan at a higher sample rate.")
            runs.append(steps)
        else:
            runs.append(None)
        # the on-fraction of the plan: the train's (electrical) or, times the pulse duty, the light's (optical)
        frac = lim.duty_cycle_max_fraction / (site.pulse_duty if site.kind == "optical" else 1.0)
        if frac >= 1.0:
            duty.append(None)
            windows.append(None)
            continue
        span = lim.duty_window_s or physical.window_s
        if span is None:
            raise LimitsError(f"{where} duty_cycle_max_fraction needs the window it holds over: declare "
                              "duty_window_s (or window_s in [physical]).")
        w = max(1, int(round(span * rate)))
        duty.append(int(math.floor(round(frac * w, 9))))
        windows.append(w)
    if all(v is None for v in runs + duty):
        return None
    hold = tuple(max(1, int(math.ceil(round(rate / s.frequency_hz, 9)))) for s in mapping.sites)
    return TrainLimits(tuple(runs), tuple(duty), tuple(windows), hold)
