"""The result of one plan: :class:`Plan`, a frozen record of the inputs, the prediction and what limited them.

A plan never leaves the controller as bare arrays: its inputs come with the predicted outputs, the target, the cost
terms, the binding limits, the step bounds, the solver's status and the caution, so a reader (or a closed loop) can
judge it without the controller that made it.

Reports computed at their first read. A closed loop reads a plan's inputs, status and binding limits, and a hundred
plans a second leave the rest unread; so the cost terms, the output slack, the broken limits, the largest window
load and the read-only copy of the prediction may be handed to :class:`Plan` as :class:`_Deferred` values: a
function of values the controller captured when it made the plan (never of its later state), called at the first
read and its answer kept. A reader sees the same field values either way (equality, ``repr``, ``replace``,
``copy``, ``pickle`` read them too). The inputs and every safety check are never deferred.
"""

from __future__ import annotations

from dataclasses import MISSING, dataclass, fields

import numpy as np

from ...sysid.caution import CAUTION

__all__ = ["Plan"]


@dataclass(frozen=True)
class Plan:
    """A stimulation plan over a horizon, with everything needed to judge it.

    Attributes
    ----------
    inputs : ndarray, shape (horizon_steps, n_inputs)
        Stimulation amplitudes, µA, in the limits' physical units. Always inside the hard limits, except when no
        sequence can meet them (status ``"infeasible"``; ``broken_limits`` names what the fallback breaks).
    predicted_outputs : ndarray, shape (horizon_steps, n_outputs)
        The controller's prediction of the outputs under ``inputs``.
    target : ndarray, shape (horizon_steps, n_outputs) or (horizon_steps, n_states)
        The tracked target (outputs, or the target state repeated, see ``target_kind``).
    target_kind : str
        ``"output"`` or ``"state"``.
    cost_terms : dict of str to float
        ``tracking``, ``input_energy``, ``output_penalty`` and, where they apply, ``terminal``,
        ``past_consistency``, ``regularizer``; ``total`` is their sum. Evaluated at the returned inputs.
    active_limits : dict
        ``amplitude_min``, ``amplitude_max``, ``charge_density``, ``slew`` → bool arrays (horizon_steps, n_inputs),
        True where that hard limit is binding; ``energy_budget`` → bool; ``output_bounds`` → bool array
        (horizon_steps, n_outputs), True where a predicted output is at or beyond its soft bound.
    output_slack : ndarray, shape (horizon_steps, n_outputs)
        How far each predicted output exceeds its soft bound (0 inside or unbounded), in the output's units.
    step_bounds : tuple of ndarray
        ``(lower, upper)``, each (horizon_steps, n_inputs): the window each step's input obeys, µA: the amplitude
        window, for the first step intersected with the slew window of ``last_input`` (when the two do not meet,
        the amplitude window alone, and ``broken_limits`` says the slew limit is broken at step 0).
    last_input : ndarray, shape (n_inputs,)
        The input applied before the plan, µA.
    solver : str
    status : str
        ``"optimal"``, ``"optimal_inaccurate"`` (accepted after verification), ``"infeasible"`` (no input
        sequence meets the hard limits from ``last_input`` and the applied past) or ``"failed"`` (the solver gave
        no usable answer; the safe fallback is returned).
    message : str
        Why a plan is not optimal, or how it was solved when the fast path had to hand over; empty otherwise.
    fallback : bool
        True when ``inputs`` are the safe fallback instead of an optimised plan.
    solve_time_s : float
        Wall time of the parameter update and solve, seconds.
    input_names, output_names : tuple of str
    output_bounds : tuple of ndarray or None
        ``(output_min, output_max)``, each (n_outputs,), ``±inf`` where unbounded; None without output bounds.
    energy_window_steps : int or None
        The energy budget's window, samples (None without a budget).
    energy_window_max_ua2 : float or None
        The largest energy of a budget window that ends inside the plan (or in its ramp to zero after it, with a
        slew limit), counting the inputs applied before the plan, µA².
    broken_limits : tuple of str
        The hard limits ``inputs`` break, in words; empty unless the plan is infeasible.
    caution : str
        :data:`stimsteer.control.CAUTION` (the text of :mod:`stimsteer.sysid.caution`).
    """

    inputs: np.ndarray
    predicted_outputs: np.ndarray
    target: np.ndarray
    target_kind: str
    cost_terms: dict
    active_limits: dict
    output_slack: np.ndarray
    step_bounds: tuple
    last_input: np.ndarray
    solver: str
    status: str
    message: str
    fallback: bool
    solve_time_s: float
    input_names: tuple
    output_names: tuple
    output_bounds: tuple = None
    energy_window_steps: int = None
    energy_window_max_ua2: float = None
    broken_limits: tuple = ()
    caution: str = CAUTION

    @property
    def ok(self) -> bool:
        """True for an optimised plan (not a fallback)."""
        return self.status in ("optimal", "optimal_inaccurate") and not self.fallback

    @property
    def horizon_steps(self) -> int:
        return int(self.inputs.shape[0])

    @property
    def slack_total(self) -> float:
        return float(np.sum(self.output_slack))

    def active_summary(self) -> list[str]:
        """Readable lines naming the binding limits (input or output, and the steps)."""
        lines = []
        for key in ("amplitude_min", "amplitude_max", "charge_density", "slew"):
            act = self.active_limits[key]
            for i, name in enumerate(self.input_names):
                steps = np.flatnonzero(act[:, i])
                if steps.size:
                    lines.append(f"{key} on {name} at steps {_ranges(steps)}")
        if self.active_limits["energy_budget"]:
            lines.append(f"energy_budget over a window of {self.energy_window_steps} samples")
        act = self.active_limits["output_bounds"]
        for j, name in enumerate(self.output_names):
            steps = np.flatnonzero(act[:, j])
            if steps.size:
                lines.append(f"output bound on {name} at steps {_ranges(steps)}")
        return lines

    def to_dict(self) -> dict:
        """A JSON-ready summary (no arrays of the plan itself: those go to the plan table)."""
        return {
            "status": self.status, "message": self.message, "fallback": bool(self.fallback),
            "solver": self.solver, "solve_time_s": float(self.solve_time_s),
            "horizon_steps": self.horizon_steps, "target_kind": self.target_kind,
            "cost_terms": {k: float(v) for k, v in self.cost_terms.items()},
            "active_limits": self.active_summary(),
            "active_counts": {k: int(np.sum(v)) for k, v in self.active_limits.items()},
            "output_slack_total": self.slack_total, "output_slack_max": float(np.max(self.output_slack, initial=0)),
            "input_energy_ua2": float(np.sum(self.inputs**2)),
            "energy_window_steps": self.energy_window_steps, "energy_window_max_ua2": self.energy_window_max_ua2,
            "broken_limits": list(self.broken_limits),
            "input_names": list(self.input_names), "output_names": list(self.output_names),
            "caution": self.caution,
        }


