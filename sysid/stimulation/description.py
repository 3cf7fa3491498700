"""The stimulation description: what each site delivers, in physical units (pint), with its declared categories.

A description is a TOML file (or dict) of our own layout; every value carries its unit, converted by pint::

    [mapping]
    kind = "amplitude"             # the model sees the pulse amplitude of each site's train ("charge_rate": µC/s)

    [sites.stn_left]
    kind = "electrical"
    waveform = "symmetric"         # biphasic: "symmetric" or "asymmetric" (charge-balanced by a longer 2nd phase)
    leading_phase = "cathodic"     # a category, never a sign: "cathodic" or "anodic"
    phase_width = "90 us"          # the leading phase
    interphase_gap = "20 us"
    frequency = "130 Hz"
    amplitude_unit = "mA"          # the unit of the recorded amplitudes and of the model input
    contacts = ["c2"]              # stimulating contact(s)
    return = ["case"]              # return contact(s): "case" for monopolar
    contact_area = "0.06 cm^2"     # geometric area of the stimulating contact(s)
    material = "platinum-iridium"  # optional, names the charge-injection limit the limits file must declare
    train_on = "2 s"               # optional: trains of 2 s ...
    train_off = "3 s"              # ... every 5 s, with ramps inside the on time
    ramp_up = "0.2 s"
    ramp_down = "0.2 s"

    [sites.opto_1]
    kind = "optical"
    pulse_width = "5 ms"
    frequency = "20 Hz"
    amplitude_unit = "mW/mm^2"     # irradiance at the fibre tip
    illuminated_area = "0.04 mm^2" # converts a recorded power (mW) to irradiance (power / area)

An asymmetric waveform declares ``second_phase_width``; its second phase has the amplitude that balances the charge
(``I₂ = I · PW₁ / PW₂``). A declared ``second_phase_amplitude_ratio`` that does not balance the charge is refused:
charge balance per pulse is a rule of the description (residual charge drives electrochemistry at the contact;
common practice, no source). Pulses that would overlap their successor (``PW₁ + gap + PW₂ >= 1 / f``) are refused.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from ..exceptions import SessionError
from .units import parse_quantity, quantity_in, unit_factor, UREG

__all__ = ["ElectricalSite", "OpticalSite", "StimulationDescription", "load_stimulation"]

_WAVEFORMS = ("symmetric", "asymmetric")
_LEADING = ("cathodic", "anodic")
_E_KEYS = {"kind", "waveform", "leading_phase", "phase_width", "second_phase_width", "second_phase_amplitude_ratio",
           "interphase_gap", "frequency", "amplitude_unit", "contacts", "return", "contact_area", "material",
           "train_on", "train_off", "ramp_up", "ramp_down"}
_O_KEYS = {"kind", "pulse_width", "frequency", "amplitude_unit", "illuminated_area", "wavelength", "train_on",
           "train_off", "ramp_up", "ramp_down"}


def _choice(where, value, allowed):
    if value not in allowed:
        raise SessionError(f"{where} must be one of {list(allowed)}; got {value!r}.")
    return value


@dataclass(frozen=True)
class _Train:
    """Train on/off and ramps, seconds (None: a continuous train)."""

    on_s: float | None = None
    off_s: float | None = None
    ramp_up_s: float = 0.0
    ramp_down_s: float = 0.0

    def check(self, where):
        if (self.on_s is None) != (self.off_s is None):
            raise SessionError(f"{where}: give train_on and train_off together (or neither for a continuous train).")
        if self.on_s is not None and (self.on_s <= 0 or self.off_s < 0):
            raise SessionError(f"{where}: train_on must be positive and train_off >= 0; got {self.on_s:g} s and "
                               f"{self.off_s:g} s.")
        if min(self.ramp_up_s, self.ramp_down_s) < 0 or (
                self.on_s is not None and self.ramp_up_s + self.ramp_down_s > self.on_s):
            raise SessionError(f"{where}: ramps must be >= 0 and fit inside train_on; got up {self.ramp_up_s:g} s, "
                               f"down {self.ramp_down_s:g} s, on {self.on_s} s.")

    @property
    def duty(self) -> float:
        """Fraction of time the train is on (1 for a continuous train)."""
        return 1.0 if self.on_s is None else self.on_s / (self.on_s + self.off_s)


@dataclass(frozen=True)
class ElectricalSite:
    """One electrical stimulation site: a charge-balanced biphasic train (units in the field names)."""

    name: str
    phase_width_us: float
    frequency_hz: float
    amplitude_unit: str = "uA"
    waveform: str = "symmetric"
    leading_phase: str = "cathodic"
    second_phase_width_us: float | None = None
    interphase_gap_us: float = 0.0
    contacts: tuple = ()
    return_contacts: tuple = ("case",)
    contact_area_cm2: float | None = None
    material: str | None = None
    train: _Train = field(default_factory=_Train)
    kind = "electrical"

    def __post_init__(self):
        w = f"site {self.name!r}"
        _choice(f"{w}: waveform", self.waveform, _WAVEFORMS)
        _choice(f"{w}: leading_phase", self.leading_phase, _LEADING)
        if self.waveform == "symmetric":
            if self.second_phase_width_us not in (None, self.phase_width_us):
                raise SessionError(f"{w}: a symmetric biphasic waveform has equal phases; got widths "
                                   f"{self.phase_width_us:g} and {self.second_phase_width_us:g} us. Declare "
                                   "waveform = \"asymmetric\" or drop second_phase_width.")
            object.__setattr__(self, "second_phase_width_us", self.phase_width_us)
        elif self.second_phase_width_us is None:
            raise SessionError(f"{w}: an asymmetric biphasic waveform needs second_phase_width (its second phase "
                               "balances the charge at a lower amplitude).")
        for name in ("phase_width_us", "second_phase_width_us", "frequency_hz"):
            if not getattr(self, name) > 0:
                raise SessionError(f"{w}: {name} must be positive; got {getattr(self, name)!r}.")
        if self.interphase_gap_us < 0:
            raise SessionError(f"{w}: interphase_gap must be >= 0; got {self.interphase_gap_us:g} us.")
        if self.pulse_duration_us * 1e-6 * self.frequency_hz >= 1.0:
            raise SessionError(f"{w}: pulses of {self.pulse_duration_us:g} us at {self.frequency_hz:g} Hz overlap "
                               "their successor; lower the frequency or shorten the phases.")
        if self.contact_area_cm2 is not None and not self.contact_area_cm2 > 0:
            raise SessionError(f"{w}: contact_area must be positive; got {self.contact_area_cm2!r} cm^2.")
        unit_factor(self.amplitude_unit, "current", f"{w}: amplitude_unit")
        self.train.check(w)

    @property
    def pulse_duration_us(self) -> float:
        """Leading phase + gap + second phase, µs."""
        return self.phase_width_us + self.interphase_gap_us + self.second_phase_width_us

    @property
    def second_phase_ratio(self) -> float:
        """Second-phase amplitude over leading-phase amplitude that balances the charge: ``PW₁ / PW₂``."""
        return self.phase_width_us / self.second_phase_width_us

    def amplitude_factor_ua(self) -> float:
        """µA per unit of ``amplitude_unit``."""
        return unit_factor(self.amplitude_unit, "current", "unit", "amplitude_unit")

    def to_dict(self) -> dict:
        return {"kind": "electrical", "waveform": self.waveform, "leading_phase": self.leading_phase,
                "phase_width_us": self.phase_width_us, "second_phase_width_us": self.second_phase_width_us,
                "interphase_gap_us": self.interphase_gap_us, "frequency_hz": self.frequency_hz,
                "amplitude_unit": self.amplitude_unit, "contacts": list(self.contacts),
                "return": list(self.return_contacts), "contact_area_cm2": self.contact_area_cm2,
                "material": self.material, "train_on_s": self.train.on_s, "train_off_s": self.train.off_s,
                "ramp_up_s": self.train.ramp_up_s, "ramp_down_s": self.train.ramp_down_s}


@dataclass(frozen=True)
class OpticalSite:
    """One optical stimulation site: a train of light pulses; the amplitude is irradiance (mW/mm²)."""

    name: str
    pulse_width_ms: float
    frequency_hz: float
    amplitude_unit: str = "mW/mm^2"
    illuminated_area_mm2: float | None = None
    wavelength_nm: float | None = None
    train: _Train = field(default_factory=_Train)
    kind = "optical"

    def __post_init__(self):
        w = f"site {self.name!r}"
        for name in ("pulse_width_ms", "frequency_hz"):
            if not getattr(self, name) > 0:
                raise SessionError(f"{w}: {name} must be positive; got {getattr(self, name)!r}.")
        if self.pulse_width_ms * 1e-3 * self.frequency_hz > 1.0:
            raise SessionError(f"{w}: light pulses of {self.pulse_width_ms:g} ms at {self.frequency_hz:g} Hz "
                               "overlap their successor; lower the frequency or shorten the pulses.")
        unit_factor(self.amplitude_unit, "irradiance", f"{w}: amplitude_unit")
        self.train.check(w)

    @property
    def pulse_duration_us(self) -> float:
        return self.pulse_width_ms * 1e3

    @property
    def pulse_duty(self) -> float:
        """Fraction of time the light is on within a train: width · frequency."""
        return self.pulse_width_ms * 1e-3 * self.frequency_hz

    def amplitude_factor_ua(self) -> float:
        """mW/mm² per unit of ``amplitude_unit`` (the optical analogue of the electrical µA factor)."""
        return unit_factor(self.amplitude_unit, "irradiance", "unit", "amplitude_unit")

    def to_dict(self) -> dict:
        return {"kind": "optical", "pulse_width_ms": self.pulse_width_ms, "frequency_hz": self.frequency_hz,
                "amplitude_unit": self.amplitude_unit, "illuminated_area_mm2": self.illuminated_area_mm2,
                "wavelength_nm": self.wavelength_nm, "train_on_s": self.train.on_s, "train_off_s": self.train.off_s,
                "ramp_up_s": self.train.ramp_up_s, "ramp_down_s": self.train.ramp_down_s}


@dataclass(frozen=True)
class StimulationDescription:
    """The sites of a session, in input order, and the declared mapping kind (see :mod:`.mapping`)."""

    sites: tuple
    mapping: str = "amplitude"

    def __post_init__(self):
        if not self.sites:
            raise SessionError("the stimulation description declares no site; add one [sites.<name>] table.")
        names = [s.name for s in self.sites]
        if len(set(names)) != len(names):
            raise SessionError(f"site names must be unique; got {names}.")
        _choice("[mapping] kind", self.mapping, ("amplitude", "charge_rate"))
        if self.mapping == "charge_rate" and any(s.kind == "optical" for s in self.sites):
            raise SessionError("[mapping] kind = \"charge_rate\" is for electrical sites only; optical sites carry "
                               "irradiance. Use kind = \"amplitude\".")

    @property
    def names(self) -> tuple:
        return tuple(s.name for s in self.sites)

    def site(self, name):
        for s in self.sites:
            if s.name == name:
                return s
        raise SessionError(f"no site {name!r} in the stimulation description; it declares {list(self.names)}.")

    @classmethod
    def from_dict(cls, d) -> "StimulationDescription":
        """A description from the nested dict of the TOML layout (module docstring)."""
        if not isinstance(d, dict):
            raise SessionError(f"a stimulation description must be a table; got {type(d).__name__}.")
        extra = sorted(set(d) - {"mapping", "sites"})
        if extra:
            raise SessionError(f"unknown tables {extra} in the stimulation description; allowed: mapping, sites.")
        mapping = d.get("mapping", {}).get("kind", "amplitude") if isinstance(d.get("mapping", {}), dict) else None
        sites = d.get("sites", {})
        if not isinstance(sites, dict):
            raise SessionError("[sites] must hold one [sites.<name>] table per stimulation site.")
        return cls(sites=tuple(_site(name, spec) for name, spec in sites.items()), mapping=mapping)

    def to_dict(self) -> dict:
        return {"mapping": self.mapping, "sites": {s.name: s.to_dict() for s in self.sites}}


def _q(spec, key, kind, where, default=None):
    if key not in spec:
        return default
    return quantity_in(spec[key], kind, f"{where}: {key}")


def _train(spec, where) -> _Train:
    return _Train(on_s=_q(spec, "train_on", "duration", where), off_s=_q(spec, "train_off", "duration", where),
                  ramp_up_s=_q(spec, "ramp_up", "duration", where, 0.0),
                  ramp_down_s=_q(spec, "ramp_down", "duration", where, 0.0))


def _site(name, spec):
    where = f"site {name!r}"
    if not isinstance(spec, dict):
        raise SessionError(f"[sites.{name}] must be a table; got {spec!r}.")
    kind = _choice(f"{where}: kind", spec.get("kind"), ("electrical", "optical"))
    extra = sorted(set(spec) - (_E_KEYS if kind == "electrical" else _O_KEYS))
    if extra:
        raise SessionError(f"{where}: unknown keys {extra} for a {kind} site; allowed: "
                           f"{sorted(_E_KEYS if kind == 'electrical' else _O_KEYS)}.")
    for key in (("phase_width", "frequency") if kind == "electrical" else ("pulse_width", "frequency")):
        if key not in spec:
            raise SessionError(f"{where}: {key} is required for a {kind} site (a number with its unit).")
    if kind == "optical":
        area = _q(spec, "illuminated_area", "area", where)
        return OpticalSite(name=str(name), pulse_width_ms=_q(spec, "pulse_width", "optical_width", where),
                           frequency_hz=_q(spec, "frequency", "frequency", where),
                           amplitude_unit=str(spec.get("amplitude_unit", "mW/mm^2")),
                           illuminated_area_mm2=None if area is None else area * 100.0,
                           wavelength_nm=None if "wavelength" not in spec else float(
                               parse_quantity(spec["wavelength"], f"{where}: wavelength").to(UREG.nm).magnitude),
                           train=_train(spec, where))
    pw = _q(spec, "phase_width", "time", where)
    pw2 = _q(spec, "second_phase_width", "time", where)
    ratio = spec.get("second_phase_amplitude_ratio")
    if ratio is not None:
        w2 = pw if pw2 is None else pw2
        if isinstance(ratio, bool) or not isinstance(ratio, (int, float)) or abs(ratio * w2 - pw) > 1e-9 * pw:
            raise SessionError(f"{where}: the waveform is not charge-balanced: second phase {ratio!r} x the leading "
                               f"amplitude for {w2:g} us against {pw:g} us leading (ratio must be {pw / w2:.6g}). "
                               "Every pulse must return the charge it injects.")
    return ElectricalSite(
        name=str(name), phase_width_us=pw, frequency_hz=_q(spec, "frequency", "frequency", where),
        amplitude_unit=str(spec.get("amplitude_unit", "uA")), waveform=spec.get("waveform", "symmetric"),
        leading_phase=spec.get("leading_phase", "cathodic"), second_phase_width_us=pw2,
        interphase_gap_us=_q(spec, "interphase_gap", "time", where, 0.0),
        contacts=tuple(str(c) for c in spec.get("contacts", ())),
        return_contacts=tuple(str(c) for c in spec.get("return", ("case",))),
        contact_area_cm2=_q(spec, "contact_area", "area", where), material=spec.get("material"),
        train=_train(spec, where))


def load_stimulation(path) -> StimulationDescription:
    """Read a stimulation description (TOML, module docstring); errors name the file."""
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib

    try:
        with open(path, "rb") as fh:
            d = tomllib.load(fh)
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise SessionError(f"{path} is not a valid TOML stimulation description: {exc}.") from None
    try:
        return StimulationDescription.from_dict(d)
    except SessionError as exc:
        raise SessionError(f"{path}: {exc}") from None
