"""``stimsteer plan`` in physical terms: the stimulation description, the compiled limits and the pulse files.

When the limits file has a ``[physical]`` section, ``plan`` needs the stimulation description of the model's
inputs (``--stimulation FILE``, or the one recorded in the model's session provenance). The physical limits are
compiled onto the model inputs (:func:`stimsteer.control.physical_limits.compile_limits`), the input weight is
taken per physical unit² (so a session in mA and the same in µA give the same plan in physical units), and after
planning the pulse files are written with every check (:mod:`stimsteer.control.pulse_plan`). A plan whose pulse
list fails a check (a train longer than declared, say) is not delivered: its pulse files hold zero stimulation and
say why, and the plan exits as not optimal.

``plan.json`` records the compiled limits with keys in the model inputs' real unit (:func:`limits_record`):
``amplitude_max_ma`` for a model in mA, ``amplitude_max_uc_per_s`` under the charge-rate mapping, a table per input
when the inputs differ in unit. (Until this session they were written as ``amplitude_max_ua`` whatever the unit;
nothing in stimsteer reads them back, so there is no old layout to keep reading: the keys are for people.)

Signed inputs (decision). A model fitted without a stimulation description keeps the per-sample layout, where a
negative input is the opposite polarity and the limits bound ``|u|`` on both sides (Shannon's rule included). The
plan is not refused, because nothing in it is unsafe by the declared limits: what is doubtful is the model, a
linear one predicting ``y(−u) = −y(u)``, a mirrored response to a reversed pulse, which neural responses rarely
obey. So a plan that goes negative says so (:func:`signed_input_notes`, a note on the console and in ``plan.json``)
and points to the remedy: a stimulation description with limits in ``[physical]``, where the model input is a
non-negative amplitude and polarity a category of the site. Physical limits without a description are refused.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..sysid.exceptions import LimitsError
from ..sysid.stimulation import InputMapping, StimulationDescription, load_stimulation
from ..sysid.stimulation.units import plain_unit, unit_of
from ._limits_layout import limits_fields, read_limits_table
from .physical_limits import PhysicalLimits, compile_limits
from .pulse_plan import checks_pass, safety_checks, write_pulse_plan

__all__: list = []


@dataclass
class PhysicalPlan:
    """What plan needs to write pulse files: the mapping and the compiled limits (the record grows when written)."""

    mapping: InputMapping
    compiled: object
    u_past: np.ndarray | None = None
    record: dict | None = None

    def input_weight(self, weight):
        """A weight per physical unit² as a weight per model unit², per input."""
        return np.broadcast_to(np.asarray(weight, np.float64), (len(self.mapping.sites),)) / self.mapping.gain() ** 2

    def write(self, folder, plan, base: dict) -> dict:
        """Write the pulse files of ``plan`` into ``folder``; zero stimulation when a check fails."""
        u = np.asarray(plan.inputs, np.float64)
        _, checks = safety_checks(u, self.mapping, self.compiled, u_past=self.u_past)
        status = plan.status if plan.ok else f"{plan.status} (safe fallback)"
        if not checks_pass(checks):
            failed = sorted({f"{c['rule']} ({c['site']})" for c in checks if not c["passed"]})
            status = f"not delivered: check failed: {', '.join(failed)}; zero stimulation written"
            u = np.zeros_like(u)
        self.record = write_pulse_plan(folder, u, self.mapping, self.compiled, {**base, "status": status},
                                       u_past=self.u_past)
        self.record["planned_checks"] = checks
        return self.record

    @property
    def delivered(self) -> bool:
        return bool(self.record and not str(self.record["status"]).startswith("not delivered"))


def _description(path, provenance) -> StimulationDescription | None:
    if path is not None:
        return load_stimulation(path)
    session = provenance.get("session", {}) if isinstance(provenance, dict) else {}
    rec = session.get("stimulation")
    return None if rec is None else StimulationDescription.from_dict(
        {"mapping": {"kind": rec["name"]}, "sites": _site_tables(rec["description"]["sites"])})


def _site_tables(sites: dict) -> dict:
    """The recorded description (internal units in names) back in the file layout."""
    out = {}
    for name, s in sites.items():
        if s["kind"] == "optical":
            t = {"kind": "optical", "pulse_width": f"{s['pulse_width_ms']} ms", "frequency": f"{s['frequency_hz']} Hz",
                 "amplitude_unit": s["amplitude_unit"]}
            if s.get("illuminated_area_mm2"):
                t["illuminated_area"] = f"{s['illuminated_area_mm2']} mm^2"
        else:
            t = {"kind": "electrical", "waveform": s["waveform"], "leading_phase": s["leading_phase"],
                 "phase_width": f"{s['phase_width_us']} us", "second_phase_width": f"{s['second_phase_width_us']} us",
                 "interphase_gap": f"{s['interphase_gap_us']} us", "frequency": f"{s['frequency_hz']} Hz",
                 "amplitude_unit": s["amplitude_unit"], "contacts": s["contacts"], "return": s["return"]}
            if s.get("contact_area_cm2"):
                t["contact_area"] = f"{s['contact_area_cm2']} cm^2"
            if s.get("material"):
                t["material"] = s["material"]
        for key in ("train_on", "train_off", "ramp_up", "ramp_down"):
            if s.get(f"{key}_s"):
                t[key] = f"{s[f'{key}_s']} s"
        out[name] = t
    return out


def plan_limits(limits_path, stimulation_path, provenance, *, rate, names_in, names_out, model_units):
    """The :class:`StimLimits` to plan with and the :class:`PhysicalPlan` (None for a limits file without
    ``[physical]`` and no description).

    Raises
    ------
    LimitsError
        Physical limits without a description, mixed layouts, names or units that do not match the model.
    """
    table = read_limits_table(limits_path)
    desc = _description(stimulation_path, provenance)
    if "physical" not in table:
        if stimulation_path is not None:
            raise LimitsError(f"{limits_path}: --stimulation is given but the limits have no [physical] section; "
                              "declare the limits in physical terms (see stimsteer.control.physical_limits).")
        return None, None
    if desc is None:
        raise LimitsError(f"{limits_path} declares [physical] limits, but the model records no stimulation "
                          "description; give it with --stimulation FILE.")
    mixed = sorted({"inputs", "energy", "charge_density"} & set(table))
    if mixed:
        raise LimitsError(f"{limits_path}: declare limits either in [physical] or in {mixed}, not both.")
    missing = [n for n in names_in if n not in desc.names]
    if missing or len(desc.names) != len(names_in):
        raise LimitsError(f"the stimulation description's sites {list(desc.names)} do not match the model's inputs "
                          f"{list(names_in)}; describe exactly one site per model input.")
    desc = StimulationDescription(sites=tuple(desc.site(n) for n in names_in), mapping=desc.mapping)
    mapping = InputMapping(desc, rate)
    _check_units(mapping, names_in, model_units)
    try:
        physical = PhysicalLimits.from_dict(table["physical"])
    except LimitsError as exc:
        raise LimitsError(f"{limits_path}: {exc}") from None
    outs = limits_fields({"inputs": {"_": {"amplitude_min_ua": 0, "amplitude_max_ua": 1}},
                          "outputs": table.get("outputs", {})})
    compiled = compile_limits(physical, mapping, output_names=outs["output_names"], output_min=outs["output_min"],
                              output_max=outs["output_max"])
    return compiled.stim_limits, PhysicalPlan(mapping=mapping, compiled=compiled)


def _check_units(mapping, names_in, model_units):
    """The model's recorded input units must be those the mapping produces (pint compares them)."""
    if not model_units:
        return
    for name, have, want in zip(names_in, model_units, mapping.model_units()):
        try:  # the same spelling is the same unit (pint would say 1.0); pint compares any other pair
            same = 1.0 if plain_unit(have) == plain_unit(want) else (1.0 * unit_of(str(have))).to(unit_of(want)).magnitude
        except Exception:  # pint raises several kinds for incompatible or unknown units
            same = None
        if same is None or abs(same - 1.0) > 1e-12:
            raise LimitsError(f"input {name!r}: the model's inputs are in {have}, the declared mapping gives "
                              f"{want}; fit on a session encoded with this description, or fix amplitude_unit.")



