"""Closed-loop runs: a predictive controller steering a plant, step by step with a receding horizon.

At every sample the controller plans over its horizon from the last measured window, the first planned input is
applied to the plant, the plant returns the measured output, and the window moves on. Anything with the plant
interface (``n_inputs``, ``n_outputs``, ``reset(seed, x0)``, ``step(u_k) -> y_k``; see ``control/plants.py``) can
be controlled: a simulated network, or a surrogate model fitted on held-out data.

Energy budgets hold over rolling windows of the *applied* inputs: every plan gets the applied past that its
budget windows reach back into (the warm-up included), and the result counts the windows of applied inputs over the
budget (:func:`stimsteer.control._energy_windows.window_energies`), not the plans.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..sysid import InvalidParameterError, LimitsError, SessionError, check_fitted
from ._energy_windows import over_budget

__all__ = ["LoopResult", "run_closed_loop", "offset_free_wrapper"]

_LIMIT_KEYS = ("amplitude_min", "amplitude_max", "charge_density", "slew", "energy_budget")


@dataclass(frozen=True)
class LoopResult:
    """What happened in a closed-loop run.

    Attributes
    ----------
    inputs : ndarray, shape (n_steps, n_inputs)
        Applied inputs, µA.
    outputs : ndarray, shape (n_steps, n_outputs)
        Measured outputs at the same samples.
    targets : ndarray, shape (n_steps, n_outputs)
        The output target at each sample (for a state target: ``C x*`` of the controller's model).
    tracking_error : ndarray, shape (n_steps, n_outputs)
        ``outputs − targets``.
    rms_tracking_error : ndarray, shape (n_outputs,)
    energy_ua2 : float
        ``Σ u²`` of the applied inputs, µA².
    limit_use : dict of str to float
        Fraction of samples at which each hard limit was binding on the applied input (``energy_budget``:
        fraction of plans in which a budget window is full).
    violations : dict of str to int
        ``amplitude`` and ``slew``: applied samples beyond a hard limit (0 unless the limits conflict, see
        :mod:`stimsteer.control.mpc`); ``energy_budget``: windows of ``energy_window_steps`` applied samples (one
        ending at each loop step, the warm-up before counting) whose energy exceeds the budget;
        ``output_bounds``: measured samples beyond a soft output bound (allowed, reported).
    energy_window_steps : int or None
        The energy budget's window, samples (None without a budget).
    energy_window_max_ratio : float
        The largest energy of such a window divided by the budget (0 without a budget).
    solve_time_s : ndarray, shape (n_steps,)
        Wall time of each plan's solve, seconds.
    statuses : tuple of str
        Each plan's status.
    n_fallback : int
        Plans that returned the safe fallback.
    warmup_inputs : ndarray, shape (n_warmup, n_inputs)
    warmup_outputs : ndarray, shape (n_warmup, n_outputs)
    seed : int or None
        The plant's seed.
    disturbance_estimate : ndarray, shape (n_steps, n_outputs) or None
        With offset-free tracking: the output disturbance estimated at each step (else None).
    """

    inputs: np.ndarray
    outputs: np.ndarray
    targets: np.ndarray
    tracking_error: np.ndarray
    rms_tracking_error: np.ndarray
    energy_ua2: float
    limit_use: dict
    violations: dict
    solve_time_s: np.ndarray
    statuses: tuple
    n_fallback: int
    warmup_inputs: np.ndarray
    warmup_outputs: np.ndarray
    seed: object = None
    energy_window_steps: int = None
    energy_window_max_ratio: float = 0.0
    disturbance_estimate: np.ndarray = None

    @property
    def n_steps(self) -> int:
        return int(self.inputs.shape[0])

    def summary(self) -> dict:
        """JSON-ready numbers: RMS error, energy, limit use, violations, solve-time statistics."""
        return {
            "n_steps": self.n_steps, "rms_tracking_error": [float(v) for v in self.rms_tracking_error],
            "energy_ua2": float(self.energy_ua2), "limit_use": {k: float(v) for k, v in self.limit_use.items()},
            "violations": {k: int(v) for k, v in self.violations.items()}, "n_fallback": int(self.n_fallback),
            "energy_window_steps": self.energy_window_steps,
            "energy_window_max_ratio": float(self.energy_window_max_ratio),
            "solve_time_s_median": float(np.median(self.solve_time_s)),
            "solve_time_s_max": float(np.max(self.solve_time_s)), "seed": self.seed,
        }


def _targets(controller, target, n_steps):
    """A function ``k -> target window`` for the plan at step k, and the per-step output targets."""
    N, p = controller.horizon_steps_, controller.n_outputs_
    t = np.asarray(target, dtype=np.float64)
    if controller.target_kind_ == "state":  # only a state-space controller plans towards a state
        model = controller.model_
        if t.shape != (model.n_states,):
            raise SessionError(f"a state target must have shape ({model.n_states},); got {t.shape}.")
        return (lambda k: t), np.tile(model.C @ t, (n_steps, 1))
    if t.ndim == 1:
        if t.shape != (p,):
            raise SessionError(f"a constant target needs one value per output ({p}); got shape {t.shape}.")
        return (lambda k: t), np.tile(t, (n_steps, 1))
    need = n_steps + N - 1
    if t.ndim != 2 or t.shape[1] != p or t.shape[0] < need:
        raise SessionError(f"a target trajectory for {n_steps} steps with a horizon of {N} must have shape "
                           f"(>= {need}, {p}); got {t.shape}. Extend it (e.g. repeat its last row).")
    if not np.all(np.isfinite(t[:need])):
        raise SessionError("the target trajectory holds NaN or infinite values.")
    return (lambda k: t[k:k + N]), t[:n_steps].copy()


def warmup_window(controller, warmup_inputs):
    """The warm-up inputs as a float array of the controller's past window (rest when None: zeros, needing no
    check), and whether they were given; the limits they must keep are the caller's to check."""
    m, T = controller.n_inputs_, controller.past_steps_
    if warmup_inputs is None:
        return np.zeros((T, m)), False
    w = np.asarray(warmup_inputs, dtype=np.float64)
    if w.ndim != 2 or w.shape[1] != m or w.shape[0] < T:
        raise SessionError(f"warmup_inputs must have shape (>= {T}, {m}) (the controller's past window); got "
                           f"{w.shape}.")
    return w, True


