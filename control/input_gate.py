"""The last check before a stimulation input leaves: :class:`InputGate`.

Every input that a live loop or the streaming bridge delivers passes through a gate at the moment it leaves. The
gate checks the hard limits of a :class:`~stimsteer.control.limits.StimLimits` against what was *actually
delivered* before, not against what a plan assumed:

* amplitude: ``lo_i <= u_i <= hi_i`` (declared bounds ∩ the charge-density bound), exactly;
* slew: ``|u_i − u_i,prev| <= slew_i`` from the last delivered input, exactly;
* energy: ``Σ u²`` over the rolling window of the last ``energy_window_steps`` delivered inputs (this one
  included) ``<= energy_budget_ua2``, exactly.

An input that misses a bound by rounding only (at most ``1e-9`` relative, the tolerance the controllers verify
their plans with) is put exactly on the bound; any other input that breaks a limit, or holds NaN, is replaced by
the safe fallback of :meth:`StimLimits.safe_inputs` (towards zero as fast as the slew limit allows).

Under a slew limit an input can fit its own energy window and still leave the ramp down too slow for the windows
after it. So the gate admits an input only when it *and the fastest ramp to zero after it* keep every window
within the budget; then the safe fallback (the first step of that ramp) always fits in turn, and a run that starts
at rest never has to break the budget. ``n_unavoidable`` counts fallbacks that broke it anyway (only possible when
the gate is started from a state that is not at rest and was not checked, which the constructor refuses).

Decisions
    * The energy budget is declared "over one planning horizon" (:mod:`stimsteer.control.limits`); for delivered
      inputs the horizon becomes a rolling window of as many samples (the runner passes the controller's horizon).
    * The gate never raises on a bad input: a live loop must always have something safe to deliver.
"""

from __future__ import annotations

import math

import numpy as np

from ..sysid import InvalidParameterError, LimitsError

__all__ = ["InputGate"]

_ROUNDING = 1e-9  # relative; the same allowance as StimLimits.violations and the controllers' verification