def _unit_tag(unit: str) -> str:
    """A key suffix for a unit: ``mA`` → ``ma``, ``uC/s`` → ``uc_per_s``, ``mW/mm^2`` → ``mw_per_mm2``."""
    t = str(unit).replace("µ", "u").replace("μ", "u").replace("^", "").replace("**", "").replace(" ", "")
    return t.lower().replace("/", "_per_")


_UNIT_KEYS = ("amplitude_min_ua", "amplitude_max_ua", "slew_max_ua", "charge_bound_ua", "effective_min_ua",
              "effective_max_ua")


def limits_record(limits, physical) -> dict:
    """``limits.to_dict()`` with every per-input key in the inputs' real unit (module docstring).

    Parameters
    ----------
    limits : StimLimits
        Limits on the model inputs (compiled from physical terms).
    physical : PhysicalPlan or None
        Its mapping gives the model unit of each input, in the limits' input order; None: the per-sample layout,
        whose keys are in µA as declared.
    """
    d = limits.to_dict()
    if physical is None:
        return d
    units = [str(u) for u in physical.mapping.model_units()]
    if d.get("energy_budget_ua2") is None:
        d.pop("energy_budget_ua2", None)
    if len(set(units)) == 1:
        tag = _unit_tag(units[0])
        out = {(k[:-3] + "_" + tag if k in _UNIT_KEYS else k): v for k, v in d.items()}
        if "energy_budget_ua2" in out:
            out[f"energy_budget_{tag}2"] = out.pop("energy_budget_ua2")
        return out
    names = d.get("input_names") or [str(i) for i in range(len(units))]
    out = {k: v for k, v in d.items() if k not in _UNIT_KEYS}
    out["inputs"] = {n: {k[:-3] + "_" + _unit_tag(u): (None if d[k] is None else d[k][i]) for k in _UNIT_KEYS}
                     for i, (n, u) in enumerate(zip(names, units))}
    if "energy_budget_ua2" in out:
        out["energy_budget_model_units2"] = out.pop("energy_budget_ua2")  # a sum over inputs of different units
    return out


def signed_input_notes(plan, physical) -> list:
    """The note of a plan that drives an input negative without a stimulation description (module docstring)."""
    if physical is not None:
        return []
    u = np.asarray(plan.inputs, np.float64)
    neg = [(n, float(u[:, i].min())) for i, n in enumerate(plan.input_names) if u[:, i].min() < 0]
    if not neg:
        return []
    which = ", ".join(f"{n} down to {v:.4g}" for n, v in neg)
    return [f"note: the plan drives {which}: without a stimulation description a negative input is the opposite "
            "polarity, and the linear model assumes a reversed pulse evokes the mirrored response (y(-u) = -y(u)), "
            "which neural responses rarely do. Describe the stimulation (--stimulation, limits in [physical]) to plan "
            "non-negative pulse trains with polarity as a category of the site."]