def _warmup(controller, warmup_inputs):
    w, given = warmup_window(controller, warmup_inputs)
    if not given:
        return w
    bad = controller.limits_.violations(w)["amplitude"]
    if bad or not np.all(np.isfinite(w)):
        lo, hi = controller.limits_.input_bounds()
        raise LimitsError(f"{bad} warm-up input samples lie outside the amplitude window [{lo.tolist()}, "
                          f"{hi.tolist()}] µA; warm up inside the declared limits.")
    return w


def run_closed_loop(controller, plant, *, n_steps, target, seed=None, x0=None, warmup_inputs=None,
                    use_fast_path=None, offset_free=None) -> LoopResult:
    """Run a fitted controller against a plant with a receding horizon.

    Parameters
    ----------
    controller : ModelPredictiveController or DataPredictiveController
        Fitted (its problem is built once and re-solved at every step).
    plant : object with the plant interface
        ``n_inputs``, ``n_outputs``, ``reset(seed=None, x0=None)``, ``step(u_k) -> y_k``.
    n_steps : int
        Closed-loop samples after the warm-up.
    target : ndarray
        Output kind: (n_outputs,) constant, or (>= n_steps + horizon − 1, n_outputs) trajectory (each plan sees
        the next ``horizon`` rows). State kind: (n_states,).
    seed : int, optional
        Seed of the plant's noise (``plant.reset(seed=...)``).
    x0 : ndarray, optional
        Initial plant state (default its rest state).
    warmup_inputs : ndarray, shape (>= past_steps_, n_inputs), optional
        Inputs applied before the loop to fill the controller's past window; default zeros (rest). Must lie
        inside the amplitude window.
    use_fast_path : bool, optional
        Passed to every ``controller.plan``.
    offset_free : {None, "constant", "ramp"}, optional
        Track offset-free: the controller is wrapped in an
        :class:`~stimsteer.control.mpc.offset_free.OffsetFreeController` with this disturbance model (a controller
        already wrapped may be passed as ``controller`` instead).

    Returns
    -------
    LoopResult

    Raises
    ------
    NotFittedError
        If the controller is not fitted.
    SessionError
        Bad sizes of plant, target or warm-up.
    LimitsError
        Warm-up inputs outside the limits.
    """
    check_fitted(controller, "problem_")
    controller = offset_free_wrapper(controller, offset_free)
    n_steps = int(n_steps)
    if n_steps < 1:
        raise SessionError(f"n_steps must be at least 1; got {n_steps}.")
    m, p = controller.n_inputs_, controller.n_outputs_
    if (int(plant.n_inputs), int(plant.n_outputs)) != (m, p):
        raise SessionError(f"the plant has {plant.n_inputs} inputs and {plant.n_outputs} outputs but the controller "
                           f"{m} and {p}; control a plant with the channels the controller was built for.")
    window, targets = _targets(controller, target, n_steps)
    warm = _warmup(controller, warmup_inputs)
    plant.reset(seed=seed, x0=x0)
    controller.reset()  # the same seed gives the same numbers: no warm start carried over from another run
    n_w = warm.shape[0]
    # the applied inputs and measured outputs, written in place: each plan gets views of the windows it needs
    U, Y = np.empty((n_w + n_steps, m)), np.empty((n_w + n_steps, p))
    U[:n_w] = warm
    for i, u in enumerate(warm):
        Y[i] = np.asarray(plant.step(u), np.float64).reshape(p)
    T = controller.past_steps_
    # the inputs a plan sees reach back as far as its energy budget's window (the outputs as far as its predictor's)
    T_u = max(T, (controller.energy_window_steps_ or 1) - 1, getattr(controller, "history_steps_", 0))
    times, statuses, active = np.empty(n_steps), [], []
    n_fallback = 0
    dist = np.full((n_steps, p), np.nan) if hasattr(controller, "disturbance_") else None
    plan_with, step = controller.plan, plant.step
    for k in range(n_steps):
        now = n_w + k
        plan = plan_with(U[max(0, now - T_u):now], Y[max(0, now - T):now], target=window(k), last_input=U[now - 1],
                         use_fast_path=use_fast_path)
        U[now] = plan.inputs[0]
        Y[now] = np.asarray(step(U[now].copy()), np.float64).reshape(p)
        times[k] = plan.solve_time_s
        n_fallback += plan.fallback
        statuses.append(plan.status)
        active.append(plan.active_limits)  # counted once the loop has run (_limit_use)
        if dist is not None:
            dist[k] = controller.disturbance_
    return _result(controller, warm, U[n_w:], Y, targets, times, statuses, _limit_use(active), int(n_fallback),
                   seed, dist)


