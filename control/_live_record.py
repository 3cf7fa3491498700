"""The record of a live run (:mod:`stimsteer.control.realtime`): its timing figures and the session it becomes."""

from __future__ import annotations

import numpy as np

from ..sysid import Session
from ..sysid.caution import CAUTION

__all__ = ["record_run", "timing_summary"]


def _quantiles(a):
    a = np.asarray(a, np.float64)
    a = a[np.isfinite(a)]
    if a.size == 0:
        return {"p50": None, "p99": None, "max": None}
    return {"p50": float(np.percentile(a, 50)), "p99": float(np.percentile(a, 99)), "max": float(a.max())}


def timing_summary(loop, period, calibration, stop) -> dict:
    """JSON-ready figures of a run: latency and jitter quantiles (seconds), marker counts, the gate's counts."""
    ticks = np.asarray(loop.ticks, np.float64)
    jitter = np.abs(np.diff(ticks) - period) if loop.pace != "none" and ticks.size > 1 else []
    kinds = [e.split("+")[0] for e in loop.events]
    g = loop.gate
    counted = [b - a for a, b in zip(loop.gate0, (g.n_admitted, g.n_replaced, g.n_reduced, g.n_unavoidable))]
    counts = {k: kinds.count(k) for k in ("planned", "overrun", "missed", "failed", "no_data")}
    delivered = np.asarray(loop.U)
    lim = loop.c.limits_
    # an independent re-check of everything delivered, with the limits' own rule (not the gate's code)
    window = int(lim.energy_window_steps or loop.c.horizon_steps_)
    recheck = lim.violations(delivered, np.zeros(lim.n_inputs), energy_window_steps=window) if delivered.size else {}
    return {
        "sample_period_s": period, "sample_rate_hz": 1.0 / period, "pace": loop.pace,
        "overrun_policy": loop.policy, "n_steps_run": len(loop.events), "stop_reason": stop,
        "latency_s": _quantiles(loop.latency), "service_s": _quantiles(loop.service), "jitter_s": _quantiles(jitter),
        "wake_s": _quantiles(loop.wake), "started_behind": int(loop.n_behind),
        "latency_clock": "loop" if loop.simulated else "wall", "latency_definition": _definition(loop),
        "plant_step_s": _quantiles(loop.plant_t),
        "calibration_s": dict(calibration), "counts": counts,
        "gate": dict(zip(("admitted", "replaced", "reduced", "unavoidable"), counted)),
        "unchecked_inputs": len(loop.U) - counted[0] - counted[1],
        "delivered_violations": {k: int(v) for k, v in recheck.items()},
        "energy_window_steps": window,
        "sequence_limits": _sequence_limits(lim),
    }


def _definition(loop) -> str:
    """What the latency figures count, in words (the run's summary and the command's output carry it)."""
    if loop.simulated:
        return ("tick (the sample's arrival) to the checked input, on the loop's clock: the simulated plant's step "
                "(the hardware's time) taken off it")
    return "tick to the checked input, wall clock: the plant's step runs inside the period"


def _sequence_limits(lim) -> dict:
    """The window budgets and train limits the gate kept, as declared (empty without)."""
    out = {}
    if lim.window_budgets:
        out["window_budgets"] = [b.to_dict() for b in lim.window_budgets]
    if lim.train_limits is not None:
        out["train_limits"] = lim.train_limits.to_dict()
    return out


def record_run(loop, n_warm, n_steps, period, summary, output_units) -> Session:
    """The whole run as a session: delivered inputs, received outputs (missing ones masked), markers in metadata."""
    u = np.asarray(loop.U, np.float64)
    y = np.asarray(loop.Y, np.float64).reshape(u.shape[0], loop.c.n_outputs_)
    valid = np.all(np.isfinite(y), axis=1)
    y = np.where(valid[:, None], y, np.nan)
    n_run = len(loop.events)
    trials = [(n_warm, n_warm + n_run)] if n_run else None
    p = loop.c.n_outputs_
    units = (output_units,) * p if isinstance(output_units, str) else tuple(output_units)
    meta = {
        "recorded_under_feedback": True, "live_run": summary, "caution": CAUTION,
        "markers": {k: [int(i) for i in v] for k, v in sorted(loop.markers.items())},
        "warmup_samples": int(n_warm), "controlled_samples": int(n_run), "requested_samples": int(n_steps),
        "wind_down_samples": int(u.shape[0] - n_warm - n_run),
    }
    return Session(u=u, y=y, sample_rate_hz=1.0 / period, trials=trials, mask=valid,
                   input_names=tuple(loop.c.input_names_), output_names=tuple(loop.c.output_names_),
                   input_units=("uA",) * loop.c.n_inputs_, output_units=units, metadata=meta)
