"""Declared stimulation limits: amplitude, slew, energy budget, charge density per phase, output bounds.

A :class:`StimLimits` holds what a user declares as safe for one set of stimulation inputs. Input limits are
*hard*: no plan stimsteer returns exceeds them. Output bounds are *soft* (a controller keeps a predicted output
below a level when it can, and reports by how much it could not).

Limits are declared in code (``StimLimits(...)`` or :meth:`StimLimits.from_dict`) or in a small TOML file of our
own layout read by :func:`load_limits`::

    # every key is optional except the per-input amplitude bounds
    [charge_density]              # the Shannon charge-density rule, turned into an amplitude bound
    pulse_width_us = 90.0         # duration of one phase, µs (per-input values override it)
    electrode_area_cm2 = 0.06     # geometric contact area, cm² (per-input values override it)
    shannon_k = 1.75              # default 1.75, must stay below 1.85

    [energy]
    budget_ua2 = 2.0e5            # Σ u² over every window of window_steps samples, all inputs, µA²
    window_steps = 20             # optional; default the planning horizon

    [inputs.site_a]               # one table per stimulation input; the name matches the model's input name
    amplitude_min_ua = 0.0
    amplitude_max_ua = 150.0
    slew_max_ua = 25.0            # largest change from one sample to the next, µA
    pulse_width_us = 60.0         # optional override of [charge_density]
    electrode_area_cm2 = 0.02     # optional override of [charge_density]

    [outputs.region_2]            # optional soft bounds on a recorded output, in that output's units
    max = 1.5
    min = -1.5

Inputs keep the order of the file; :meth:`StimLimits.aligned` matches them to a model's input names.

Charge density (Shannon 1992; the helpers live in :mod:`stimsteer.control.shannon`): with charge per phase
``Q = I · PW`` (µC) and charge density ``D = Q / A`` (µC/cm²/phase), the rule ``log10(D) + log10(Q) <= k`` gives
``Q <= sqrt(k_lin · A)`` with ``k_lin = 10**k``, hence ``|I| <= sqrt(10**k · A) / PW``. Shannon reports tissue
damage at ``k >= 1.85``; declaring ``k`` at or above it is refused. The default ``k = 1.75`` is a margin below that threshold (common practice, no source).

Decisions (documented, enforced by validation)
    * Zero stimulation must lie inside every input's amplitude bounds: it is the safe fallback when a plan cannot
      be solved. Limits that exclude zero raise :class:`LimitsError`.
    * ``amplitude_min_ua <= amplitude_max_ua``; an input with both bounds 0 is switched off; at least one input
      must be able to stimulate.
    * Slew limits are positive (``inf`` means none for that input); the energy budget is positive and finite.
    * The energy budget holds over every window of ``energy_window_steps`` samples (default: the planning
      horizon) of the stimulation a closed loop *applies*, not only over each plan: every plan is constrained by
      what was applied in the window so far (:mod:`stimsteer.control.mpc`). Zero stimulation keeps every later
      window within the budget, so the constraint can always be met from a state the loop reached by obeying it.
    * Pulse width and electrode area come together (the rule needs both) and are positive and finite.
    * Output bounds: ``min < max`` where both are given; ``±inf`` means no bound.

Limits in physical terms
    A limits file may instead hold a ``[physical]`` section (amplitude in mA or µA, charge per phase, the Shannon
    rule for macro contacts only and a declared material charge-injection limit for smaller ones, frequency range,
    duty cycle, train length, an average charge rate over a rolling window in seconds, optical irradiance and
    duty), each rule with its source: :mod:`stimsteer.control.physical_limits` compiles it, with the stimulation
    description of the sites, into the :class:`StimLimits` of the model inputs (``stimsteer plan --stimulation``).
    The per-sample layout above remains for models whose inputs have no stimulation description; its charge-density
    rule assumes each sample is one biphasic pulse of the declared width (a train at the sample rate).

References
----------
Shannon R.V. (1992), A model of safe levels for electrical stimulation, IEEE Trans. Biomed. Eng. 39(4):424–426.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..sysid.exceptions import InvalidParameterError, LimitsError
from ._energy_windows import check_window
from ._limits_layout import limits_fields, read_limits_table, vec_field as _vec
from .sequence_limits import TrainLimits, check_sequence_limits as _check_sequence_limits, count_violations, \
    legacy_energy_violations, safe_sequence
from .shannon import DEFAULT_SHANNON_K, SHANNON_DAMAGE_K, max_amplitude_ua, max_charge_uc, shannon_k

__all__ = [
    "StimLimits",
    "load_limits",
    "shannon_k",
    "max_charge_uc",
    "max_amplitude_ua",
    "DEFAULT_SHANNON_K",
    "SHANNON_DAMAGE_K",
]


# ---------------------------------------------------------------------------------------------------- limits
@dataclass(frozen=True, kw_only=True)
class StimLimits:
    """Hard limits on stimulation inputs and soft bounds on outputs (see the module docstring for the rules).

    Parameters
    ----------
    amplitude_min_ua, amplitude_max_ua : float or ndarray, shape (n_inputs,)
        Per-input amplitude bounds, µA. Zero must lie inside them.
    n_inputs : int, optional
        Number of inputs; inferred from the bound arrays (needed only when every array argument is a scalar).
    slew_max_ua : float or ndarray, shape (n_inputs,), optional
        Largest change of an input between consecutive samples, µA; ``inf`` for no limit on an input.
    energy_budget_ua2 : float, optional
        Largest ``Σ_k Σ_i u_ik²`` over every window of ``energy_window_steps`` consecutive samples of stimulation
        (planned, and applied in a closed loop), µA².
    energy_window_steps : int, optional
        The budget's window, samples; default the planning horizon of the controller that uses the limits.
    pulse_width_us, electrode_area_cm2 : float or ndarray, shape (n_inputs,), optional
        Phase duration (µs) and electrode area (cm²) for the Shannon charge-density bound; give both or neither.
    shannon_k : float, default 1.75
        Shannon's k for the charge bound; must be below 1.85.
    output_min, output_max : ndarray, shape (n_outputs,), optional
        Soft output bounds in the outputs' units; ``-inf`` / ``inf`` for none.
    input_names : tuple of str, optional
        Input names, to match a model's inputs (:meth:`aligned`).
    output_names : tuple of str, optional
        Names of the outputs the output bounds refer to.

    Raises
    ------
    LimitsError
        When limits are malformed, inconsistent or impossible; the message names the limit.

    Examples
    --------
    >>> lim = StimLimits(amplitude_min_ua=[-50, 0], amplitude_max_ua=[50, 80], pulse_width_us=200.0,
    ...                  electrode_area_cm2=2e-6)
    >>> lo, hi = lim.input_bounds()
    >>> bool(hi[1] < 80)  # the charge-density rule is tighter than the declared 80 µA
    True
    """

    amplitude_min_ua: np.ndarray
    amplitude_max_ua: np.ndarray
    n_inputs: int = None
    slew_max_ua: np.ndarray = None
    energy_budget_ua2: float = None
    energy_window_steps: int = None
    pulse_width_us: np.ndarray = None
    electrode_area_cm2: np.ndarray = None
    shannon_k: float = DEFAULT_SHANNON_K
    output_min: np.ndarray = None
    output_max: np.ndarray = None
    input_names: tuple = None
    output_names: tuple = None
    window_budgets: tuple = ()
    train_limits: TrainLimits = None

    def __post_init__(self):
        m = self._infer_n()
        s = object.__setattr__
        s(self, "n_inputs", m)
        lo = _vec("amplitude_min_ua", self.amplitude_min_ua, m)
        hi = _vec("amplitude_max_ua", self.amplitude_max_ua, m)
        s(self, "amplitude_min_ua", lo)
        s(self, "amplitude_max_ua", hi)
        self._check_amplitudes(lo, hi)
        if self.slew_max_ua is not None:
            slew = _vec("slew_max_ua", self.slew_max_ua, m, allow_inf=True)
            if np.any(slew <= 0):
                raise LimitsError(
                    f"slew_max_ua must be positive (inf for no limit); got {slew.tolist()} µA per step. A slew "
                    "limit of 0 would freeze the input; narrow its amplitude bounds to 0 instead."
                )
            s(self, "slew_max_ua", slew)
        if self.energy_budget_ua2 is not None:
            e = float(self.energy_budget_ua2)
            if not math.isfinite(e) or e <= 0:
                raise LimitsError(
                    f"energy_budget_ua2 must be positive and finite (Σ u² over a horizon, µA²); got {e}. With a "
                    "budget of 0 no input could ever be nonzero; remove the budget or give a positive one."
                )
            s(self, "energy_budget_ua2", e)
        if self.energy_window_steps is not None:
            try:
                s(self, "energy_window_steps", check_window(self.energy_window_steps))
            except InvalidParameterError as exc:
                raise LimitsError(str(exc)) from None
        self._set_charge(m)
        _check_sequence_limits(self, m)
        self._set_outputs()
        self._set_names(m)
        lo, hi = self.amplitude_min_ua.copy(), self.amplitude_max_ua.copy()
        q = self.charge_bound_ua()
        if q is not None:
            lo, hi = np.maximum(lo, -q), np.minimum(hi, q)
        for a in (lo, hi):
            a.setflags(write=False)
        s(self, "_bounds", (lo, hi))  # derived once (not a field): planning asks for it at every step

    # ------------------------------------------------------------------------------------------ validation
    def _infer_n(self) -> int:
        sizes = {int(np.size(a)) for a in (self.amplitude_min_ua, self.amplitude_max_ua, self.slew_max_ua,
                                            self.pulse_width_us, self.electrode_area_cm2)
                 if a is not None and np.ndim(a) > 0}
        if self.input_names is not None:
            sizes.add(len(tuple(self.input_names)))
        if self.n_inputs is not None:
            sizes.add(int(self.n_inputs))
        if len(sizes) > 1:
            raise LimitsError(f"the limits disagree on the number of inputs: got sizes {sorted(sizes)}. Give one "
                              "value per input everywhere (or a single number for all inputs).")
        if not sizes:
            raise LimitsError("cannot tell the number of inputs: give n_inputs or per-input arrays of bounds.")
        m = sizes.pop()
        if m < 1:
            raise LimitsError(f"limits need at least one input; got {m}.")
        return m

    def _check_amplitudes(self, lo, hi):
        bad = np.flatnonzero(lo > hi)
        if bad.size:
            i = int(bad[0])
            raise LimitsError(
                f"amplitude_min_ua > amplitude_max_ua for input {self._label(i)}: {lo[i]:g} > {hi[i]:g} µA. "
                "Swap or correct the bounds."
            )
        bad = np.flatnonzero((lo > 0) | (hi < 0))
        if bad.size:
            i = int(bad[0])
            raise LimitsError(
                f"zero stimulation must lie inside the amplitude bounds (it is the safe fallback), but input "
                f"{self._label(i)} has [{lo[i]:g}, {hi[i]:g}] µA. Widen the bounds to include 0."
            )
        if np.all((lo == 0) & (hi == 0)):
            raise LimitsError("every input has amplitude bounds [0, 0]: nothing can be stimulated. Give at least "
                              "one input a nonzero range.")

    def _label(self, i: int) -> str:
        names = self.input_names
        return f"{i} ({names[i]!r})" if names is not None and i < len(names) else str(i)

    def _set_charge(self, m):
        s = object.__setattr__
        k = float(self.shannon_k)
        if not math.isfinite(k):
            raise LimitsError(f"shannon_k must be a finite number; got {self.shannon_k!r}.")
        if k >= SHANNON_DAMAGE_K:
            raise LimitsError(
                f"shannon_k = {k:g} is at or above {SHANNON_DAMAGE_K}, where Shannon (1992) reports tissue damage. "
                f"Declare a smaller k (the default is {DEFAULT_SHANNON_K})."
            )
        s(self, "shannon_k", k)
        pw, area = self.pulse_width_us, self.electrode_area_cm2
        if (pw is None) != (area is None):
            given, missing = ("pulse_width_us", "electrode_area_cm2") if area is None else (
                "electrode_area_cm2", "pulse_width_us")
            raise LimitsError(f"the charge-density rule needs both pulse width and electrode area; got {given} "
                              f"without {missing}. Give both, or neither to skip the rule.")
        if pw is not None:
            pw, area = _vec("pulse_width_us", pw, m), _vec("electrode_area_cm2", area, m)
            for name, a in (("pulse_width_us", pw), ("electrode_area_cm2", area)):
                if np.any(a <= 0):
                    raise LimitsError(f"{name} must be positive; got {a.tolist()}.")
            s(self, "pulse_width_us", pw)
            s(self, "electrode_area_cm2", area)

    def _set_outputs(self):
        s = object.__setattr__
        lo, hi = self.output_min, self.output_max
        if lo is None and hi is None:
            return
        p = int(np.size(lo if lo is not None else hi))
        lo = _vec("output_min", -np.inf if lo is None else lo, p, allow_inf=True)
        hi = _vec("output_max", np.inf if hi is None else hi, p, allow_inf=True)
        bad = np.flatnonzero(lo >= hi)
        if bad.size:
            i = int(bad[0])
            raise LimitsError(f"output_min must be below output_max; output {i} has min {lo[i]:g} >= max "
                              f"{hi[i]:g}. Correct or drop that output bound.")
        s(self, "output_min", lo)
        s(self, "output_max", hi)

    def _set_names(self, m):
        s = object.__setattr__
        for attr, n in (("input_names", m), ("output_names", None if self.output_min is None else
                                                              self.output_min.size)):
            names = getattr(self, attr)
            if names is None:
                continue
            names = tuple(str(x) for x in names)
            if n is None:
                raise LimitsError(f"{attr} given without output bounds; give output_min/output_max too.")
            if len(names) != n or len(set(names)) != n:
                raise LimitsError(f"{attr} must hold {n} unique names; got {list(names)}.")
            s(self, attr, names)

    # ------------------------------------------------------------------------------------------ derived
    def charge_bound_ua(self):
        """Largest amplitude per input allowed by the charge-density rule, µA, shape (n_inputs,); None without it."""
        if self.pulse_width_us is None:
            return None
        return max_amplitude_ua(self.shannon_k, self.electrode_area_cm2, self.pulse_width_us)

    def input_bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """The tightest amplitude window per input: declared bounds ∩ ``[−I_charge, I_charge]``.

        Returns
        -------
        lo, hi : ndarray, shape (n_inputs,)
            µA; ``lo <= 0 <= hi`` always holds.
        """
        lo, hi = self._bounds
        return lo.copy(), hi.copy()

    def bound_sources(self) -> tuple[tuple[str, ...], tuple[str, ...]]:
        """Which rule sets each input's lower and upper bound: ``"amplitude"`` or ``"charge_density"``."""
        q = self.charge_bound_ua()
        if q is None:
            return ("amplitude",) * self.n_inputs, ("amplitude",) * self.n_inputs
        lo_src = tuple("charge_density" if -q[i] > self.amplitude_min_ua[i] else "amplitude"
                       for i in range(self.n_inputs))
        hi_src = tuple("charge_density" if q[i] < self.amplitude_max_ua[i] else "amplitude"
                       for i in range(self.n_inputs))
        return lo_src, hi_src

    def safe_inputs(self, n_steps: int, last_input=None) -> np.ndarray:
        """The documented safe fallback: go to zero stimulation as fast as the slew limit allows.

        Each step moves every input towards 0 by at most its slew limit, inside its amplitude window. This
        sequence has, at every step and for every input, the smallest magnitude any slew-respecting sequence can
        reach, so it also has the least energy ``Σ u²``: when it breaks the energy budget, no plan can meet it.
        When ``last_input`` lies outside the amplitude window the amplitude bound takes precedence over the slew
        limit: the first sample is the nearest amplitude bound, and the ramp goes on from there.

        Parameters
        ----------
        n_steps : int
            Number of samples.
        last_input : ndarray, shape (n_inputs,), optional
            The input applied just before, µA; default zero.

        Returns
        -------
        ndarray, shape (n_steps, n_inputs)
            µA.
        """
        lo, hi = self.input_bounds()
        return safe_sequence(lo, hi, self.slew_max_ua, n_steps, last_input)

    def violations(self, inputs, last_input=None, *, rtol: float = 1e-9,
                   energy_window_steps: int | None = None, history=None) -> dict:
        """Count the samples of an input sequence that break a hard limit.

        Parameters
        ----------
        inputs : ndarray, shape (n_steps, n_inputs)
            µA.
        last_input : ndarray, shape (n_inputs,), optional
            The input applied before ``inputs[0]``, for the slew limit of the first sample; without it the first
            sample's slew is not checked.
        rtol : float, default 1e-9
            Relative allowance for floating-point rounding in slew differences and the energy sum (amplitude
            bounds are checked exactly); 0 checks every limit exactly.
        energy_window_steps : int, optional
            Apply the energy budget to every window of this many consecutive samples (a schedule longer than a
            planning horizon) instead of to the whole sequence; a window longer than the sequence is the whole
            sequence.
        history : ndarray, shape (n_before, n_inputs), optional
            Inputs applied before ``inputs``: they count in the windows and runs of the sequence limits.

        Returns
        -------
        dict
            ``{"amplitude": int, "slew": int, "energy_budget": int}``. The energy count is 0 or 1 without a window
            (the budget applies to the whole sequence), else the number of windows over the budget. Limits with
            sequence limits add their counts (:func:`~stimsteer.control.sequence_limits.count_violations`).
        """
        u = np.asarray(inputs, dtype=np.float64).reshape(-1, self.n_inputs)
        lo, hi = self._bounds
        out = {"amplitude": int(np.sum((u < lo) | (u > hi) | ~np.isfinite(u))), "slew": 0, "energy_budget": 0}
        if self.slew_max_ua is not None:
            seq = u if last_input is None else np.vstack([np.asarray(last_input, np.float64).reshape(1, -1), u])
            s = self.slew_max_ua
            # relative to the limit itself, so the allowance means the same in any unit
            allowed = np.where(np.isfinite(s), s * (1.0 + rtol), np.inf)
            out["slew"] = int(np.sum(np.abs(np.diff(seq, axis=0)) > allowed))
        if self.energy_budget_ua2 is not None:
            out["energy_budget"] = legacy_energy_violations(u, self.energy_budget_ua2, rtol, energy_window_steps)
        return {**out, **count_violations(self, u, history)}

    @property
    def has_output_bounds(self) -> bool:
        return self.output_min is not None and bool(
            np.any(np.isfinite(self.output_min)) or np.any(np.isfinite(self.output_max)))

    def aligned(self, input_names, output_names) -> "StimLimits":
        """These limits ordered like a model's inputs, with output bounds spread over the model's outputs.

        Parameters
        ----------
        input_names : sequence of str
            The model's input names, in its order.
        output_names : sequence of str
            The model's output names, in its order.

        Returns
        -------
        StimLimits
            With ``n_inputs == len(input_names)`` and (when output bounds exist) arrays over all outputs, ``±inf``
            for unbounded ones.

        Raises
        ------
        LimitsError
            If the names do not match (limits for an unknown input or output, or a model input without limits),
            or if unnamed limits have the wrong size.
        """
        input_names, output_names = tuple(input_names), tuple(output_names)
        changes = {}
        if self.input_names is None:
            if self.n_inputs != len(input_names):
                raise LimitsError(f"the limits are for {self.n_inputs} inputs but the model has "
                                  f"{len(input_names)} ({list(input_names)}). Declare one limit per model input.")
        else:
            missing = [n for n in input_names if n not in self.input_names]
            extra = [n for n in self.input_names if n not in input_names]
            if missing or extra:
                raise LimitsError(f"the limits' inputs {list(self.input_names)} do not match the model's inputs "
                                  f"{list(input_names)} (no limits for {missing}; unknown {extra}). Name one "
                                  "[inputs.<name>] table per model input.")
            idx = [self.input_names.index(n) for n in input_names]
            for f in ("amplitude_min_ua", "amplitude_max_ua", "slew_max_ua", "pulse_width_us",
                      "electrode_area_cm2"):
                v = getattr(self, f)
                changes[f] = None if v is None else v[idx]
            changes["window_budgets"] = tuple(b.taken(idx) for b in self.window_budgets)
            changes["train_limits"] = None if self.train_limits is None else self.train_limits.taken(idx)
            changes["input_names"] = input_names
        changes.update(self._aligned_outputs(output_names))
        return dataclasses.replace(self, **changes)

    def _aligned_outputs(self, output_names):
        p = len(output_names)
        if self.output_min is None:
            return {}
        if self.output_names is None:
            if self.output_min.size != p:
                raise LimitsError(f"the output bounds are for {self.output_min.size} outputs but the model has {p}."
                                  " Give one bound per output or name the outputs.")
            return {}
        unknown = [n for n in self.output_names if n not in output_names]
        if unknown:
            raise LimitsError(f"output bounds name outputs {unknown} that the model does not have; its outputs are "
                              f"{list(output_names)}.")
        lo, hi = np.full(p, -np.inf), np.full(p, np.inf)
        for j, n in enumerate(self.output_names):
            lo[output_names.index(n)] = self.output_min[j]
            hi[output_names.index(n)] = self.output_max[j]
        return {"output_min": lo, "output_max": hi, "output_names": tuple(output_names)}

    # ------------------------------------------------------------------------------------------ dict / TOML
    @classmethod
    def from_dict(cls, d) -> "StimLimits":
        """Limits from a nested dict in the TOML layout of the module docstring."""
        return cls(**limits_fields(d))

    def to_dict(self) -> dict:
        """A JSON-ready dict of the limits (arrays as lists, ``inf`` as None), including the derived bounds."""
        def lst(a):
            return None if a is None else [None if not np.isfinite(v) else float(v) for v in np.asarray(a)]

        lo, hi = self.input_bounds()
        return {
            "input_names": list(self.input_names) if self.input_names else None,
            "amplitude_min_ua": lst(self.amplitude_min_ua), "amplitude_max_ua": lst(self.amplitude_max_ua),
            "slew_max_ua": lst(self.slew_max_ua), "energy_budget_ua2": self.energy_budget_ua2,
            "energy_window_steps": self.energy_window_steps,
            "pulse_width_us": lst(self.pulse_width_us), "electrode_area_cm2": lst(self.electrode_area_cm2),
            "shannon_k": self.shannon_k, "charge_bound_ua": lst(self.charge_bound_ua()),
            "effective_min_ua": lst(lo), "effective_max_ua": lst(hi),
            "output_names": list(self.output_names) if self.output_names else None,
            "output_min": lst(self.output_min), "output_max": lst(self.output_max),
            **({"window_budgets": [b.to_dict() for b in self.window_budgets]} if self.window_budgets else {}),
            **({"train_limits": self.train_limits.to_dict()} if self.train_limits is not None else {}),
        }

    @property
    def has_sequence_limits(self) -> bool:
        """True when limits speak of the delivered sequence beyond one plan's Σ u² budget (window budgets in
        physical units, train length, duty cycle): a planner that cannot keep them must refuse these limits."""
        return bool(self.window_budgets) or self.train_limits is not None


def load_limits(path) -> StimLimits:
    """Read limits from a TOML file in our layout (see the module docstring).

    Raises
    ------
    LimitsError
        If the file is not valid TOML or the limits are malformed; the message names the file and the problem.
    FileNotFoundError
        If the file does not exist.
    """
    table = read_limits_table(path)
    try:
        return StimLimits.from_dict(table)
    except LimitsError as exc:
        raise LimitsError(f"{path}: {exc}") from None
