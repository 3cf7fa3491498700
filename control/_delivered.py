"""The delivered sequence as the live gate keeps it: rolling window loads and train state, updated per sample.

The sequence limits of :mod:`stimsteer.control.sequence_limits` (window budgets, train length, duty cycle) and the
per-sample layout's ``Σ u²`` budget speak of stretches of *delivered* stimulation. A live gate
(:class:`~stimsteer.control.input_gate.InputGate`) has no time to recount a window of thousands of samples at every
sample of a 10 kHz loop, so it keeps, per limit, the little state that decides the next sample exactly:

* :class:`_Budget` -- the loads ``ℓ = a·|u| + b·u²`` of the last ``W − 1`` delivered samples (a ring) and their
  sum. A candidate ``u`` is admitted when the window it closes stays within the budget *and*, under a slew limit,
  so do the windows of the fastest ramp to zero after it (the safe fallback): then the fallback always fits in turn
  and a run that starts at rest never has to break the budget. Without a slew limit the ramp is zero at once, and
  the candidate's own window is the only one to check (later windows lose samples and gain zeros). With one, only
  the windows ending at the ``J = min(L, W − 1)`` ramp samples can be larger (``L`` the ramp's length; past it they
  lose samples and gain zeros, and windows holding only ramp samples are smaller than the one holding ``u`` and the
  first ``W − 1`` of them, the ramp's loads never growing): ``O(J·m)`` per check, not ``O(W)``.
* :class:`_Train` -- per input, the length of the train ending at the last delivered sample and the on samples of
  the last ``w − g`` samples (a ring and its count), with ``g`` the train's hold (a sample is on while any of the
  last ``g`` samples is nonzero, :class:`~stimsteer.control.sequence_limits.TrainLimits`). A nonzero candidate at
  sample ``k`` turns samples ``k … k + g − 1`` on; with every later sample off (the fallback) the longest run and
  the fullest duty window it can cause end at ``k + g − 1``, so it is admitted exactly when
  ``run(k − 1) + g <= r`` and ``on(k + g − w … k − 1) + min(g, w) <= d``. A zero candidate never breaks either
  (every earlier pulse was admitted under the same rule).

Running sums drift; each ring's sum is recomputed exactly (``math.fsum``) once per window length, so the drift stays
at the rounding of ``W`` additions. A candidate is admitted when its windows are within the budget; an input
*reduced* to the largest safe one aims ``1e-12 + W`` ulps below it, so that the rounding of running sums never
lifts a later window (or the fallback's) over the budget.
"""

from __future__ import annotations

import math
from operator import mul

import numpy as np

__all__: list = []

# a reduced input leaves its windows this far (relative) below the budget, plus one ulp per sample of the window
_ROUNDING = 1e-12
_EPS = 2.3e-16
# a live loop keeps at most this many samples of one rolling window (8 MB per window): a longer window is refused
MAX_WINDOW_STEPS = 1 << 20


class _Budget:
    """``Σ ℓ`` over every window of ``window_steps`` delivered samples ``<= budget``, ``ℓ = a·|u| + b·u²``.

    Loads of one sample are summed in plain Python floats (``x``: a list of magnitudes): for a handful of inputs
    that is several times faster than numpy calls.
    """

    __slots__ = ("name", "unit", "a", "b", "_al", "_bl", "_aw", "_bw", "budget", "aim", "ring", "pos", "total",
                 "_since")

    def __init__(self, name, unit, linear, quadratic, window_steps, budget):
        self.name, self.unit = name, unit
        self.a, self.b = np.asarray(linear, np.float64), np.asarray(quadratic, np.float64)
        # only the inputs that load this budget, as (index, weight) pairs
        self._al = [(i, w) for i, w in enumerate(self.a.tolist()) if w]
        self._bl = [(i, w) for i, w in enumerate(self.b.tolist()) if w]
        # every input loads it (the usual case): the same products summed in the same order, through map
        self._aw = self.a.tolist() if len(self._al) == self.a.size else None
        self._bw = self.b.tolist() if len(self._bl) == self.b.size else None
        self.budget = float(budget)
        # a reduced input aims this far below the budget: the running sum's rounding (at most W ulps) never lifts a
        # window over it, and an independent recount of the window agrees
        self.aim = self.budget * (1.0 - _ROUNDING - _EPS * int(window_steps))
        # loads of the previous W − 1 delivered samples, oldest at pos (a list: item access is what a step does)
        self.ring = [0.0] * (int(window_steps) - 1)
        self.pos, self.total, self._since = 0, 0.0, 0

    def coefficients(self, x) -> tuple[float, float, float]:
        """``(A, B, R)``: the load of ``α·x`` is ``α A + α² B`` and ``R`` is what the closing window has left below
        the aim of a reduced input."""
        return (sum([w * x[i] for i, w in self._al]), sum([w * x[i] * x[i] for i, w in self._bl]),
                self.aim - self.total)

    def load(self, x) -> float:
        """``ℓ`` of one sample of magnitudes ``x`` (a list)."""
        aw, bw = self._aw, self._bw
        A = sum(map(mul, aw, x)) if aw is not None else sum([w * x[i] for i, w in self._al])
        B = sum(map(mul, map(mul, bw, x), x)) if bw is not None else sum([w * x[i] * x[i] for i, w in self._bl])
        return A + B

    def _oldest(self, j):
        r, p = self.ring, self.pos
        end = p + j
        return np.array(r[p:end] if end <= len(r) else r[p:] + r[:end - len(r)])

    def fits(self, x, ramp, aim=False) -> bool:
        """True when a sample of magnitudes ``x`` (a list) and then ``ramp`` (ndarray (J, n_inputs); None: zero at
        once) keep every window that holds them within the budget (module notes); ``aim``: within the aim of a
        reduced input."""
        cap = self.aim if aim else self.budget
        closing = self.total + self.load(x)
        if closing > cap:
            return False
        if ramp is None or not self.ring or not ramp.shape[0]:
            return True
        J = min(ramp.shape[0], len(self.ring))
        rl = ramp[:J] @ self.a + (ramp[:J] * ramp[:J]) @ self.b
        if closing + float(rl.sum()) <= cap:  # bounds every window at once
            return True
        return bool(np.all(closing + np.cumsum(rl) - np.cumsum(self._oldest(J)) <= cap))

    def push(self, x) -> None:
        """Record a delivered sample of magnitudes ``x`` (a list)."""
        ring = self.ring
        if not ring:
            return
        load = self.load(x)
        pos = self.pos
        self.total += load - ring[pos]
        ring[pos] = load
        self.pos = pos + 1 if pos + 1 < len(ring) else 0
        self._since += 1
        if self._since >= len(ring):
            self.total, self._since = math.fsum(ring), 0


