"""The limit work of every plan, fused: step bounds, the safe fallback, the check and projection of a solver's answer,
and the plan's reports of binding and broken limits (:class:`_PlanLimits`).

What stays the same. Every check of :meth:`~._core._PredictiveController._project` is made as before, with the same
arithmetic and the same tolerances: the solver's answer against the step bounds, the slew limit and every budget
window; the clip onto the step bounds and the slew windows; the blend towards the safe fallback inside every budget;
and the final count of :meth:`StimLimits.violations` (amplitude, slew with its 1e-9 allowance, the energy budget's
windows, the sequence limits), so a plan is returned only when none of them finds a violation.

What is no longer repeated. The per-controller constants (the tiled amplitude window, the slew allowance, the
thresholds of the limit reports) are computed once at fit, not per plan; the window energies of the returned inputs
are computed once per plan and read by the blend's test, the check after it, the plan's largest window and its
reports of binding and broken limits, where each used to compute them again.
"""

from __future__ import annotations

import numpy as np

from ..sequence_limits import count_violations, legacy_energy_violations, safe_sequence
from ._budget import blend_all
from .plan import _ro

__all__: list = []

# An answer that breaks a hard bound by more than this (relative to the bound scale) is a failed solve.
_ACCEPT_RTOL = 1e-5
_ZERO_RTOL = 1e-6  # under window budgets or train limits, |u| at most this fraction of its bound is residue: 0
_VIOLATION_RTOL = 1e-9  # StimLimits.violations' default allowance for rounding in slew steps and energy sums


