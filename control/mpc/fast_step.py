"""The first input of a plan in tens of microseconds, for live loops: :class:`FastStep`.

A fitted :class:`~stimsteer.control.mpc.ModelPredictiveController` (condensed, output target, box and slew limits)
or :class:`~stimsteer.control.mpc.DataPredictiveController` (the direct route: linear maps, or DeePC with its
weights ``g`` minimised out) solves the same quadratic program over the inputs at every sample; only its linear term
and the first step's slew window change. :class:`FastStep` precomputes everything else once:

* the QP's linear term as one matrix product ``q = Q_w w + q_r`` of the window ``w = [vec(u_past); vec(y_past)]``
  (``q_r`` for the target, recomputed only when the target changes): through the state estimate's linear map of
  the window (``StateSpaceModel.estimate_state`` is linear in it), the predictor's map ``P`` (linear maps), or the
  closed-form minimiser ``g*(u)`` of DeePC, affine in the past window and the target;
* the dense QP, solved by a dual active-set method warm started from the last active set (``daqp``; the
  ``realtime`` extra), or, for long plans with amplitude bounds only, by a primal-dual active-set method on the
  bounds (warm started too; ``daqp`` if it does not settle), whose step stays ``O(n²)`` however many bounds are
  active.

It returns only what a loop delivers (the first input, whether it is a fallback, the status), none of the
:class:`Plan`'s packaging. The answer is verified against the hard limits before it is returned (amplitude and the
slew window from ``last_input``; rounding-level excess is put on the bound, more is a failed step that returns the
safe fallback), and a live runner's gate checks it again when it leaves. The per-sample layout's energy budget and
output bounds need the full plan: they are refused here (use ``plan`` of the controller).

Sequence limits (window budgets in physical terms, train length, duty) are accepted, and planned with the per-sample
limits only: the first input is clipped, when it leaves, to what is left of every window and to the train mask of
the *delivered* history, by the live gate (:class:`~stimsteer.control.input_gate.InputGate`: the largest safe input
towards the answer). That is exact for safety -- the limits are on the delivered sequence and the gate's fallback
always fits -- at the cost of optimality: the full plan spreads a window's budget over its horizon, this step spends
it as it comes. It is also why the step is only for loops that gate what they deliver (:func:`run_live`, the
streaming bridge). A full plan per step instead would cost milliseconds, far beyond a kHz loop's period.
"""

from __future__ import annotations

import math

import numpy as np

from ...sysid import InvalidParameterError, SessionError, check_fitted
from .condensed import _LinearStateMap
from . import _step_regions
from .fastqp import _BoxQP, _DenseQP, dense_solver_available

__all__ = ["FastStep", "StepResult"]

_ACCEPT_RTOL = 1e-7
# From this many planned inputs on, a bounds-only QP goes to the primal-dual box solver: daqp's warm step grows with
# the active bounds it keeps (benchmark system, most bounds active: 5 µs at 80 inputs, 67 µs at 320), the box
# solver's is one O(n²) product plus ~20 µs of fixed cost (32 µs at 80, 50 µs at 320; bench_control.py).
_BOX_MIN_VARS = 160


class StepResult:
    """What a fast step decides: ``inputs`` (1, n_inputs), ``fallback``, ``status`` (``"optimal"`` or the reason);
    ``first``: the first input as a list of floats (what a live runner hands its gate, without array round trips;
    ``inputs`` is built from it when asked for)."""

    __slots__ = ("first", "_inputs", "fallback", "status")

    def __init__(self, first, fallback, status):
        self.first, self._inputs, self.fallback, self.status = first, None, fallback, status

    @property
    def inputs(self) -> np.ndarray:
        if self._inputs is None:
            self._inputs = np.array([self.first], np.float64)
        return self._inputs


