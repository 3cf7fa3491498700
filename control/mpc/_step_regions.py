"""Exact answers of the fast step's QP on known active sets, and their maps built piece by piece between samples.

The QP of :class:`~stimsteer.control.mpc.fast_step.FastStep` is ``min ½xᵀHx + qᵀx`` s.t. ``lo <= C x <= hi``,
``C = [I; A]``, with ``q = Q_w w + q_r`` (the window ``w``, the target's term ``q_r``). On an active set ``S``
(rows ``C_S`` held at their bounds ``b_S``) the KKT conditions ``H x + q + C_Sᵀ ν = 0``, ``C_S x = b_S`` give, with
the unconstrained rows ``C x₀ = −C H⁻¹ q`` and ``G = C H⁻¹ Cᵀ``: ``ν = G_SS⁻¹ (C_S x₀ − b_S)`` and
``C x = C x₀ − G_{:S} ν``, both affine in ``w`` with matrices fixed per set. That ``x`` is *the* optimum (``H``
positive definite) exactly when every row meets its bounds and every ``ν`` has the sign of its bound (``>= 0`` on an
upper, ``<= 0`` on a lower one): both are checked at every use, so a set that no longer fits goes back to the
solver, and the answer is the solver's to rounding either way.

A step on a known set is one matrix-vector product: the set's rows are stacked as ``[first input; rows − hi;
lo − rows; −c ν]`` (only the inactive rows are checked: the active ones sit on their bounds; ``c`` scales the
multipliers' tolerance to the rows'), so ``v = K w + k`` gives the first input in ``v[:m]`` and the optimum exactly
when ``max v[m:] <= tol``. The first input's bounds move with the slew window from the last delivered input: their
change from the static bounds enters through one more small product.

Building a set's map is Gauss-Jordan elimination on ``[G | C x₀'s map]`` (the sweep operator; Goodnight 1979),
one pivot per active row: each pivot is one rank-one update of a ``rows × (rows + n_w)`` matrix (tens of
microseconds), so a live runner builds maps between samples, a pivot at a time, without ever holding up a step. The
pivots are the squares of the Cholesky factor's diagonal of ``G_SS``: a set whose smallest is below ``1e-14`` of
its largest (dependent rows) gets no map and stays with the solver.

References
----------
Bemporad A., Morari M., Dua V., Pistikopoulos E. N. (2002), The explicit linear quadratic regulator for
constrained systems, Automatica 38:3–20 (the affine solution on each active set and its two checks).
Goodnight J. H. (1979), A tutorial on the SWEEP operator, The American Statistician 33:149–158.
"""

from __future__ import annotations

import time

import numpy as np

__all__: list = []

MAX_REGIONS = 64  # active sets whose answer maps are kept ...
MAX_MAP_BYTES = 64 * 2**20  # ... within this much memory
_PIVOT_RTOL = 1e-14  # smallest pivot / largest: the square of the Cholesky diagonal's 1e-7
_BIG = 1e29  # the dense solver's "no bound" is 1e30
_RECENT = 16  # sets tried, most recently used first, before the solver (each a few µs; the solver tens)
_MAX = np.maximum.reduce  # without ndarray.max's Python wrapper (a live step's check)


class Region:
    """The map of one active set: ``v = K w + k`` (``k`` for the current target), ``v[:m]`` the first input,
    ``check = v[m:]`` (all ``<= tol`` exactly when optimal); ``Kc`` maps the first input's bound changes. ``KX`` is
    ``[K | k]`` in one buffer (``K``, ``k`` are its views): a step is one product with ``[w; 1]``."""

    __slots__ = ("K", "k", "KX", "Kc", "v", "check", "version", "act", "Pbk", "b0", "rows", "sign", "moves", "sets")

    def __init__(self, KX, Kc, act, Pbk, b0, rows, sign):
        self.KX, self.K, self.Kc, self.act, self.Pbk, self.b0 = KX, KX[:, :-1], Kc, act, Pbk, b0
        self.rows, self.sign = rows, sign
        self.v = np.empty(KX.shape[0])
        self.check = self.v[rows[0].size:]
        self.k, self.version = KX[:, -1], -1
        # per check: the row it concerns and what its failure suggests (1: hold it at its upper bound, -1: at its
        # lower one, 0: release it); and the set's upper and lower rows
        self.moves = list(zip(np.concatenate([rows[1], rows[2], act]).tolist(),
                              [1] * rows[1].size + [-1] * rows[2].size + [0] * act.size))
        self.sets = (act[sign > 0].tolist(), act[sign < 0].tolist())

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.K, self.Kc, self.Pbk))


