"""The energy budget of a plan over rolling windows that start in the applied past: :class:`_RollingBudget`.

With a budget ``E`` over windows of ``W`` samples, a plan ``u_0 … u_{N−1}`` made after the applied inputs
``u_{−W+1} … u_{−1}`` must keep ``Σ_{k=j−W+1..j} ‖u_k‖² <= E`` for every window ending at a plan step ``j``. With a
slew limit the plan cannot stop at once after its last step, so the windows that end during the ramp to zero after
it (the safe fallback of :meth:`~stimsteer.control.limits.StimLimits.safe_inputs`, ``|u_{N−1+t}| = max(|u_{N−1}| −
t·slew, 0)``) count too, for ``t = 1 … W−1`` (later windows hold only ramp steps, each smaller than ``u_{N−1}``, and
are dominated). They bind only when the window is longer than the horizon: for ``W <= N`` the slew limit already
keeps them below the windows inside the plan.

Recursive feasibility (why the closed loop never runs out of budget). If a plan meets these windows and its first
step is applied, the rest of it followed by the first ramp step meets every window of the next plan: the windows it
adds are the ramp windows of the previous plan. So a loop that starts inside the budget stays inside it, whatever
the plant does. The safe fallback is, at every step and for every input, the smallest magnitude any sequence
within the amplitude and slew limits can reach, so it has the least energy in every window at once: when it breaks
a window, no plan can meet it, and the plan says so (status ``"infeasible"``).

In the cvxpy problem the windows are linear in per-step energies ``e_k >= ‖u_k‖²`` and ramp energies
``r_t >= Σ_i max(|u_{N−1,i}| − t·slew_i, 0)²`` (convex), with the budget left by the applied past as a Parameter:
the problem stays DPP.

Units. These rows are written in inputs divided by a scale ``s = sqrt(E / W)`` (the amplitude whose energy in
every step of a window fills the budget; :meth:`_RollingBudget.unit_scale`), and energies divided by ``s²``.
cvxpy writes ``‖x‖² <= e`` as a second-order cone with a constant 1 beside ``e``, and the solver's tolerances are
absolute, so rows in raw units make a different cone problem for the same session in mA and in µA (in µA the
energies are 10⁶ times larger, and the solver stopped 0.0065 µA past an amplitude bound). In units of ``s`` the
cone problem is the same in any unit and the per-step energies are of order one (the largest amplitude bound as
``s`` left them ~1e-3 for tight budgets, and the solver then broke the budget by 2e-4 of it). The checks
(:meth:`excess`, :meth:`blend`) stay in the raw units and exact.

Weighted loads. A budget in physical units (:class:`~stimsteer.control.sequence_limits.WindowBudget`) replaces
``‖u_k‖²`` by the load ``ℓ_k = Σ_i (a_i |u_ik| + b_i u_ik²)``: the charge per phase is linear in the amplitude, so its
window rows are linear and exact (no Cauchy–Schwarz step), the Joule energy quadratic. Every argument above holds for
any load that grows with ``|u|`` (the ramp windows, the least-load fallback, recursive feasibility). Its rows are
written as ``ℓ_k · W / E`` (the load that fills the budget when every step of a window carries it is 1): the same
in any unit of ``u``, since ``a`` and ``b`` carry the unit.
"""

from __future__ import annotations

from bisect import bisect_right

import numpy as np

from ...sysid import SessionError
from .._energy_windows import check_window
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__: list = []