class _Deferred:
    """A plan field's value computed at its first read: ``compute()`` takes no argument and depends only on values
    captured when the plan was made."""

    __slots__ = ("compute",)

    def __init__(self, compute):
        self.compute = compute


class _OnFirstRead:
    """The data descriptor of a :class:`Plan` field that may hold a :class:`_Deferred` (computed, kept, returned)."""

    def __init__(self, name, default):
        self.name, self.default = name, default

    def __get__(self, obj, owner=None):
        if obj is None:
            if self.default is MISSING:
                raise AttributeError(self.name)
            return self.default
        value = obj.__dict__[self.name]
        if type(value) is _Deferred:
            value = value.compute()
            obj.__dict__[self.name] = value
        return value

    def __set__(self, obj, value):  # the dataclass's own __init__ (assignment after it raises: the plan is frozen)
        obj.__dict__[self.name] = value


_DEFERRABLE = ("predicted_outputs", "cost_terms", "output_slack", "energy_window_max_ua2", "broken_limits")
for _f in fields(Plan):
    if _f.name in _DEFERRABLE:
        setattr(Plan, _f.name, _OnFirstRead(_f.name, _f.default))


def _plan_state(self):
    """A copy or a pickle holds values, not the functions of deferred fields: every one is computed first."""
    for name in _DEFERRABLE:
        getattr(self, name)
    return dict(self.__dict__)


Plan.__getstate__ = _plan_state

_FIELDS = tuple((f.name, f.default) for f in fields(Plan))


def _made(**values) -> Plan:
    """``Plan(**values)``: the same instance dict (every field in order, a default where none is given, a deferred
    field as it is), written at once instead of field by field through the frozen dataclass's
    ``object.__setattr__`` (a closed loop makes a plan per step; a tenth of the time of ``Plan(...)``)."""
    if not values.keys() <= _NAMES:
        raise TypeError(f"Plan has no field(s) {sorted(values.keys() - _NAMES)}")
    plan = object.__new__(Plan)
    d = plan.__dict__
    for name, default in _FIELDS:
        value = values.get(name, default)
        if value is MISSING:
            raise TypeError(f"Plan needs the field {name!r}")
        d[name] = value
    return plan


_NAMES = frozenset(name for name, _ in _FIELDS)


def _ranges(steps) -> str:
    """'0-3, 7' for [0, 1, 2, 3, 7]."""
    parts, start = [], int(steps[0])
    prev = start
    for s in list(map(int, steps[1:])) + [None]:
        if s is None or s != prev + 1:
            parts.append(f"{start}" if start == prev else f"{start}-{prev}")
            start = s
        prev = s if s is not None else prev
    return ", ".join(parts)


def _ro(a):
    """A read-only float64 copy (plans are frozen, and so are their arrays)."""
    a = np.array(a, dtype=np.float64, copy=True)
    a.setflags(write=False)
    return a