class InputGate:
    """Checks each delivered input against the hard limits and keeps the record the checks need.

    Parameters
    ----------
    limits : StimLimits
    energy_window_steps : int, optional
        Rolling window of the energy budget, samples; required when the limits have a budget.
    last_input : ndarray, shape (n_inputs,), optional
        The input delivered before the first one through this gate, µA; default zero (rest).

    Attributes
    ----------
    last_input : ndarray, shape (n_inputs,)
        The last delivered input, µA.
    n_admitted, n_replaced, n_unavoidable : int
        Inputs delivered as given (or put on a bound by rounding only), replaced by the safe fallback, and safe
        fallbacks that still broke the energy window because no input could meet it.
    """

    def __init__(self, limits, *, energy_window_steps=None, last_input=None):
        m = limits.n_inputs
        self.limits = limits
        self._lo, self._hi = limits.input_bounds()
        self._slew = None if limits.slew_max_ua is None else np.asarray(limits.slew_max_ua, np.float64)
        self._lo_l, self._hi_l = self._lo.tolist(), self._hi.tolist()
        self._slew_l = None if self._slew is None else self._slew.tolist()
        self._budget = limits.energy_budget_ua2
        if limits.has_sequence_limits:
            raise InvalidParameterError("these limits declare window budgets or train limits in physical terms, which "
                                        "the live gate does not check yet; plan with them (stimsteer plan), or run "
                                        "the live loop under the per-sample limits layout.")
        if self._budget is not None:
            w = energy_window_steps
            if isinstance(w, bool) or not isinstance(w, (int, np.integer)) or w < 1:
                raise InvalidParameterError(
                    f"the limits have an energy budget, so the gate needs energy_window_steps (a whole number of "
                    f"samples >= 1, usually the controller's horizon); got {w!r}.")
            self._sq = np.zeros(int(w) - 1)  # squared norms of the previous w − 1 delivered inputs (ring)
        self._pos = 0
        last = np.zeros(m) if last_input is None else np.asarray(last_input, np.float64).reshape(-1)
        if last.shape != (m,) or not np.all(np.isfinite(last)):
            raise InvalidParameterError(f"last_input must hold {m} finite values (µA); got {last_input!r}.")
        if limits.violations(last)["amplitude"]:
            raise LimitsError(f"the input delivered before the gate, {last.tolist()} µA, lies outside the amplitude "
                              f"window [{self._lo.tolist()}, {self._hi.tolist()}] µA; start from rest (zeros).")
        self.last_input = last.copy()
        if self._budget is not None and not self._viable(last):
            raise LimitsError(f"from the input delivered before the gate, {last.tolist()} µA, even the fastest ramp "
                              f"to zero breaks the energy budget {self._budget:g} µA² over {energy_window_steps} "
                              "samples; start from rest (zeros) or declare consistent limits.")
        self.n_admitted = self.n_replaced = self.n_unavoidable = 0

    def safe_input(self) -> np.ndarray:
        """The safe fallback's next sample from the last delivered input, µA."""
        return self.limits.safe_inputs(1, self.last_input)[0]

    def admit(self, u) -> tuple[np.ndarray, str]:
        """Deliver ``u`` if it meets every hard limit, else the safe fallback; record what was delivered.

        Parameters
        ----------
        u : ndarray, shape (n_inputs,)
            The candidate input, µA.

        Returns
        -------
        delivered : ndarray, shape (n_inputs,)
            The input that leaves, µA (a new array).
        reason : str
            ``""`` when ``u`` was delivered, else the limit it broke (``"not_finite"``, ``"amplitude"``, ``"slew"``,
            ``"energy_budget"``).
        """
        cand = np.array(u, dtype=np.float64).reshape(-1)
        reason = self._check(cand) if cand.shape == self.last_input.shape else "amplitude"
        if reason:
            cand = self.safe_input()
            self.n_replaced += 1
            if self._check(cand) == "energy_budget":
                self.n_unavoidable += 1
        else:
            self.n_admitted += 1
        self._commit(cand)
        return cand, reason

    def _check(self, u) -> str:
        """The first hard limit ``u`` breaks ('' for none); puts rounding-level excess exactly on the bound.

        Plain Python floats: for a handful of inputs this is several times faster than numpy calls, and a live
        loop at 10 kHz has 100 µs for everything.
        """
        x = u.tolist()
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
        u[:] = x
        if self._budget is not None and not self._viable(u):
            return "energy_budget"
        return ""

    def _viable(self, u) -> bool:
        """True when ``u`` and then the fastest ramp to zero keep every energy window within the budget.

        Checking ``u``'s own window is not enough under a slew limit: an input can fit its window yet leave the
        ramp down too slow for the next ones. Admitting only inputs whose ramp fits means the safe fallback (the
        first step of that ramp) always fits in turn, so a run that starts at rest never has to break the budget.
        """
        hist = np.roll(self._sq, -self._pos)  # oldest first
        e_u = float(u @ u)
        if self._slew is None or not hist.size:
            return float(np.sum(hist)) + e_u <= self._budget
        steps = np.arange(1, hist.size + 1)[:, None]
        ramp = np.maximum(np.abs(u)[None, :] - steps * self._slew[None, :], 0.0)
        e_ramp = np.sum(ramp * ramp, axis=1)
        if float(np.sum(hist)) + e_u + float(np.sum(e_ramp)) <= self._budget:  # bounds every window at once
            return True
        c = np.concatenate([[0.0], np.cumsum(np.concatenate([hist, [e_u], e_ramp]))])
        w = hist.size + 1
        return bool(np.all(c[w:] - c[:-w] <= self._budget))  # every window that holds u or its ramp

    def _commit(self, u):
        self.last_input = u
        if self._budget is not None and self._sq.size:
            self._sq[self._pos] = float(u @ u)
            self._pos = (self._pos + 1) % self._sq.size

    @property
    def window_energy_ua2(self) -> float:
        """``Σ u²`` of the last ``energy_window_steps − 1`` delivered inputs, µA² (0 without a budget)."""
        return 0.0 if self._budget is None else float(np.sum(self._sq))


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