class _RollingBudget:
    """Window matrices and checks of an energy budget over rolling windows, for a plan of ``N`` steps."""

    _memo = _past = None  # energies(): the last answer, and the applied past's part of the windows (a read-only past)

    def __init__(self, budget: float, window: int, horizon_steps: int, slew, *, linear=None, quadratic=None,
                 name: str = "energy_budget", unit: str = "uA^2"):
        self.budget, self.window, self.N = float(budget), check_window(window), int(horizon_steps)
        # None, None: the per-sample layout's Σ u² (its cone rows unchanged); else the weighted load ℓ_k
        self.weighted = linear is not None or quadratic is not None
        self.a = None if linear is None else np.asarray(linear, np.float64)
        self.b = None if quadratic is None else np.asarray(quadratic, np.float64)
        self.name, self.unit = name, unit
        W, N = self.window, self.N
        self.fin = np.zeros(0, bool) if slew is None else np.isfinite(slew)
        self.slew = None if slew is None else np.asarray(slew, np.float64)
        n_tail = W - 1 if self.fin.any() else 0
        # the sequence [history (W−1) | plan (N) | ramp (n_tail)]; one row per window ending in the plan or ramp
        n_seq = W - 1 + N + n_tail
        rows = np.zeros((N + n_tail, n_seq))
        for r, end in enumerate(range(W - 1, n_seq)):
            rows[r, end - W + 1:end + 1] = 1.0
        self.Mh, self.Mp, self.Mr = rows[:, :W - 1], rows[:, W - 1:W - 1 + N], rows[:, W - 1 + N:]
        self.n_tail = n_tail
        # t·slew of the ramp's steps t = 1 … n_tail (the same for every plan: computed once, not per evaluation)
        self._ramp_drop = (np.arange(1, n_tail + 1)[:, None] * self.slew[self.fin][None, :]) if n_tail else None
        self._fin_idx = np.flatnonzero(self.fin)  # the same entries as the mask, one gather instead of a mask pass
        self._no_ramp = np.zeros(N)  # Mr @ (no ramp energies): the ramp's part of every window without a ramp

    # ------------------------------------------------------------------------------------ numbers
    def history(self, u_past) -> np.ndarray:
        """Per-step energies of the last ``W − 1`` applied samples (rest before a shorter past), shape (W − 1,)."""
        h = np.asarray(u_past, np.float64)[max(0, len(u_past) - (self.window - 1)):]
        if not np.isfinite(h).all():
            raise SessionError(f"u_past holds NaN or infinite values in its last {self.window - 1} samples, which "
                               "count in the energy budget's window; plan from a clean stretch of data.")
        e = self.loads(h) if h.size else np.zeros(0)
        out = np.concatenate([np.zeros(self.window - 1 - e.size), e])
        out.flags.writeable = False  # a plan's past, read by every check of it (energies() keeps Mh @ it)
        return out

    def loads(self, u) -> np.ndarray:
        """The load of each row of ``u`` (n, m): ``Σ u²``, or ``Σ a|u| + b u²`` for a weighted budget."""
        u = np.asarray(u, np.float64)
        if not self.weighted:
            return np.add.reduce(u * u, axis=1)  # np.sum(u**2, axis=1) without its wrappers: the same reduction
        m = u.shape[1]
        a = np.zeros(m) if self.a is None else self.a
        b = np.zeros(m) if self.b is None else self.b
        return np.abs(u) @ a + (u**2) @ b

    def ramp_energies(self, last) -> np.ndarray:
        """``r_t`` of the ramp to zero after a plan ending at ``last``, t = 1 … n_tail."""
        if not self.n_tail:
            return np.zeros(0)
        a = np.abs(np.asarray(last, np.float64)[self._fin_idx])
        r = np.maximum(a - self._ramp_drop, 0.0)
        if not self.weighted:
            return np.add.reduce(r * r, axis=1)
        full = np.zeros((r.shape[0], self.fin.size))
        full[:, self.fin] = r
        return np.array([float(self.loads(row[None, :])[0]) for row in full])

    def energies(self, u, hist, past=None) -> np.ndarray:
        """Energy of every constrained window for the plan ``u`` (N, m) after the past energies ``hist``
        (``past``: ``Mh @ hist`` when the caller has it, e.g. across the evaluations of one bisection)."""
        u = np.asarray(u, np.float64).reshape(self.N, -1)
        if past is not None:
            return past + self.Mp @ self.loads(u) + self._ramp_part(u)
        # a plan checks the same inputs against the same past several times (solver answer, projection, guard,
        # report): the last answer is kept, read-only, and given again for equal inputs and past; ``Mh @ hist`` is
        # kept with the array it was computed for (held, so its identity stays its own: a plan's history array is
        # made once per plan and never written), the same product for every inputs checked against that past
        key = u.tobytes()
        fixed = isinstance(hist, np.ndarray) and not hist.flags.writeable and hist.base is None  # history()'s
        memo = self._memo
        if memo is not None and memo[0] == key and ((fixed and memo[1] is hist) or memo[2] == _bytes(hist)):
            return memo[3]
        kept = self._past
        if kept is None or not fixed or kept[0] is not hist:
            kept = (hist, self.Mh @ hist)
            self._past = kept if fixed else None
        out = kept[1] + self.Mp @ self.loads(u) + self._ramp_part(u)
        out.flags.writeable = False
        self._memo = (key, hist, None if fixed else _bytes(hist), out)
        return out

    def _ramp_part(self, u):
        """``Mr @ ramp_energies(u[-1])``: the ramp's part of every window (zeros, exactly, without a ramp)."""
        return self.Mr @ self.ramp_energies(u[-1]) if self.n_tail else self._no_ramp

    def excess(self, u, hist) -> float:
        """How far the largest window exceeds the budget, in its unit (negative: inside)."""
        return float(self.energies(u, hist).max() - self.budget)

    def relative_excess(self, u, hist) -> float:
        """:meth:`excess` as a fraction of the budget."""
        return self.excess(u, hist) / self.budget

    def blend(self, u, safe, hist):
        """``α u + (1 − α) safe`` with the largest α in [0, 1] inside every window (``safe`` must be inside).

        Every window energy is convex in α, so the α inside the budget form an interval from 0: bisection.
        """
        cap = self.budget * (1.0 - 1e-10)
        if np.max(self.energies(u, hist)) <= cap:
            return u
        lo, hi = 0.0, 1.0
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            if np.max(self.energies(mid * u + (1.0 - mid) * safe, hist)) <= cap:
                lo = mid
            else:
                hi = mid
        return lo * u + (1.0 - lo) * safe

    # ------------------------------------------------------------------------------------ cvxpy
    def unit_scale(self) -> float:
        """The input scale of the cone rows: the amplitude whose energy in every step of a window fills the budget."""
        return float(np.sqrt(self.budget / self.window)) if self.budget > 0 else 1.0

    def constraints(self, u, m: int, scale: float = 1.0) -> list:
        """The window constraints on the stacked inputs ``u`` (N·m,) in units of ``scale`` (energies in units of
        ``scale²``, see the module notes); sets ``self.left``, the budget Parameter."""
        if self.weighted:
            return self._weighted_constraints(u, m, scale)
        N, s = self.N, float(scale)
        self.row_scale = s
        self.left = cp.Parameter(self.Mp.shape[0], name="energy_budget_left_scaled")
        e = cp.Variable(N, nonneg=True, name="step_energy_scaled")
        U = cp.reshape(u, (N, m), order="C") / s
        cons = [cp.sum(cp.square(U), axis=1) <= e]
        lhs = self.Mp @ e
        if self.n_tail:
            r = cp.Variable(self.n_tail, nonneg=True, name="ramp_energy_scaled")
            a = cp.abs(U[N - 1, :])
            idx = np.flatnonzero(self.fin)
            cons += [cp.sum(cp.square(cp.pos(a[idx] - t * self.slew[idx] / s))) <= r[t - 1]
                     for t in range(1, self.n_tail + 1)]
            lhs = lhs + self.Mr @ r
        cons.append(lhs <= self.left)
        return cons

    def _weighted_constraints(self, u, m: int, scale: float) -> list:
        """The rows of a weighted load, in units of ``E / W`` per step, on the inputs in units of ``scale`` (the
        controller's amplitude scale: the epigraph of ``|u|`` is then of order one in any unit; module notes)."""
        N, norm, s = self.N, self.window / self.budget, float(scale)
        self.row_scale = float(np.sqrt(1.0 / norm))
        self.left = cp.Parameter(self.Mp.shape[0], name=f"{self.name}_left_scaled")
        e = cp.Variable(N, nonneg=True, name=f"{self.name}_step_load_scaled")
        U = cp.reshape(u, (N, m), order="C") / s
        a = np.zeros(m) if self.a is None else self.a * norm * s
        b = np.zeros(m) if self.b is None else self.b * norm * s**2

        def load(x, idx):  # x: a (rows, len(idx)) expression of magnitudes or signed inputs
            terms = []
            if np.any(b[idx] > 0):
                terms.append(cp.sum(cp.square(cp.multiply(x, np.sqrt(b[idx])[None, :])), axis=1))
            if np.any(a[idx] > 0):
                terms.append(cp.abs(x) @ a[idx])
            return sum(terms[1:], terms[0]) if terms else 0

        everything = np.arange(m)
        cons = [load(U, everything) <= e]
        lhs = self.Mp @ e
        if self.n_tail:
            r = cp.Variable(self.n_tail, nonneg=True, name=f"{self.name}_ramp_load_scaled")
            idx = np.flatnonzero(self.fin)
            mag = cp.abs(U[N - 1, :])
            cons += [load(cp.reshape(cp.pos(mag[idx] - t * self.slew[idx] / s), (1, idx.size), order="C"), idx)
                     <= r[t - 1] for t in range(1, self.n_tail + 1)]
            lhs = lhs + self.Mr @ r
        cons.append(lhs <= self.left)
        return cons

    def assign(self, hist) -> None:
        """The budget left in each window by the applied past (in units of the rows' ``scale²``)."""
        self.left.value = (self.budget - self.Mh @ hist) / getattr(self, "row_scale", 1.0) ** 2