class Regions:
    """The maps of the active sets the solver reported, at most ``MAX_REGIONS`` within ``MAX_MAP_BYTES``; the
    unconstrained set's is there from the start, the others are built by :meth:`build_piece` between samples.

    Parameters
    ----------
    H : ndarray (n, n)
        The QP's Hessian (positive definite, well conditioned: the caller checks).
    A : ndarray (r, n) or None
        Rows beyond the identity (the slew rows), or None.
    lo, hi : ndarray (n + r,)
        Static bounds of the rows (the first ``n_first`` move with the slew window).
    Qw : ndarray (n, n_w)
        ``q``'s map of the window.
    n_first : int
        Rows whose bounds move (the first input's, under a slew limit), else 0.
    m : int
        Inputs (the first ``m`` rows are the first input).
    """

    def __init__(self, H, A, lo, hi, Qw, n_first, m):
        t0 = time.perf_counter()
        n = H.shape[0]
        C = np.eye(n) if A is None else np.vstack([np.eye(n), A])
        Hi = np.linalg.inv(H)
        self._CX = -(C @ Hi)  # C x₀ = −C H⁻¹ q = CX Q_w w + CX q_r
        CXw = self._CX @ Qw
        G = C @ Hi @ C.T
        self._W0 = np.ascontiguousarray(np.hstack([G, CXw]))  # what a build sweeps (in the buffer _W)
        self._W = np.array(self._W0, order="C")
        self._nr, self._m, self._first = C.shape[0], int(m), int(n_first)
        self._lo, self._hi = np.array(lo, np.float64), np.array(hi, np.float64)
        self._lo0 = self._lo[:m].tolist()
        self._hi0 = self._hi[:m].tolist()
        finite = np.abs(np.concatenate([lo, hi]))
        self.tol = 1e-9 * max(1.0, float(finite[finite < _BIG].max(initial=0.0)))
        dtol = 1e-9 * max(1.0, float(np.abs(H).max())) * max(1.0, self.tol * 1e9)
        self._c = self.tol / dtol  # a multiplier's tolerance in the rows' units
        self._rr, self._version, self.pending, self._build, self._last = None, 0, None, None, ()
        est = 2 * CXw.nbytes + G.nbytes + 1
        self._max = int(max(1, min(MAX_REGIONS, MAX_MAP_BYTES // est)))
        self._maps = {(): self._region(self._W0, np.zeros(0, np.intp), np.zeros(0, np.intp))}
        self.current, self._recent = None, []
        self._use(self._maps[()])
        # what a piece of a build costs (a pivot, the extraction), until measured: the set-up's share
        setup = time.perf_counter() - t0
        self._cost = {"pivot": setup / 4, "extract": setup / 4, "finish": setup / 4}

    @property
    def maps(self) -> dict:
        """The maps kept, by active set (``(upper rows, lower rows)`` as bytes; ``()`` the unconstrained set)."""
        return self._maps

    def offset(self, q_r):
        """Take the target's term ``q_r`` of ``q`` (when the target changes)."""
        self._rr, self._version = self._CX @ q_r, self._version + 1

    def solve(self, w, lo_m, hi_m):
        """``v`` (its first ``m`` values the first input) for the window ``w`` (``[w; 1]``: the window and a last 1)
        on the current set, or on one of the
        last few sets used before it (a loop moving back and forth between sets, e.g. under a gate that reduces some
        inputs); None when none of them is optimal there, or ``w`` is not finite (NaN fails every compare).
        ``lo_m``, ``hi_m`` are the first input's bounds (lists) when they move (slew), else None."""
        r = self.current
        if r is not None:
            v = self._on(r, w, lo_m, hi_m)
            if v is not None:
                return v
            near = self._neighbour(r)
            if near is not None:
                v = self._on(near, w, lo_m, hi_m)
                if v is not None:
                    self._use(near)
                    return v
        for other in self._recent:
            if other is not r:
                v = self._on(other, w, lo_m, hi_m)
                if v is not None:
                    self._use(other)
                    return v
        return None

    def _neighbour(self, r):
        """The known set the failed checks of ``r`` point to (rows over a bound held at it, multipliers of the wrong
        sign released), or None."""
        bad = np.flatnonzero(r.check > self.tol)
        if not 0 < bad.size <= 2 * self._m:
            return None
        up, low = set(r.sets[0]), set(r.sets[1])
        moves = r.moves
        for j in bad.tolist():
            if j >= len(moves):
                return None
            row, kind = moves[j]
            if kind > 0:
                up.add(row)
            elif kind < 0:
                low.add(row)
            else:
                up.discard(row)
                low.discard(row)
        if not up and not low:
            return self._maps.get(())
        return self._maps.get((np.array(sorted(up), np.intp).tobytes(), np.array(sorted(low), np.intp).tobytes()))

    def _use(self, r):
        """Make ``r`` the current set, first among the recent ones."""
        self.current = r
        if r is not None:
            recent = self._recent
            if r in recent:
                recent.remove(r)
            recent.insert(0, r)
            del recent[_RECENT:]

    def _on(self, r, w, lo_m, hi_m):
        """``v`` on the set ``r``, or None when it is not optimal there."""
        if r.version != self._version:
            self._offsets(r)
        v = r.v
        np.dot(r.KX, w, out=v)  # K w + k
        if lo_m is not None:  # the first input's bounds moved from the static ones: their change through Kc
            v += r.Kc @ [b - b0 for b, b0 in zip(hi_m + lo_m, self._hi0 + self._lo0)]
        if not _MAX(r.check) <= self.tol:
            return None
        return v

    def note(self, lam):
        """Take the active set of the solver's last answer (multipliers ``lam``, one per row) as the current one."""
        if lam is None:
            return
        lam = np.asarray(lam, np.float64)
        upper, lower = np.flatnonzero(lam > 0), np.flatnonzero(lam < 0)
        key = (upper.tobytes(), lower.tobytes()) if upper.size + lower.size else ()
        self._last = key
        if key in self._maps:
            self._use(self._maps[key])
        else:
            self.current = None
            if len(self._maps) < self._max and (self._build is None or self._build[0] != key):
                self.pending = key

    # ------------------------------------------------------------------------------------------ building
    @property
    def has_work(self) -> bool:
        return self._build is not None or self.pending is not None

    def piece_cost_s(self) -> float:
        """Seconds the next piece of build work is expected to take; inf without work."""
        if self._build is not None:
            return self._cost["pivot" if self._build[1] else "extract" if self._build[5] is None else "finish"]
        return self._cost["pivot"] if self.pending is not None else np.inf

    def build_piece(self) -> bool:
        """One piece of the pending build (a pivot, or one of the map's two extraction pieces); True when there was
        work. The build sweeps a buffer kept for it (no allocation, no page faults between samples)."""
        if self._build is None:
            if self.pending is None:
                return False
            key, self.pending = self.pending, None
            iu, il = (np.frombuffer(k, np.intp) for k in key)
            np.copyto(self._W, self._W0)
            self._build = [key, np.concatenate([iu, il]).tolist(), iu, il, [np.inf, 0.0], None]
        t0 = time.perf_counter()
        key, todo, iu, il, piv, part = self._build
        if todo:
            kind = "pivot"
            if not _sweep(self._W, todo.pop(), piv):
                self._done(key, None)
        elif part is None:
            kind = "extract"
            if iu.size + il.size and not piv[0] > _PIVOT_RTOL * piv[1]:  # dependent rows: left to the solver
                self._done(key, None)
            else:
                self._build[5] = self._checks(self._W, iu, il)
        else:
            kind = "finish"
            self._done(key, self._finish(self._W, part))
        dt = time.perf_counter() - t0
        # follows a dearer piece at once, forgets one slowed by preemption within a few
        self._cost[kind] = max(dt, 0.5 * self._cost[kind])
        return True

    def _done(self, key, region):
        self._build = None
        if len(self._maps) < self._max:
            self._maps[key] = region
        if self._last == key:  # the solver's last set: the next step starts on it
            self._use(region)
        if self.pending == key:
            self.pending = None

    def _region(self, W, iu, il):
        """The stacked map of the set with upper rows ``iu`` and lower rows ``il`` from the swept ``W``."""
        return self._finish(W, self._checks(W, iu, il))

    def _checks(self, W, iu, il):
        """The first piece of a map: its rows (first input, checks) and ``K``. After the sweep, an inactive row's
        map of ``w`` is ``W[i, nr:]`` (``C x₀``'s, less what the active rows take), an active row's multiplier's
        ``W[j, nr:]`` (unsigned); an active row sits on its bound (no ``w`` in it)."""
        nr, m = self._nr, self._m
        act = np.concatenate([iu, il]).astype(np.intp)
        sign = np.concatenate([np.ones(iu.size), -np.ones(il.size)])
        free = np.ones(nr, bool)  # boolean masks: a fraction of setdiff1d's cost (its sorts)
        free[act] = False
        moves = np.arange(nr) < self._first
        up = np.flatnonzero(free & ((self._hi < _BIG) | moves))
        low = np.flatnonzero(free & ((self._lo > -_BIG) | moves))
        nu, nl, s = up.size, low.size, act.size
        KX = np.zeros((max(m + nu + nl + s, m + 1), W.shape[1] - nr + 1))  # a row that always passes when none
        K = KX[:, :-1]  # checks; the last column (k) is the target's, set by _offsets
        Ww = W[:, nr:]
        K[:m] = Ww[:m]
        K[act[act < m]] = 0.0
        K[m:m + nu] = Ww[up]
        np.negative(Ww[low], out=K[m + nu:m + nu + nl])
        np.multiply(Ww[act], (-self._c * sign)[:, None], out=K[m + nu + nl:m + nu + nl + s])
        return KX, act, sign, up, low

    def _finish(self, W, part):
        """The second piece: ``Pbk``, how the active rows' bound values move each of ``v``'s rows (``rows − Pb z``
        with ``z = C_S x₀ − b_S``; ``Pb = G_:S G_SS⁻¹``, ``I`` on the active rows; ``c·sign·G_SS⁻¹`` for the
        multipliers), the static bounds of the active rows, ``Kc`` and the region."""
        K, act, sign, up, low = part  # K: [K | k]
        m, nu, nl, s = self._m, up.size, low.size, act.size
        Pbk = np.zeros((K.shape[0], s))
        first = np.arange(m)
        held = np.flatnonzero(act < m)  # the active rows of the first input, by position in act
        free = np.ones(m, bool)
        free[act[held]] = False
        free = first[free]
        Pbk[free] = -W[np.ix_(free, act)]
        Pbk[act[held], held] = 1.0
        Pbk[m:m + nu] = -W[np.ix_(up, act)]
        Pbk[m + nu:m + nu + nl] = W[np.ix_(low, act)]
        Pbk[m + nu + nl:m + nu + nl + s] = (self._c * sign)[:, None] * W[np.ix_(act, act)]
        pick = np.where(sign > 0, act, act + self._nr)  # the active rows' bounds in [hi; lo]
        b0 = np.concatenate((self._hi, self._lo))[pick]
        Kc = self._moving(K.shape[0], act, sign, Pbk, up, low)
        return Region(K, Kc, act, Pbk, b0, (first, up, low), sign)

    def _moving(self, nK, act, sign, Pbk, up, low):
        """``Kc`` (nK × 2m): ``v``'s change per change of the first input's bounds ``[hi_1 … hi_m, lo_1 … lo_m]``
        from the static ones (zero without a slew limit): an active row moves ``v`` through its column of ``Pbk``,
        an inactive one moves its own check."""
        m = self._m
        Kc = np.zeros((nK, 2 * m))
        if not self._first:
            return Kc
        for i in range(m):
            for col, sg in ((i, 1.0), (m + i, -1.0)):  # the upper bound of row i, its lower one
                hit = np.flatnonzero((act == i) & (sign == sg))
                if hit.size:  # active on this bound: the answer and the multipliers move
                    Kc[:, col] = Pbk[:, hit[0]]
                elif sg > 0 and np.any(up == i):  # inactive: its upper check is rows − hi
                    Kc[m + int(np.flatnonzero(up == i)[0]), col] = -1.0
                elif sg < 0 and np.any(low == i):  # its lower check is lo − rows
                    Kc[m + up.size + int(np.flatnonzero(low == i)[0]), col] = 1.0
        return Kc

    def _offsets(self, r):
        """A region's constant part ``k`` for the current target and the static bounds."""
        first, up, low = r.rows
        rr = self._rr
        z = rr[r.act] - r.b0
        k = np.zeros(r.v.size)
        m, nu, nl = first.size, up.size, low.size
        k[:m] = rr[first]
        k[m:m + nu] = rr[up] - self._hi[up]
        k[m + nu:m + nu + nl] = self._lo[low] - rr[low]
        k -= r.Pbk @ z
        r.k[:] = k  # the last column of KX
        r.version = self._version


def _sweep(W, k, piv) -> bool:
    """Sweep ``W`` (``rows × (rows + n_w)``, C order) on the pivot ``k`` in place (Goodnight 1979): after the pivots
    ``S``, ``W[S, S] = G_SS⁻¹``, ``W[S, rest] = G_SS⁻¹ [G_S,rest | X_S]`` and ``W[rest, S] = −G_rest,S G_SS⁻¹``,
    ``W[rest, rest] = [G | X] − G_rest,S G_SS⁻¹ [G_S,rest | X_S]``. ``piv`` keeps the smallest and largest pivot;
    False when the pivot is not positive (dependent rows)."""
    d = float(W[k, k])
    if not d > 0.0 or not np.isfinite(d):
        return False
    piv[0], piv[1] = min(piv[0], d), max(piv[1], d)
    row = W[k] / d
    col = W[:, k].copy()
    W -= np.multiply.outer(col, row)
    W[k] = row
    W[:, k] = col / -d
    W[k, k] = 1.0 / d
    return True
