"""The last check before a stimulation input leaves: :class:`InputGate`.

Every input that a live loop or the streaming bridge delivers passes through a gate at the moment it leaves. The
gate checks the hard limits of a :class:`~stimsteer.control.limits.StimLimits` against what was *actually
delivered* before, not against what a plan assumed:

* amplitude: ``lo_i <= u_i <= hi_i`` (declared bounds ∩ the charge-density bound), exactly;
* slew: ``|u_i − u_i,prev| <= slew_i`` from the last delivered input, exactly;
* every rolling budget, exactly: the per-sample layout's ``Σ u²`` over the last ``energy_window_steps`` delivered
  inputs (this one included) ``<= energy_budget_ua2``, and each window budget in physical terms (charge, energy:
  ``Σ (a·|u| + b·u²)`` over every window of its length, :class:`~stimsteer.control.sequence_limits.WindowBudget`);
* train length and duty cycle per input, from the on samples actually delivered
  (:class:`~stimsteer.control.sequence_limits.TrainLimits`, with its hold).

An input that misses a bound by rounding only (at most ``1e-9`` relative, the tolerance the controllers verify
their plans with) is put exactly on the bound; any other input that breaks a per-sample limit (amplitude, slew), or
holds NaN, is replaced by the safe fallback of :meth:`StimLimits.safe_inputs` (towards zero as fast as the slew
limit allows).

An input that meets the per-sample limits but would break a sequence limit is *reduced* to the largest safe input
instead: each input whose train or duty window is full is set to zero, then the input moves along the segment from
the safe fallback ``f`` towards it, ``f + α (u − f)``, to the largest ``α`` in [0, 1] that keeps every window
(``α = 0`` is the fallback). Every point of that segment meets the amplitude and slew limits (both ends do, the
windows are convex), and every window's load grows with ``α`` (loads are convex and grow with ``|u|``), so the safe
``α`` form an interval: closed form without a slew limit (the fallback is zero), bisection (``2^-30`` of the
segment, erring towards the fallback) with one.

Under a slew limit an input can fit its own window and still leave the ramp down too slow for the windows after
it. So the gate admits an input only when it *and the fastest ramp to zero after it* keep every window within its
budget (:mod:`stimsteer.control._delivered`); then the safe fallback (the first step of that ramp) always fits in
turn, and a run that starts at rest never has to break a budget. ``n_unavoidable`` counts fallbacks that broke one
anyway (only possible when the gate is started from a state that is not at rest and was not checked, which the
constructor refuses).

Decisions
    * The energy budget of the per-sample layout is declared "over one planning horizon"
      (:mod:`stimsteer.control.limits`); for delivered inputs the horizon becomes a rolling window of as many samples
      (the runner passes the controller's horizon).
    * Inputs below ``1e-6`` of their amplitude bound are residue (an interior-point or active-set answer seldom
      reaches 0 exactly) and leave as zero under train limits, as in the planner: they would count as a train on.
      Train limits come without a finite slew limit (:class:`StimLimits` refuses both), so zero is always reachable.
    * The gate never raises on a bad input: a live loop must always have something safe to deliver.
"""

from __future__ import annotations

import math

import numpy as np

from ..sysid import InvalidParameterError, LimitsError
from ._delivered import MAX_WINDOW_STEPS, budgets_of, largest_alpha, longest_window, trains_of

__all__ = ["InputGate"]

_ROUNDING = 1e-9  # relative; the same allowance as StimLimits.violations and the controllers' verification
_ZERO_RTOL = 1e-6  # under train limits, |u| at most this fraction of its bound is residue: 0 (as in the planner)
_BISECT = 30  # bisection steps of the largest safe input under a slew limit: 2^-30 of the segment