def _bytes(a) -> bytes:
    return np.asarray(a, np.float64).tobytes()


def blend_all(budgets, hists, u, safe):
    """``α u + (1 − α) safe`` with the largest α in [0, 1] inside every window of every budget (``safe`` inside).

    Every window load is convex in α, so the α inside all budgets form an interval from 0: bisection. Each step's
    test is the test of the loads computed at ``mid·u + (1 − mid)·safe`` (the same numbers, the same decisions, the
    same answer to the last bit), except where convexity decides it beforehand with room to spare
    (:class:`_Bisection`): then the loads are not computed.
    """
    pasts = [b.Mh @ h for b, h in zip(budgets, hists)]  # the applied past's part of every window: once
    caps = [b.budget * (1.0 - 1e-10) for b in budgets]
    items = list(zip(budgets, hists, pasts))

    def loads(x):
        return [b.energies(x, h, p) for b, h, p in items]

    top = loads(u)
    if _inside(top, caps):
        return u
    known = _Bisection(budgets, caps, loads(safe), top)
    lo, hi = 0.0, 1.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if mid == lo or mid == hi:  # at rounding level: every further step re-tests lo or hi and changes nothing
            break
        verdict = known.verdict(mid)
        if verdict is None:
            top = [e.max() for e in loads(mid * u + (1.0 - mid) * safe)]  # each budget's largest window, once
            verdict = all(t <= cap for t, cap in zip(top, caps))  # (NaN: not inside, as _inside)
            known.add(mid, top, maxima=True)
        if verdict:
            lo = mid
        else:
            hi = mid
    return lo * u + (1.0 - lo) * safe


