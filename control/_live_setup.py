"""The set-up of a live run (:mod:`stimsteer.control.realtime`): settings checks, the warm-up, the calibration that
decides whether the sample period can be met, and the energy window of the gate."""

from __future__ import annotations

import numpy as np

from ..sysid import InvalidParameterError, LimitsError, SessionError
from .input_gate import InputGate
from .loop import warmup_window

__all__ = ["energy_window", "OVERRUN_POLICIES", "PACES"]

OVERRUN_POLICIES = ("hold", "fallback")
PACES = ("wall", "source", "none")


def _calibrate(controller, warm, target, gate, n, use_fast_path, clock):
    """Time ``n`` plans (+ a fresh gate's check) on the warm-up window. Work a controller leaves for the time between
    samples (FastStep: the answer map of an active set it found new) is done first, untimed: before the first tick
    there is no deadline, so the run starts with it done, as the steps it times do."""
    T = controller.past_steps_
    times = np.empty(n)
    if hasattr(controller, "idle_cost_s"):
        controller.plan(warm[-T:], _zeros_like_outputs(controller, T), target=target, last_input=warm[-1],
                        use_fast_path=use_fast_path)
        while controller.idle():  # every piece of the map: no deadline yet
            pass
    for i in range(n):
        fresh = InputGate(controller.limits_, energy_window_steps=energy_window(controller))  # built untimed
        t0 = clock()
        plan = controller.plan(warm[-T:], _zeros_like_outputs(controller, T), target=target, last_input=warm[-1],
                               use_fast_path=use_fast_path)
        fresh.admit(plan.inputs[0])
        times[i] = clock() - t0
    controller.reset()  # no warm start carried from the timing plans into the run
    return {"n": n, "min": float(times.min()), "median": float(np.median(times)), "max": float(times.max())}


def energy_window(controller) -> int:
    """The rolling window of the per-sample layout's energy budget: declared in the limits, else the horizon."""
    return int(controller.limits_.energy_window_steps or controller.horizon_steps_)


def _zeros_like_outputs(controller, T):
    return np.zeros((T, controller.n_outputs_))


def _check_settings(controller, plant, n_steps, policy, pace, rate, calibration_steps, max_stall_s):
    if policy not in OVERRUN_POLICIES:
        raise InvalidParameterError(f"overrun_policy must be one of {list(OVERRUN_POLICIES)}; got {policy!r}.")
    if pace not in PACES:
        raise InvalidParameterError(f"pace must be one of {list(PACES)}; got {pace!r}.")
    for name, v in (("n_steps", n_steps), ("calibration_steps", calibration_steps)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
            raise InvalidParameterError(f"{name} must be a whole number >= 1; got {v!r}.")
    if not (isinstance(max_stall_s, (int, float)) and np.isfinite(max_stall_s) and max_stall_s > 0):
        raise InvalidParameterError(f"max_stall_s must be a positive number of seconds; got {max_stall_s!r}.")
    m, p = controller.n_inputs_, controller.n_outputs_
    if (int(plant.n_inputs), int(plant.n_outputs)) != (m, p):
        raise SessionError(f"the plant has {plant.n_inputs} inputs and {plant.n_outputs} outputs but the controller "
                           f"{m} and {p}; run the loop on a plant with the channels the controller was built for.")
    plant_rate = float(plant.sample_rate_hz)
    rate = plant_rate if rate is None else float(rate)
    if not (np.isfinite(rate) and rate > 0):
        raise InvalidParameterError(f"sample_rate_hz must be a positive number of Hz; got {rate!r}.")
    if abs(rate - plant_rate) > 1e-9 * plant_rate:
        raise SessionError(f"the loop rate {rate:g} Hz differs from the plant's {plant_rate:g} Hz; run the loop at "
                           "the rate the plant (or stream) samples at.")
    return 1.0 / rate


def _warmup(controller, warmup_inputs):
    w, given = warmup_window(controller, warmup_inputs)
    if not given:
        return w
    m = controller.n_inputs_
    bad = controller.limits_.violations(w, np.zeros(m), energy_window_steps=energy_window(controller))
    if any(bad.values()) or not np.all(np.isfinite(w)):
        raise LimitsError(f"the warm-up inputs break the hard limits ({bad}) counted from rest; warm up inside "
                          "the declared limits.")
    return w