def _limit_use(active) -> dict:
    """Plans whose first input is at each hard limit, and plans with a full energy budget window, from each plan's
    ``active_limits``."""
    n = len(active)
    use = {key: int(np.count_nonzero(np.array([a[key][0] for a in active], bool).reshape(n, -1).any(axis=1)))
           for key in _LIMIT_KEYS[:-1]}
    use["energy_budget"] = sum(bool(a["energy_budget"]) for a in active)
    return use


def offset_free_wrapper(controller, offset_free):
    """``controller`` itself (``offset_free`` None) or wrapped for offset-free tracking with that disturbance model."""
    if offset_free is None or offset_free is False:
        return controller
    from .mpc.offset_free import DISTURBANCE_MODELS, OffsetFreeController

    if offset_free not in DISTURBANCE_MODELS:
        raise InvalidParameterError(f"offset_free must be None or one of {list(DISTURBANCE_MODELS)}; got "
                                    f"{offset_free!r}.")
    return OffsetFreeController(controller, disturbance_model=offset_free)


def _result(controller, warm, u, Y, targets, times, statuses, use, n_fallback, seed, dist=None):
    n_w, n = warm.shape[0], u.shape[0]
    y = Y[n_w:]
    err = y - targets
    counts = controller.limits_.violations(u, warm[-1], history=warm)
    lim = controller.limits_
    W = controller.energy_window_steps_
    over, ratio = (0, 0.0) if W is None else over_budget(u, lim.energy_budget_ua2, W, history=warm)
    out_bounds = 0
    if lim.output_min is not None:
        out_bounds = int(np.sum((y > lim.output_max) | (y < lim.output_min)))
    ro = lambda a: _ro(a)  # noqa: E731
    return LoopResult(
        inputs=ro(u), outputs=ro(y), targets=ro(targets), tracking_error=ro(err),
        rms_tracking_error=ro(np.sqrt(np.mean(err**2, axis=0))), energy_ua2=float(np.sum(u**2)),
        limit_use={k: v / n for k, v in use.items()},
        violations={"amplitude": counts["amplitude"], "slew": counts["slew"],
                    "energy_budget": over + counts.get("window_budget", 0), "output_bounds": out_bounds,
                    **{k: counts[k] for k in ("train_length", "duty_cycle") if k in counts}},
        solve_time_s=ro(times), statuses=tuple(statuses), n_fallback=int(n_fallback), warmup_inputs=ro(warm),
        warmup_outputs=ro(Y[:n_w]), seed=seed, energy_window_steps=W, energy_window_max_ratio=ratio,
        disturbance_estimate=None if dist is None else ro(dist),
    )


def _ro(a):
    a = np.array(a, dtype=np.float64, copy=True)
    a.setflags(write=False)
    return a