def _inside(loads, caps) -> bool:
    for e, cap in zip(loads, caps):
        if not e.max() <= cap:  # (NaN: not inside, as before)
            return False
    return True


class _Bisection:
    """What convexity says of the blend's test at α before its loads are computed: inside, outside, or unknown.

    For each budget, the largest window load ``m(α)`` (a maximum of convex functions of α, so convex) is bounded
    above between two evaluated points by their chord, and below beyond two evaluated points by their secant
    extended. A bound decides the test only when it clears the cap by :attr:`margin`, far more than the rounding of
    the loads as computed (a sum of ``n`` non-negative terms, each exact to a few units in the last place, is within
    ``n`` units of the last place of its value relative to it; the blended inputs add four): the computed loads would
    give the same verdict. Close to the crossing the loads are computed, as in the plain bisection.
    """

    def __init__(self, budgets, caps, bottom, top):
        eps = np.finfo(np.float64).eps
        self.caps = caps
        # per budget: the load's magnitude (no window exceeds the larger end on the segment) times the rounding
        self.margin = [16.0 * (b.N + b.n_tail + b.window + 8) * max(1, b.fin.size) * eps
                       * (cap + max(float(np.max(lo)), float(np.max(hi)), 0.0))
                       for b, cap, lo, hi in zip(budgets, caps, bottom, top)]
        self.alphas = [0.0, 1.0]
        self.maxima = [[float(np.max(e)) for e in bottom], [float(np.max(e)) for e in top]]

    def add(self, alpha, loads, maxima=False):
        """The loads at ``alpha`` (``maxima``: their largest windows, one per budget, already taken)."""
        i = bisect_right(self.alphas, alpha)  # the first evaluated α above this one
        self.alphas.insert(i, alpha)
        self.maxima.insert(i, [float(e) if maxima else float(np.max(e)) for e in loads])

    def verdict(self, mid):
        """True (inside every budget), False (outside one) or None (compute the loads)."""
        al, mx = self.alphas, self.maxima
        i = bisect_right(al, mid)  # al[i − 1] < mid < al[i] (the first α above mid: al is sorted)
        a, b = al[i - 1], al[i]
        t = (mid - a) / (b - a)
        inside = True
        for k, (cap, margin) in enumerate(zip(self.caps, self.margin)):
            ma, mb = mx[i - 1][k], mx[i][k]
            if not (ma + t * (mb - ma) + margin <= cap):  # the chord: m(mid) at most this
                inside = False
            if i >= 2:  # the secant of the two points to the left, extended: m(mid) at least this (its rounding
                a2, m2 = al[i - 2], mx[i - 2][k]  # grows with the extension: the margin with it)
                r = (mid - a) / (a - a2)
                if ma + r * (ma - m2) - margin * (1.0 + 2.0 * r) > cap:
                    return False
            if i + 1 < len(al):  # the same from the right
                b2, m2 = al[i + 1], mx[i + 1][k]
                r = (b - mid) / (b2 - b)
                if mb - r * (m2 - mb) - margin * (1.0 + 2.0 * r) > cap:
                    return False
        return True if inside else None