class FastStep:
    """A fitted model predictive controller reduced to its first input, for live loops (see the module docstring).

    Parameters
    ----------
    controller : ModelPredictiveController or DataPredictiveController
        Fitted; a model controller with ``formulation="condensed"``, ``target_kind="output"``, no terminal weight;
        a data controller on linear maps, or DeePC with a quadratic regulariser whose equalities are independent;
        limits with amplitude (and charge-density) bounds and slew limits only.

    Attributes
    ----------
    controller_ : the controller; its fitted attributes (``limits_``, ``past_steps_``, ...) are this object's too.

    Raises
    ------
    InvalidParameterError
        A controller this path cannot reproduce (the message says what), or ``daqp`` not installed.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import StateSpaceModel
    >>> from stimsteer.control.limits import StimLimits
    >>> from stimsteer.control.mpc import ModelPredictiveController
    >>> ctrl = ModelPredictiveController(model=StateSpaceModel(A=[[0.9]], B=[[1.0]], C=[[1.0]]), horizon_steps=5,
    ...     limits=StimLimits(amplitude_min_ua=-1, amplitude_max_ua=1, n_inputs=1)).fit()
    >>> step = FastStep(ctrl)
    >>> u = step.plan(np.zeros((1, 1)), np.zeros((1, 1)), target=[3.0]).inputs[0]
    >>> bool(np.allclose(u, ctrl.plan(np.zeros((1, 1)), np.zeros((1, 1)), target=[3.0]).inputs[0]))
    True
    """

    def __init__(self, controller):
        check_fitted(controller, "problem_")
        why = _unsupported(controller)
        if why:
            raise InvalidParameterError(f"the fast step cannot reproduce this controller: {why}; use its plan().")
        self.controller_ = c = controller
        T = int(c.past_steps_)
        m, p, N = int(c.n_inputs_), int(c.n_outputs_), int(c.horizon_steps_)
        self._Qw, self._Qr, self._q0, H = _linear_step(c, T, m, p, N)
        slew = c._slew_rows
        H2 = 2.0 * 0.5 * (H + H.T)
        # bounds only and a long plan: the primal-dual box solver (see _BOX_MIN_VARS)
        self._qp = _solver(H2, slew, N * m)
        self._lo, self._hi = np.tile(c._lo, N), np.tile(c._hi, N)
        self._row_lo = np.concatenate([self._lo, [] if slew is None else -slew[1]])
        self._row_hi = np.concatenate([self._hi, [] if slew is None else slew[1]])
        self._slew = None if c._slew is None else np.asarray(c._slew, np.float64)
        self._T, self._m, self._p, self._N = T, m, p, N
        self._tol = _ACCEPT_RTOL * max(1.0, float(np.max(np.abs(np.concatenate([c._lo, c._hi])))))
        self._target, self._qr = None, None
        # the window w and a last 1 in one buffer: a known active set's answer is one product with [w; 1]
        self._wx, self._q, self._ones = np.ones(T * (m + p) + 1), np.empty(N * m), np.ones(N * m)
        self._w = self._wx[:-1]
        # the window's two halves as (T, m) and (T, p) views of w: filled by one copy each, no reshape
        self._wu, self._wy = self._w[:T * m].reshape(T, m), self._w[T * m:].reshape(T, p)
        big = 1e30  # the dense solver's "no bound"
        self._row_lo, self._row_hi = np.clip(self._row_lo, -big, big), np.clip(self._row_hi, -big, big)
        self._lo_buf, self._hi_buf = self._row_lo.copy(), self._row_hi.copy()
        self._lo_l, self._hi_l = self._row_lo[:m].tolist(), self._row_hi[:m].tolist()
        self._slew_l = None if self._slew is None else np.broadcast_to(self._slew, (m,)).tolist()
        # exact answers on the last optimal active set without the solver (daqp reports its multipliers). A window
        # longer than the plan's inputs is taken to q's window part z = Q_w w first (one product a step, which the
        # solver's q reuses) and the sets' maps act on [z; 1]: at past 100 ms of 23 channels and 150 planned inputs
        # each map is 15 times smaller, and a step on a known set 15 times cheaper (2,301 columns: 1-2 ms a step)
        self._by_q = self._Qw.shape[1] > self._Qw.shape[0]
        self._zx = np.ones(N * m + 1)
        self._z = self._zx[:-1]
        self._regions = _regions(self._qp, H2, slew, self._row_lo, self._row_hi,
                                 np.eye(N * m) if self._by_q else self._Qw, m)

    def __getattr__(self, name):
        # the fitted attributes of the controller are this object's too (a live runner reads them)
        if name.endswith("_") and not name.startswith("_") and "controller_" in self.__dict__:
            return getattr(self.__dict__["controller_"], name)
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def reset(self):
        """Forget the warm start (the solver's; the cached active sets are exact whatever the history)."""
        self._qp.reset()
        return self

    def idle(self):
        """One piece of the answer map of an active set the solver found new (a pivot of its elimination, or the
        map's extraction; its expected cost: ``idle_cost_s``); a live runner calls it between samples while that
        much time is left before the next tick. True when there was work."""
        return self._regions is not None and self._regions.build_piece()

    @property
    def idle_cost_s(self) -> float:
        """Seconds :meth:`idle` is expected to take (from the maps built so far); inf without work."""
        r = self._regions
        return math.inf if r is None else r.piece_cost_s()

    def _target_term(self, target):
        t = np.asarray(target, np.float64)
        key = t.tolist()  # a list compare is a fraction of array_equal's cost on a live loop's step
        if key != self._target:
            if t.shape != (self._p,) or not np.all(np.isfinite(t)):
                raise SessionError(f"the fast step takes a constant output target of {self._p} finite values; got "
                                   f"shape {t.shape}.")
            self._target, self._qr = key, self._q0 + self._Qr @ np.tile(t, self._N)
            if self._regions is not None:
                self._regions.offset(self._qr)
        return self._qr

    def plan(self, u_past, y_past, *, target, last_input=None, use_fast_path=None):
        """The first input from the last ``past_steps_`` samples of the windows (``use_fast_path`` is ignored).

        Returns
        -------
        StepResult
        """
        T, m = self._T, self._m
        w, q, lo, hi = self._w, self._q, self._lo_buf, self._hi_buf
        self._wu[...] = u_past[-T:]
        self._wy[...] = y_past[-T:]
        last = u_past[-1] if last_input is None else np.asarray(last_input, np.float64)
        qr = self._target_term(target)
        lo_m, hi_m = self._lo_l, self._hi_l
        moving = self._slew_l is not None
        if moving:  # only the first step's window moves: around the last delivered input
            lo_m, hi_m = _slew_window(last.tolist(), self._slew_l, lo_m, hi_m)
            if lo_m is None:
                return self._fallback(last, "no input meets the limits from the last one")
            lo[:m], hi[:m] = lo_m, hi_m
        regions, status = self._regions, "optimal"
        if self._by_q:
            np.dot(self._Qw, w, out=self._z)
        x = None if regions is None else regions.solve(self._zx if self._by_q else self._wx, lo_m if moving else None,
                                                       hi_m)
        if x is None:
            if self._by_q:
                np.add(self._z, qr, out=q)
            else:
                np.dot(self._Qw, w, out=q)
                q += qr
            if not math.isfinite(np.dot(self._ones, q)):  # a NaN or an infinity anywhere in q makes its sum so
                return self._fallback(last, "the window holds NaN or infinite values")
            x, status, reason = self._qp.solve_finite(q, lo, hi)
            if x is None:
                return self._fallback(last, reason)
            if regions is not None:
                regions.note(self._qp.lam)
        u0, tol = x[:m].tolist(), self._tol
        # Python floats: for a handful of inputs several times faster than numpy calls (NaN fails both compares)
        if not all(a - tol <= v <= b + tol for v, a, b in zip(u0, lo_m, hi_m)):
            return self._fallback(last, "the solver's answer breaks a hard limit")
        return StepResult([min(max(v, a), b) for v, a, b in zip(u0, lo_m, hi_m)], False, status)

    def _fallback(self, last, why):
        return StepResult(self.controller_.limits_.safe_inputs(1, last)[0].tolist(), True, why)