class _PlanLimits:
    """A controller's limit constants, computed once at fit, and the per-plan limit work that uses them."""

    def __init__(self, ctrl):
        N, lo, hi, slew = ctrl.horizon_steps_, ctrl._lo, ctrl._hi, ctrl._slew
        self.lo, self.hi, self.slew, self.N = lo, hi, slew, N
        self.lb, self.ub = np.tile(lo, (N, 1)), np.tile(hi, (N, 1))
        self.fin = None if slew is None else np.isfinite(slew)
        self.all_fin = slew is not None and bool(np.all(self.fin))
        # the safe fallback's drop by step k + 1, as safe_sequence computes it (integer steps times the slew limit)
        self.drop = (np.arange(N)[:, None] + np.ones(lo.size, np.int64)[None, :]) * slew if self.all_fin else None
        # StimLimits.violations' slew allowance: relative to the limit, so it means the same in any unit
        self.allowed = None if slew is None else np.where(self.fin, slew * (1.0 + _VIOLATION_RTOL), np.inf)
        self.zero = (_ZERO_RTOL * np.maximum(np.abs(lo), np.abs(hi))
                     if ctrl.limits_.has_sequence_limits and slew is None else None)
        tol = 1e-6 * ctrl._scale  # the limit reports' tolerance (bound scale)
        self.lo_tol, self.hi_tol = lo + tol, hi - tol
        self.lo_neg, self.hi_pos = lo < 0, hi > 0
        self.slew_tol = None if slew is None else slew - tol
        charge_lo, charge_hi = ctrl._charge_sides
        self.charge_lo, self.charge_hi, self.amp_lo, self.amp_hi = charge_lo, charge_hi, ~charge_lo, ~charge_hi
        self.no_charge = not (charge_lo.any() or charge_hi.any())  # every side an amplitude bound (the masks: no-ops)
        self.energy_window = ctrl.energy_window_steps_
        self.energy = ctrl._energy
        self.sequence = ctrl.limits_.has_sequence_limits
        lim = ctrl.limits_  # Plan.output_bounds: read-only copies, made once and shared by the plans (never written)
        self.output_bounds = None if lim.output_min is None else (_ro(lim.output_min), _ro(lim.output_max))

    # ------------------------------------------------------------------------------------ before the solve
    def step_bounds(self, last):
        """As :meth:`~._core._PredictiveController._step_bounds` (the amplitude window tiled once, copied here)."""
        lb, ub = self.lb.copy(), self.ub.copy()
        if self.slew is None:
            return lb, ub, np.zeros(self.lo.size, bool)
        lo0, hi0 = np.maximum(lb[0], last - self.slew), np.minimum(ub[0], last + self.slew)
        broken = lo0 > hi0
        if broken.any():
            lb[0], ub[0] = np.where(broken, lb[0], lo0), np.where(broken, ub[0], hi0)
        else:  # (np.where with nothing broken: lo0 and hi0 themselves)
            lb[0], ub[0] = lo0, hi0
        return lb, ub, broken

    def fallback(self, last):
        """:meth:`StimLimits.safe_inputs` over the horizon from ``last``: the same numbers.

        With a finite slew limit on every input and ``last`` inside reach of the amplitude window (every plan of a
        loop), :func:`~stimsteer.control.sequence_limits.safe_sequence`'s ramp is ``|last| − (k + 1)·slew`` at step
        k, with the products ``(k + 1)·slew`` computed once here.
        """
        if self.drop is None or ((last - self.slew > self.hi) | (last + self.slew < self.lo)).any():
            return safe_sequence(self.lo, self.hi, self.slew, self.N, last)
        return (np.sign(last) * np.maximum(np.abs(last) - self.drop, 0.0)).clip(self.lo, self.hi)

    # ------------------------------------------------------------------------------------ after the solve
    @staticmethod
    def slew_steps(u, last):
        """``|u_k − u_{k−1}|`` for every step, the first from ``last``, shape (N, m)."""
        seq = np.empty((u.shape[0] + 1, u.shape[1]))
        seq[0], seq[1:] = last, u
        return np.abs(seq[1:] - seq[:-1])

    def _final_steps(self, u, last):
        """:meth:`slew_steps` of the returned inputs: computed by the final check, read again by the report of
        binding limits (the same arrays of the same plan)."""
        kept = getattr(self, "_steps", None)
        if kept is not None and kept[0] is u and kept[1] is last:
            return kept[2]
        steps = self.slew_steps(u, last)
        self._steps = (u, last, steps)
        return steps

    def project(self, ctrl, u, lb, ub, last, fallback):
        """:meth:`~._core._PredictiveController._project`: accept, clip, blend into every budget, verify."""
        tol = _ACCEPT_RTOL * ctrl._scale
        self._steps = None
        excess = max(float((lb - u).max()), float((u - ub).max()), 0.0)
        if self.slew is not None:
            d = self.slew_steps(u, last) - self.slew
            excess = max(excess, float((d if self.all_fin else d[:, self.fin]).max(initial=0.0)))
        if ctrl._budgets:
            # relative to the budget (a sum over the window), in the amplitude scale of the tolerance
            excess = max(excess, ctrl._budget_excess(u) * ctrl._scale)
        if not np.isfinite(u).all() or excess > tol:
            return None, f"the solver's answer breaks a hard limit by {excess:.3g} (tolerance {tol:.3g})"
        u = u.clip(lb, ub)
        if self.zero is not None:
            # solver residue near zero stimulation (interior points never reach 0) would count as a train on and
            # as a pulse; below 1e-6 of an input's bound it is delivered as zero, which lowers every load
            u = np.where(np.abs(u) <= self.zero, 0.0, u)
        if self.slew is not None and (np.abs(u[1:] - u[:-1]) > self.slew).any():
            u = self._slew_clip(u, lb, ub)
        if ctrl._budgets:
            loads = self.energies(ctrl, u)
            if not all(e.max() <= b.budget * (1.0 - 1e-10) for b, e in zip(ctrl._budgets, loads)):
                u = blend_all(ctrl._budgets, ctrl._hists, u, fallback)  # (its own first test repeats the one above)
                loads = self.energies(ctrl, u)
            if self.relative(ctrl, loads) > 1e-9:
                return None, "internal check failed after projection: an energy budget window is over budget"
        bad = self.violations(ctrl, u, last)
        if bad:  # cannot happen after the clip above; never return such a plan
            return None, f"internal check failed after projection: {bad}"
        return u, ""

    def _slew_clip(self, u, lb, ub):
        """Clip onto each step's slew window around the clipped previous step, from the first step outside it."""
        moves = np.any((u[1:] > np.minimum(ub[1:], u[:-1] + self.slew))
                       | (u[1:] < np.maximum(lb[1:], u[:-1] - self.slew)), axis=1)
        first = int(np.argmax(moves)) + 1 if moves.any() else u.shape[0]
        if first == u.shape[0]:
            return u
        # the same sequential clip in plain floats (a few inputs per step: numpy's per-call cost dominated), with
        # numpy's own comparisons: maximum(a, b) = a if a >= b else b, minimum(a, b) = a if a <= b else b,
        # clip(x, a, b) = min(max(x, a), b) with max(x, a) = x if x > a else a and min(y, b) = y if y < b else b
        rows, lbs, ubs, slew = u[first:].tolist(), lb[first:].tolist(), ub[first:].tolist(), self.slew.tolist()
        prev = u[first - 1].tolist()
        for row, lo_k, hi_k in zip(rows, lbs, ubs):
            for i, (x, s) in enumerate(zip(row, slew)):
                a, b = prev[i] - s, prev[i] + s
                a = lo_k[i] if lo_k[i] >= a else a
                b = hi_k[i] if hi_k[i] <= b else b
                x = x if x > a else a
                row[i] = x if x < b else b
            prev = row
        u[first:] = rows
        return u

    def violations(self, ctrl, u, last) -> dict:
        """The nonzero counts of :meth:`StimLimits.violations` for the plan ``u`` after ``last`` (its energy windows
        of ``energy_window_steps_``, the applied past as the sequence limits' history): the same tests."""
        out = {"amplitude": int(np.count_nonzero((u < self.lo) | (u > self.hi) | ~np.isfinite(u)))}
        if self.slew is not None:
            out["slew"] = int(np.count_nonzero(self._final_steps(u, last) > self.allowed))
        if self.energy is not None:
            out["energy_budget"] = legacy_energy_violations(u, self.energy, _VIOLATION_RTOL, self.energy_window)
        if self.sequence:
            out.update(count_violations(ctrl.limits_, u, ctrl._u_all))
        return {k: v for k, v in out.items() if v}

    # ------------------------------------------------------------------------------------ window loads
    def energies(self, ctrl, u):
        """The window loads of ``u`` for every budget of ``ctrl`` (one array each), kept for the plan's reports."""
        out = [b.energies(u, h) for b, h in zip(ctrl._budgets, ctrl._hists)]
        self._energies = (u, out)
        return out

    def energies_of(self, ctrl, u):
        """The window loads of ``u``: those computed for this very array in this plan, else computed now."""
        kept = getattr(self, "_energies", None)
        if kept is not None and kept[0] is u:
            return kept[1]
        return self.energies(ctrl, u)

    @staticmethod
    def relative(ctrl, loads) -> float:
        """The largest window load over its budget as a fraction of it, over every budget (``_budget_excess``)."""
        return max(((float(e.max()) - b.budget) / b.budget for b, e in zip(ctrl._budgets, loads)),
                   default=-np.inf)

    # ------------------------------------------------------------------------------------ the plan's reports
    def active(self, ctrl, u, y, last, loads=None):
        """The binding limits of ``u`` and the outputs at or beyond their soft bounds (``Plan.active_limits``);
        ``loads``: the window loads of ``u`` when the caller has them."""
        at_lo = (u <= self.lo_tol) & self.lo_neg
        at_hi = (u >= self.hi_tol) & self.hi_pos
        if self.no_charge:  # (& with all-true masks, | of all-false ones: the same arrays)
            act = {"amplitude_min": at_lo, "amplitude_max": at_hi, "charge_density": np.zeros(u.shape, bool)}
        else:
            act = {"amplitude_min": at_lo & self.amp_lo, "amplitude_max": at_hi & self.amp_hi,
                   "charge_density": (at_lo & self.charge_lo) | (at_hi & self.charge_hi)}
        if self.slew is not None:
            act["slew"] = self.fin & (self._final_steps(u, last) >= self.slew_tol)
        else:
            act["slew"] = np.zeros_like(u, dtype=bool)
        if ctrl._budgets:
            act["energy_budget"] = self.relative(ctrl, self.energies_of(ctrl, u) if loads is None else loads) >= -1e-6
        else:
            act["energy_budget"] = False
        yv = y.reshape(-1)
        ytol = 1e-6 * max(1.0, float(np.abs(yv).max(initial=0)))
        act["output_bounds"] = ((yv >= ctrl._ymax - ytol) | (yv <= ctrl._ymin + ytol)).reshape(y.shape)
        return act

    def broken(self, ctrl, u, last, broken):
        """Readable lines naming each hard limit ``u`` breaks (only when no sequence can meet them)."""
        return self.broken_later(ctrl, last, broken, self.energies_of(ctrl, u) if ctrl._budgets else None)()

    def broken_later(self, ctrl, last, broken, loads):
        """:meth:`broken` as a function of what it reads, captured now (``last``, ``broken`` and ``loads`` must not
        change afterwards: the plan's own arrays), for a plan field computed at its first read."""
        names, lo, hi, slew = ctrl.input_names_, self.lo, self.hi, self.slew
        budgets, main, energy, window = list(ctrl._budgets), ctrl._budget, ctrl._energy, ctrl.energy_window_steps_

        def lines():
            out = [f"slew on {names[i]} at step 0: the last input {last[i]:g} µA lies more than {slew[i]:g} µA "
                   f"outside the amplitude window [{lo[i]:g}, {hi[i]:g}] µA" for i in np.flatnonzero(broken)]
            if not budgets:
                return tuple(out)
            for b, e in zip(budgets, loads):
                over = float(np.max(e)) - b.budget
                if b is main and over > 1e-9 * energy:
                    out.append(f"energy_budget: a window of {window} samples holds {over + energy:.4g} µA² > "
                               f"{energy:g} µA²")
                elif b.weighted and over / b.budget > 1e-9:
                    out.append(f"{b.name}: a window of {b.window} samples holds {over + b.budget:.4g} {b.unit} > "
                               f"{b.budget:.4g} {b.unit}")
            return tuple(out)

        return lines
