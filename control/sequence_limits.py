"""Limits on the delivered *sequence*: budgets over rolling windows and train limits, with the counts that check them.

Two kinds of limit speak of a whole stretch of delivered stimulation rather than of one sample. Both are part of a
:class:`~stimsteer.control.limits.StimLimits` (``window_budgets``, ``train_limits``), every controller plans inside
them from what was already applied (:mod:`stimsteer.control.mpc`), and a closed loop counts the windows of the
applied sequence that break them (:func:`count_violations`).

:class:`WindowBudget` — a load per sample ``ℓ_k = Σ_i (a_i |u_ik| + b_i u_ik²)`` (``a``: linear weights, ``b``:
quadratic weights, per model unit and per model unit²) whose sum over every window of ``window_steps`` consecutive
samples stays ``<= budget``. The charge per phase delivered by a pulse train is linear in its amplitude (``Q = I · PW``,
common practice), the energy dissipated in a resistive electrode impedance quadratic (``E = I² · R · t``, Joule's
law), the light energy of an optical pulse linear (``E = irradiance · area · t``, definition): one form holds them
all, each load convex in ``u``, so the window rows stay convex and the least-magnitude sequence (the safe fallback)
has the least load in every window.

:class:`TrainLimits` — per input, the largest number of consecutive *on* samples (``|u| > 0``; the train length) and
the largest number of on samples in every window of ``window_steps`` samples (the duty cycle). Counting on samples is
not convex, so a plan obeys them through an on/off mask chosen from the applied history before the solve
(:func:`on_mask`): step ``k`` may be on only if, with every earlier allowed step of the plan on too, the run ending at
``k`` and every duty window ending at ``k`` stay within the limits. Any plan inside the mask then obeys both limits
(runs and counts only grow with the set of on samples), and zero stimulation always does, so the limits never make a
plan infeasible unless the applied history alone already breaks a duty window (reported, never relaxed). The first
step, the one a closed loop applies, is constrained exactly: it may be on exactly when the history allows it; later
steps assume the earliest on pattern (the optimal on/off pattern is a mixed-integer problem, not solved here).
An input with a finite slew limit cannot be switched off at once, so train limits with a slew limit are refused.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..sysid.exceptions import LimitsError
from ._energy_windows import check_window

__all__ = ["WindowBudget", "TrainLimits", "on_mask", "history_breaks", "count_violations"]


def legacy_energy_violations(u, budget, rtol, window) -> int:
    """Windows of ``window`` samples of ``u`` whose ``Σ u²`` exceeds ``budget`` (the whole sequence without one)."""
    budget = budget * (1.0 + rtol)
    if window is None:
        return int(np.sum(u**2) > budget)
    n = u.shape[0]
    if n == 0:
        return 0
    # c = [0, cumsum(Σ u²)]: np.sum(u**2, axis=1) is add.reduce of u·u, and the running sum is the same written
    # after a leading zero as concatenated behind it
    c = np.zeros(n + 1)
    np.cumsum(np.add.reduce(u * u, axis=1), out=c[1:])
    w = min(check_window(window), n)
    return int(np.count_nonzero(c[w:] - c[:-w] > budget))


def safe_sequence(lo, hi, slew_max, n_steps, last_input) -> np.ndarray:
    """:meth:`StimLimits.safe_inputs`: towards zero as fast as the slew limit allows, inside ``[lo, hi]``."""
    prev = np.zeros(lo.size) if last_input is None else np.asarray(last_input, np.float64).reshape(-1)
    slew = np.full(lo.size, np.inf) if slew_max is None else slew_max
    # the slew window misses the amplitude window: start from the nearest amplitude bound at once
    empty = (prev - slew > hi) | (prev + slew < lo)
    start = np.where(empty, np.clip(prev, lo, hi), prev)
    steps = np.arange(int(n_steps))[:, None] + np.where(empty, 0, 1)[None, :]
    with np.errstate(invalid="ignore"):
        left = np.where(steps == 0, np.abs(start), np.abs(start) - steps * slew)
    # each step moves |u| towards 0 by the slew limit; 0 lies in every amplitude window
    return np.clip(np.sign(start) * np.maximum(left, 0.0), lo, hi)


def check_sequence_limits(limits, m: int) -> None:
    """Validate the window budgets and train limits of a :class:`StimLimits` of ``m`` inputs (sets them)."""
    budgets = tuple(limits.window_budgets or ())
    for b in budgets:
        if not isinstance(b, WindowBudget) or b.linear.size != m:
            raise LimitsError(f"window_budgets must hold WindowBudget objects with one weight per input ({m}); got "
                              f"{b!r}.")
    object.__setattr__(limits, "window_budgets", budgets)
    t = limits.train_limits
    if t is None:
        return
    if not isinstance(t, TrainLimits) or t.n_inputs != m:
        raise LimitsError(f"train_limits must be a TrainLimits with one entry per input ({m}); got {t!r}.")
    slew = limits.slew_max_ua
    if slew is not None and np.any(np.isfinite(np.asarray(slew, np.float64))):
        raise LimitsError("train length and duty limits need inputs that can be switched off at once, but these "
                          "limits also declare a finite slew limit; remove one of them (stimsteer keeps both only "
                          "when a train can end within one sample).")


@dataclass(frozen=True)
class WindowBudget:
    """A budget on ``Σ_k Σ_i (a_i |u_ik| + b_i u_ik²)`` over every window of ``window_steps`` samples (module notes).

    Parameters
    ----------
    name : str
        The rule's name in plans and checks (``"charge_rate_window"``, ``"energy_window"``).
    budget : float
        Largest load of one window, in ``unit``.
    window_steps : int
        Window length, samples.
    linear, quadratic : ndarray, shape (n_inputs,)
        ``a`` (``unit`` per model unit and sample) and ``b`` (``unit`` per model unit² and sample), >= 0.
    unit : str
        The load's unit (``"uC"``, ``"uJ"``).
    """

    name: str
    budget: float
    window_steps: int
    linear: np.ndarray
    quadratic: np.ndarray
    unit: str

    def __post_init__(self):
        a = np.asarray(self.linear, np.float64).reshape(-1)
        b = np.asarray(self.quadratic, np.float64).reshape(-1)
        w = self.window_steps
        if a.shape != b.shape or not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))) or np.any(a < 0) or \
                np.any(b < 0) or not (np.any(a > 0) or np.any(b > 0)):
            raise LimitsError(f"window budget {self.name!r}: weights must be finite, >= 0, one per input and not all "
                              f"zero; got {a.tolist()} and {b.tolist()}.")
        if not (math.isfinite(self.budget) and self.budget > 0):
            raise LimitsError(f"window budget {self.name!r} must be positive and finite; got {self.budget!r}.")
        if isinstance(w, bool) or int(w) != w or w < 1:
            raise LimitsError(f"window budget {self.name!r}: window_steps must be a whole number >= 1; got {w!r}.")
        for k, v in (("linear", a), ("quadratic", b), ("window_steps", int(w)), ("budget", float(self.budget))):
            object.__setattr__(self, k, v)

    def loads(self, u) -> np.ndarray:
        """``ℓ_k`` of every sample of ``u`` (n, n_inputs), in ``unit``."""
        u = np.asarray(u, np.float64).reshape(-1, self.linear.size)
        return np.abs(u) @ self.linear + (u**2) @ self.quadratic

    def window_loads(self, u, history=None) -> np.ndarray:
        """The load of the window ending at each sample of ``u``; samples before ``u`` from ``history`` (else 0)."""
        e = self.loads(u)
        h = np.zeros(0) if history is None or not len(history) else self.loads(history)
        h = h[max(0, h.size - (self.window_steps - 1)):]
        full = np.concatenate([np.zeros(self.window_steps - 1 - h.size), h, e])
        c = np.concatenate([[0.0], np.cumsum(full)])
        return c[self.window_steps:] - c[:-self.window_steps]

    def taken(self, idx) -> "WindowBudget":
        """The budget with its inputs reordered/selected by ``idx``."""
        return WindowBudget(self.name, self.budget, self.window_steps, self.linear[idx], self.quadratic[idx], self.unit)

    def to_dict(self) -> dict:
        return {"name": self.name, f"budget_{self.unit.lower()}": self.budget, "window_steps": self.window_steps,
                f"linear_{self.unit.lower()}_per_model_unit": self.linear.tolist(),
                f"quadratic_{self.unit.lower()}_per_model_unit2": self.quadratic.tolist()}


@dataclass(frozen=True)
class TrainLimits:
    """Per-input train length and duty limits in samples (module notes); None: not declared for that input.

    Parameters
    ----------
    run_max_steps : tuple of (int or None)
        Longest run of consecutive on samples per input.
    duty_max_steps : tuple of (int or None)
        Most on samples per duty window, per input.
    duty_window_steps : tuple of (int or None)
        The duty window per input, samples.
    hold_steps : tuple of int, optional
        Samples a nonzero input keeps its train on (default 1): a train below the sample rate delivers a pulse
        only at some samples, and is on for one pulse period ``1 / f`` after each, so a sample counts as on when
        any of the last ``hold_steps = ceil(rate / f)`` samples is nonzero (the mapping's hold,
        :mod:`stimsteer.sysid.stimulation.mapping`). Then a run of on samples spans every pulse of a train (a gap
        of a whole pulse period breaks it) and the on samples of a window cover each pulse's period.
    """

    run_max_steps: tuple
    duty_max_steps: tuple
    duty_window_steps: tuple
    hold_steps: tuple = None

    def __post_init__(self):
        n = len(self.run_max_steps)
        hold = (1,) * n if self.hold_steps is None else tuple(int(g) for g in self.hold_steps)
        if not (len(self.duty_max_steps) == len(self.duty_window_steps) == len(hold) == n) or min(hold) < 1:
            raise LimitsError("train limits need one entry per input in run_max_steps, duty_max_steps, "
                              "duty_window_steps and hold_steps (>= 1).")
        object.__setattr__(self, "hold_steps", hold)
        for r, d, w in zip(self.run_max_steps, self.duty_max_steps, self.duty_window_steps):
            if r is not None and (int(r) != r or r < 1):
                raise LimitsError(f"train_length_max is shorter than one sample ({r!r} samples); a train needs at "
                                  "least one sample: lengthen it or raise the sample rate.")
            if (d is None) != (w is None) or (w is not None and (int(w) != w or w < 1 or d < 0 or d > w)):
                raise LimitsError(f"duty limits need 0 <= on samples <= window samples >= 1; got {d!r} of {w!r}.")

    @property
    def n_inputs(self) -> int:
        return len(self.run_max_steps)

    def taken(self, idx) -> "TrainLimits":
        return TrainLimits(*(tuple(v[i] for i in idx) for v in (self.run_max_steps, self.duty_max_steps,
                                                                  self.duty_window_steps, self.hold_steps)))

    def to_dict(self) -> dict:
        return {"train_length_max_steps": list(self.run_max_steps), "duty_on_max_steps": list(self.duty_max_steps),
                "duty_window_steps": list(self.duty_window_steps), "hold_steps": list(self.hold_steps)}

    def keep(self) -> int:
        """Applied samples that can still matter for the windows and runs of a plan (an upper bound)."""
        return max([1] + [int(w) + g for w, g in zip(self.duty_window_steps, self.hold_steps) if w is not None] +
                   [int(r) + g + 1 for r, g in zip(self.run_max_steps, self.hold_steps) if r is not None])


def _on(u) -> np.ndarray:
    return np.abs(np.asarray(u, np.float64)) > 0


def _history_on(history, n_inputs, keep) -> np.ndarray:
    h = np.zeros((0, n_inputs), bool) if history is None or not len(history) else _on(
        np.asarray(history, np.float64).reshape(-1, n_inputs))
    return h[max(0, h.shape[0] - keep):]


def _held(flags, g: int) -> np.ndarray:
    """On samples of a column of nonzero flags: on when any of the last ``g`` samples is nonzero."""
    f = np.asarray(flags, np.int64)
    if g <= 1:
        return f.astype(bool)
    c = np.concatenate([np.zeros(g, np.int64), np.cumsum(f)])
    return (c[g:] - c[:-g]) > 0


def _counts(on, r, d, w, start):
    """Samples from ``start`` on that end a run longer than ``r``, and duty windows ending there over ``d``."""
    runs = duty = 0
    if r is not None:
        idx = np.arange(on.size)
        run = idx - np.maximum.accumulate(np.where(on, -1, idx))  # samples since the last off one
        runs = int(np.sum(run[start:] > r))
    if d is not None:
        c = np.concatenate([np.zeros(w, np.int64), np.cumsum(on.astype(np.int64))])
        duty = int(np.sum((c[w:] - c[:-w])[start:] > d))
    return runs, duty


def on_mask(train: TrainLimits, history, n_steps: int) -> np.ndarray:
    """Which plan steps may be on, per input (module notes), shape (n_steps, n_inputs), from the applied history.

    Step ``k`` may be on when, with every earlier allowed step on too, no run and no duty window ending at
    ``k … k + hold − 1`` (the samples its train keeps on) breaks a limit.
    """
    m, n = train.n_inputs, int(n_steps)
    h = _history_on(history, m, train.keep())
    mask = np.zeros((n, m), bool)
    for i in range(m):
        r, d, w, g = (train.run_max_steps[i], train.duty_max_steps[i], train.duty_window_steps[i],
                      train.hold_steps[i])
        seq = np.concatenate([h[:, i], np.zeros(n + g, bool)])
        for k in range(n):
            at = h.shape[0] + k
            seq[at] = True
            on = _held(seq[:at + g], g)
            if sum(_counts(on, r, d, w, at)) == 0:
                mask[k, i] = True
            else:
                seq[at] = False
    return mask


def history_breaks(train: TrainLimits, history, n_steps: int) -> str:
    """Why even zero stimulation breaks a train limit in the plan ('' when it does not): the applied history's
    train still on at the start of the plan, or its on samples in a duty window that ends in the plan."""
    m = train.n_inputs
    h = _history_on(history, m, train.keep())
    for i in range(m):
        r, d, w, g = (train.run_max_steps[i], train.duty_max_steps[i], train.duty_window_steps[i],
                      train.hold_steps[i])
        on = _held(np.concatenate([h[:, i], np.zeros(int(n_steps) + g, bool)]), g)
        runs, duty = _counts(on, r, d, w, h.shape[0])
        if runs or duty:
            what = "train" if runs else "duty window"
            return (f"input {i}: the stimulation applied before the plan already breaks its {what} limit in the "
                    "plan's first samples, whatever the plan does (train on for one pulse period after each pulse)")
    return ""


def count_violations(limits, u, history=None) -> dict:
    """Windows and runs of ``u`` (after ``history``) that break the sequence limits of ``limits``.

    Returns
    -------
    dict
        ``window_budget`` (windows over any window budget), ``train_length`` (samples that end a run longer than
        allowed), ``duty_cycle`` (duty windows over the limit); only the keys of declared limits.
    """
    u = np.asarray(u, np.float64).reshape(-1, limits.n_inputs)
    out = {}
    if limits.window_budgets:
        out["window_budget"] = int(sum(np.sum(b.window_loads(u, history) > b.budget * (1 + 1e-9))
                                       for b in limits.window_budgets))
    t = limits.train_limits
    if t is not None:
        h = _history_on(history, limits.n_inputs, 1 << 30)
        seq = np.vstack([h, _on(u)])
        runs = duty = 0
        for i in range(limits.n_inputs):
            a, b = _counts(_held(seq[:, i], t.hold_steps[i]), t.run_max_steps[i], t.duty_max_steps[i],
                           t.duty_window_steps[i], h.shape[0])
            runs, duty = runs + a, duty + b
        out["train_length"], out["duty_cycle"] = runs, duty
    return out