def _slew_window(last, slew, lo, hi):
    """The first input's window ``max(lo, last − slew) … min(hi, last + slew)`` as lists, or ``(None, None)`` when
    it is empty or ``last`` is not finite."""
    if not all(map(math.isfinite, last)):
        return None, None
    lo_m = [max(a, v - s) for a, v, s in zip(lo, last, slew)]
    hi_m = [min(b, v + s) for b, v, s in zip(hi, last, slew)]
    if any(a > b for a, b in zip(lo_m, hi_m)):
        return None, None
    return lo_m, hi_m


def _unsupported(c) -> str:
    """Why a controller is out of reach of the fast step ('' when it is not)."""
    mpc = hasattr(c, "model_")
    method = getattr(c, "method_", None)
    checks = (
        (not mpc and method not in ("spc", "deepc"), "it is neither a model nor a data predictive controller"),
        (mpc and getattr(c, "formulation", "") != "condensed", "its formulation is not condensed"),
        (getattr(c, "target_kind_", "") != "output", "it plans towards a state"),
        (getattr(c, "_LpT", None) is not None, "it has a terminal weight"),
        (getattr(c, "_energy", None) is not None, "its limits have an energy budget"),
        (getattr(c, "_idx_b", np.zeros(0)).size > 0, "its limits have output bounds"),
        (method == "deepc" and getattr(c, "_elim", None) is None,
         "its DeePC problem does not reduce to the inputs (an l1 regulariser, or dependent equalities)"),
        (not dense_solver_available(), "the dense solver daqp is not installed (pip install 'stimsteer[realtime]')"),
    )
    return "; ".join(why for bad, why in checks if bad)