class InputGate:
    """Checks each delivered input against the hard limits and keeps the record the checks need.

    Parameters
    ----------
    limits : StimLimits
    energy_window_steps : int, optional
        Rolling window of the per-sample layout's energy budget, samples; required when the limits have one.
    last_input : ndarray, shape (n_inputs,), optional
        The input delivered before the first one through this gate, µA; default zero (rest).

    Attributes
    ----------
    last_input : ndarray, shape (n_inputs,)
        The last delivered input, µA.
    n_admitted, n_replaced, n_reduced, n_unavoidable : int
        Inputs delivered as given (or put on a bound by rounding only); inputs not delivered as given (the safe
        fallback, or a reduced input); of those, inputs reduced to the largest safe input under a sequence limit;
        safe fallbacks that still broke a window because no input could meet it.

    Raises
    ------
    InvalidParameterError
        An energy budget without ``energy_window_steps``; a window longer than a live gate keeps.
    LimitsError
        A ``last_input`` outside the amplitude window, or from which even the fastest ramp to zero breaks a budget.
    """

    def __init__(self, limits, *, energy_window_steps=None, last_input=None):
        m = limits.n_inputs
        self.limits = limits
        self._lo, self._hi = limits.input_bounds()
        self._slew = None if limits.slew_max_ua is None else np.asarray(limits.slew_max_ua, np.float64)
        self._lo_l, self._hi_l = self._lo.tolist(), self._hi.tolist()
        self._slew_l = None if self._slew is None else self._slew.tolist()
        w = energy_window_steps
        if limits.energy_budget_ua2 is not None and (
                isinstance(w, bool) or not isinstance(w, (int, np.integer)) or w < 1):
            raise InvalidParameterError(
                f"the limits have an energy budget, so the gate needs energy_window_steps (a whole number of "
                f"samples >= 1, usually the controller's horizon); got {w!r}.")
        longest = longest_window(limits, w if limits.energy_budget_ua2 is not None else None)
        if longest > MAX_WINDOW_STEPS:
            raise InvalidParameterError(
                f"a sequence limit of these limits spans {longest} samples, more than the {MAX_WINDOW_STEPS} a live "
                "gate keeps per window; declare a shorter window (or train length) in seconds, or run the loop at a "
                "lower sample rate.")
        self._budgets, self._trains = budgets_of(limits, w), trains_of(limits)
        self._zero_tol = (_ZERO_RTOL * np.maximum(np.abs(self._lo), np.abs(self._hi))).tolist()
        last = np.zeros(m) if last_input is None else np.asarray(last_input, np.float64).reshape(-1)
        if last.shape != (m,) or not np.all(np.isfinite(last)):
            raise InvalidParameterError(f"last_input must hold {m} finite values (µA); got {last_input!r}.")
        if limits.violations(last)["amplitude"]:
            raise LimitsError(f"the input delivered before the gate, {last.tolist()} µA, lies outside the amplitude "
                              f"window [{self._lo.tolist()}, {self._hi.tolist()}] µA; start from rest (zeros).")
        self.last_input = last.copy()
        bad = self._budget_reason(last)
        if bad:
            raise LimitsError(f"from the input delivered before the gate, {last.tolist()} µA, even the fastest ramp "
                              f"to zero breaks the rolling budget {bad!r}; start from rest (zeros) or declare "
                              "consistent limits.")
        self.n_admitted = self.n_replaced = self.n_reduced = self.n_unavoidable = 0
        self.energy_window_steps = w
        self._handed = None  # the values of the last input admitted, until a sender takes them (one shot)

    @property
    def has_sequence_limits(self) -> bool:
        """True when the gate keeps rolling budgets or train limits."""
        return bool(self._budgets or self._trains)

    def safe_input(self) -> np.ndarray:
        """The safe fallback's next sample from the last delivered input, µA (:meth:`StimLimits.safe_inputs`)."""
        if self._slew_l is None:  # zero at once: 0 lies in every amplitude window
            return np.zeros(self.last_input.size)
        out = []
        for prev, s, lo, hi in zip(self.last_input.tolist(), self._slew_l, self._lo_l, self._hi_l):
            if prev - s > hi or prev + s < lo:  # the slew window misses the amplitude one: the nearest bound
                out.append(min(max(prev, lo), hi))
            else:
                step = max(abs(prev) - s, 0.0)
                out.append(min(max(step if prev > 0 else -step, lo), hi))
        return np.array(out)

    def admit(self, u, *, hand=False) -> tuple[np.ndarray, str]:
        """Deliver ``u`` if it meets every hard limit; else the largest safe input (a sequence limit) or the safe
        fallback (a per-sample limit); record what was delivered.

        Parameters
        ----------
        u : ndarray, shape (n_inputs,), or a list of floats
            The candidate input, µA.
        hand : bool, default False
            Leave the delivered input for one :meth:`take` (a sender sharing this gate sends it unchecked again).

        Returns
        -------
        delivered : ndarray, shape (n_inputs,)
            The input that leaves, µA (a new array).
        reason : str
            ``""`` when ``u`` was delivered, else the limit it broke (``"not_finite"``, ``"amplitude"``, ``"slew"``,
            ``"energy_budget"``, a window budget's name such as ``"charge_rate_window"``, ``"train_length"``,
            ``"duty_cycle"``).
        """
        # one list of plain floats through the whole check: for a handful of inputs several times faster than numpy
        # calls, and a live loop at 10 kHz has 100 µs for everything (a list of floats is taken as it is, copied)
        x = _floats(u)
        reason = self._check(x) if len(x) == self.last_input.size else "amplitude"
        if reason:
            cand = self.safe_input()
            x = cand.tolist()
            self.n_replaced += 1
            if self._sequence_reason(x):
                self.n_unavoidable += 1
        elif self._budgets or self._trains:
            if self._trains:
                self._snap(x)  # residue, not a train (module notes)
            reason = self._sequence_reason(x)
            if reason:
                x = self._largest_safe(x)
                if self._trains:  # a tiny share of a spent window is residue too: zero (lowers every load)
                    self._snap(x)
                self.n_replaced += 1
                self.n_reduced += 1
            else:
                self.n_admitted += 1
        else:
            self.n_admitted += 1
        cand = np.array(x)
        self._commit(cand, x)
        self._handed = x if hand else None
        return cand, reason

    def take(self, u) -> bool:
        """Whether ``u`` is the input this gate admitted last with ``hand=True``, value for value, not taken before
        (one shot).

        A sender that shares this gate with the loop that admitted the input (the streaming bridge under the live
        runner) sends it on a True without a second check, which would record it twice; on False it admits it
        itself. Any other call in between (another :meth:`admit`, an earlier :meth:`take`) makes it False.
        """
        handed, self._handed = self._handed, None
        if handed is None:
            return False
        x = np.asarray(u, np.float64).reshape(-1).tolist()
        return x == handed

    def _check(self, x) -> str:
        """The first per-sample limit the list ``x`` breaks ('' for none); puts rounding-level excess exactly on the
        bound (in ``x``)."""
        if not all(map(math.isfinite, x)):
            return "not_finite"
        if not _onto(x, self._lo_l, self._hi_l):
            return "amplitude"
        if self._slew_l is not None:
            last = self.last_input.tolist()
            if not _onto(x, [a - s for a, s in zip(last, self._slew_l)], [a + s for a, s in zip(last, self._slew_l)]):
                return "slew"
            if not all(lo <= v <= hi for v, lo, hi in zip(x, self._lo_l, self._hi_l)):
                return "amplitude"  # the slew window moved it off the amplitude one
        return ""

    def _snap(self, x):
        for i, (v, tol) in enumerate(zip(x, self._zero_tol)):
            if v != 0.0 and abs(v) <= tol:
                x[i] = 0.0

    def _sequence_reason(self, x) -> str:
        """The first sequence limit the input ``x`` (a list) would break after what was delivered ('' for none)."""
        for v, t in zip(x, self._trains):
            why = t.breaks() if v != 0.0 else ""
            if why:
                return why
        return self._budget_reason(x)

    def _budget_reason(self, u, aim=False) -> str:
        """The first rolling budget the input ``u`` (a list or an array) and the fastest ramp to zero after it would
        break ('' for none)."""
        if not self._budgets:
            return ""
        x = [abs(v) for v in (u.tolist() if isinstance(u, np.ndarray) else u)]
        ramp = None if self._slew is None else self._ramp(np.array(x))
        for b in self._budgets:
            if not b.fits(x, ramp, aim):
                return b.name
        return ""

    def _ramp(self, x):
        """The fastest ramp to zero after magnitudes ``x`` (the safe fallback's magnitudes), or None without slew."""
        if self._slew is None:
            return None
        with np.errstate(invalid="ignore"):
            n = np.where(x > 0, np.ceil(x / self._slew), 0.0)
        n = int(min(np.max(n, initial=0.0), max(len(b.ring) for b in self._budgets)))
        steps = np.arange(1, n + 1, dtype=np.float64)[:, None]
        return np.maximum(x[None, :] - steps * self._slew[None, :], 0.0)

    def _largest_safe(self, x) -> list:
        """The largest safe input towards ``x`` (a list; module docstring), as a list; ``x`` meets the per-sample
        limits."""
        v = [0.0 if e != 0.0 and t.breaks() else e for e, t in zip(x, self._trains)] + list(x[len(self._trains):])
        if self._slew is None:  # the fallback is zero and α·v stays in the amplitude window: plain floats
            return self._scaled(v)
        v = np.array(v)
        f = self.safe_input()
        lo, hi = self._lo, self._hi
        if self._slew is not None:
            lo, hi = np.maximum(lo, self.last_input - self._slew), np.minimum(hi, self.last_input + self._slew)
        d = v - f

        def at(alpha):  # rounding of f + α d may leave the window by an ulp: clip it back
            return np.minimum(np.maximum(f + alpha * d, lo), hi)

        if not self._budget_reason(at(1.0), aim=True):
            return at(1.0).tolist()
        a, b = 0.0, 1.0
        for _ in range(_BISECT):
            mid = 0.5 * (a + b)
            a, b = (mid, b) if not self._budget_reason(at(mid), aim=True) else (a, mid)
        return at(a).tolist()

    def _scaled(self, vl):
        """``α v`` with the largest ``α`` that keeps every closing window within its aim (no slew limit; lists)."""
        x = [abs(t) for t in vl]
        top = largest_alpha(self._budgets, x)
        for t in (top, top * (1.0 - 1e-12), top * (1.0 - 1e-10)):  # the closed form may miss the aim by rounding
            if t <= 0.0:
                break
            xt = [t * e for e in x]
            if all(b.fits(xt, None, True) for b in self._budgets):
                return [t * e for e in vl]
        return [0.0] * len(vl)  # a window is full: the fallback

    def _commit(self, u, x):
        """Record the delivered input ``u`` (an array; ``x`` the same values as a list)."""
        self.last_input = u
        if self._budgets:
            mags = [abs(v) for v in x]
            for b in self._budgets:
                b.push(mags)
        for v, t in zip(x, self._trains):
            t.push(v != 0.0)

    @property
    def window_energy_ua2(self) -> float:
        """``Σ u²`` of the last ``energy_window_steps − 1`` delivered inputs, µA² (0 without a budget)."""
        b = [b for b in self._budgets if b.name == "energy_budget"]
        return math.fsum(b[0].ring) if b else 0.0


def _floats(u) -> list:
    """``u`` as a new flat list of floats (a list of numbers is copied without a round trip through numpy)."""
    if type(u) is list:
        try:
            return list(map(float, u))
        except (TypeError, ValueError):
            pass
    return np.array(u, dtype=np.float64).reshape(-1).tolist()


def _onto(x, lo, hi) -> bool:
    """True when ``lo <= x <= hi`` after putting rounding-level excess exactly on the bound (``x``: a list)."""
    for i, (v, a, b) in enumerate(zip(x, lo, hi)):
        if a <= v <= b:
            continue
        bound = a if v < a else b
        if not math.isfinite(bound) or abs(v - bound) > _ROUNDING * max(1.0, abs(bound)):
            return False
        x[i] = bound
    return True