class _Train:
    """Train length and duty of one input, from its delivered samples (module notes); None: not declared."""

    __slots__ = ("r", "d", "w", "g", "k", "last_on", "run", "ring", "pos", "count")

    def __init__(self, run_max, duty_max, duty_window, hold):
        self.r, self.d, self.w, self.g = run_max, duty_max, duty_window, int(hold)
        self.k, self.last_on, self.run = 0, -(1 << 62), 0
        self.ring = [False] * (0 if duty_window is None else max(int(duty_window) - self.g, 0))
        self.pos = self.count = 0

    def breaks(self) -> str:
        """The limit a nonzero sample now would break ('' for none)."""
        if self.r is not None and self.run + self.g > self.r:
            return "train_length"
        if self.d is not None and self.count + min(self.g, self.w) > self.d:
            return "duty_cycle"
        return ""

    def push(self, nonzero: bool) -> None:
        """Record a delivered sample (nonzero or not)."""
        k = self.k
        if nonzero:
            self.last_on = k
        on = k - self.last_on < self.g
        self.run = self.run + 1 if on else 0
        ring = self.ring
        if ring:
            pos = self.pos
            if on is not ring[pos]:  # booleans: the count moves only when the sample leaving differs
                self.count += 1 if on else -1
                ring[pos] = on
            pos += 1
            self.pos = 0 if pos == len(ring) else pos
        self.k = k + 1


def budgets_of(limits, energy_window_steps) -> list:
    """The rolling budgets of ``limits``: the per-sample layout's ``Σ u²`` (over ``energy_window_steps``), then the
    window budgets in physical terms."""
    m = limits.n_inputs
    out = []
    if limits.energy_budget_ua2 is not None:
        out.append(_Budget("energy_budget", "uA2", np.zeros(m), np.ones(m), energy_window_steps,
                           limits.energy_budget_ua2))
    out += [_Budget(b.name, b.unit, b.linear, b.quadratic, b.window_steps, b.budget) for b in limits.window_budgets]
    return out


def trains_of(limits) -> list:
    """One :class:`_Train` per input of ``limits`` with train limits (empty without)."""
    t = limits.train_limits
    if t is None:
        return []
    return [_Train(*(v[i] for v in (t.run_max_steps, t.duty_max_steps, t.duty_window_steps, t.hold_steps)))
            for i in range(t.n_inputs)]


def longest_window(limits, energy_window_steps) -> int:
    """The longest window (samples) a gate for ``limits`` keeps: budgets, duty windows and train lengths."""
    w = [int(energy_window_steps or 1)] + [b.window_steps for b in limits.window_budgets]
    t = limits.train_limits
    if t is not None:
        w += [int(v) for v in t.duty_window_steps + t.run_max_steps if v is not None]
    return max(w)


def largest_alpha(budgets, x) -> float:
    """The largest ``α`` in [0, 1] with every budget's closing window holding ``α·x`` (no slew limit: the fallback is
    zero and the closing window is the only one), from ``α A + α² B <= R``."""
    alpha = 1.0
    for b in budgets:
        A, B, R = b.coefficients(x)
        if A + B <= R:
            continue
        if R <= 0.0:
            return 0.0
        a = R / A if B <= 0.0 else 2.0 * R / (A + math.sqrt(A * A + 4.0 * B * R))  # the stable root
        alpha = min(alpha, a)
    return max(0.0, alpha)