def _linear_step(c, T, m, p, N):
    """``(Qw, Qr, q0, H)``: the QP ``min uᵀHu + qᵀu`` over the inputs of the plan, ``q = Qw w + Qr vec(r) + q0``
    for the window ``w = [vec(u_past); vec(y_past)]`` of ``T`` samples and the target ``r`` (``N`` rows)."""
    if getattr(c, "method_", None) == "deepc":
        return _deepc_step(c, T, m, p, N)
    M = 2.0 * c._LG.T @ c._Lz  # q = M (fy − r), fy the free response
    H = c._LG.T @ c._LG + c._Ru.T @ c._Ru
    if hasattr(c, "model_"):  # fy = Phi_y x̂ + offset, x̂ = E (w − offset of the past outputs)
        E = _state_map(c.model_, T)
        off = np.asarray(c._y_off, np.float64)
        w_off = np.concatenate([np.zeros(T * m), np.tile(off, T)])
        return M @ c._Phi_y @ E, -M, M @ (np.tile(off, N) - c._Phi_y @ E @ w_off), H
    return M @ c._P, -M, M @ c._c, H  # linear maps (SPC): fy = P w + c


def _deepc_step(c, T, m, p, N):
    """DeePC with ``g`` minimised out (``DataPredictiveController._fast_deepc_eliminated``): ``q`` is linear in
    ``[u_past; 0]``, the past outputs and the weighted target, all in the blocks' (centred) coordinates."""
    e = c._elim
    n_eq = c._E.shape[0]
    Qu = e["Q_f"][:, :T * m]
    Qy = e["Q_f"][:, n_eq:n_eq + T * p] if e["hard"] else e["Q_y"]
    Qr = e["Q_r"] @ c._Lz
    off = np.zeros(p) if c._y_off is None else np.asarray(c._y_off, np.float64)
    q0 = -(Qy @ np.tile(off, T)) - Qr @ np.tile(off, N)
    return np.hstack([Qu, Qy]), Qr, q0, 0.5 * e["P"]


def _solver(H2, slew, n):
    """The box solver for long bounds-only plans (its Cholesky factor exists: ``H`` positive definite), else daqp."""
    if slew is None and n >= _BOX_MIN_VARS:
        try:
            return _BoxQP(H2, n)
        except np.linalg.LinAlgError:
            pass
    return _DenseQP(H2, None if slew is None else slew[0].toarray(), n)


def _regions(qp, H2, slew, lo, hi, Qw, m):
    """The active-set maps of the dense solver's QP, or None: another solver, or ``H`` singular or nearly so (its
    inverse would carry rounding the checks are not made for; daqp copes)."""
    if not isinstance(qp, _DenseQP):
        return None
    if not _well_factored(H2, 1e-6):
        return None
    return _step_regions.Regions(H2, None if slew is None else slew[0].toarray(), lo, hi, Qw,
                                 0 if slew is None else m, m)


def _well_factored(M, rel: float) -> bool:
    """Whether the symmetric ``M`` has a Cholesky factor whose smallest diagonal entry exceeds ``rel`` times its
    largest (positive definite, and not so nearly singular that its inverse carries rounding the checks miss)."""
    try:
        d = np.abs(np.diag(np.linalg.cholesky(M)))
    except np.linalg.LinAlgError:
        return False
    return not bool(d.min() <= rel * d.max())  # as written before: a NaN factor is not refused here


def _state_map(model, T):
    """``E`` with ``estimate_state(u, y) = E [vec u; vec y]`` for windows of ``T`` samples (it is linear)."""
    return _LinearStateMap(model, T)._build()
