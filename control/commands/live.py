"""``stimsteer live``: run a fitted model's controller in a live loop for a declared time and record the run.

The loop runs against a simulated plant in wall-clock time (``--plant``), the same plant behind Lab Streaming Layer
streams on this machine (``--plant ... --via-lsl``, the whole bridge exercised), or real acquisition and
stimulation streams (``--inlet``/``--outlet``). Numerics and timing live in :mod:`stimsteer.control.realtime`,
streams in :mod:`stimsteer.control.stream`; this module loads, calls them and writes the run folder atomically:
``run.h5`` (the session: delivered inputs, received outputs, markers and timing in its metadata; it can be fitted
like any recording) and ``run.json`` (the timing figures, the counts and the caution).
"""

from __future__ import annotations

import contextlib
import json
import os
from pathlib import Path

import numpy as np

from ...sysid import InvalidParameterError, SessionError, load_predictor, save_session
from ...sysid._claims import claim_output
from ...sysid._files import atomic_dir
from ...sysid._records import jsonable
from ...sysid.caution import CAUTION
from .._plan_physical import plan_limits
from ..limits import load_limits
from ..mpc.dispatch import controller_for
from ..mpc.target import parse_target
from ..plants import load_plant
from ..realtime import OVERRUN_POLICIES, energy_window, run_live
from .plan import _channels, _input_units
from ._common import add_window_options, window_steps

__all__ = ["add_parser", "run"]


def add_parser(sub) -> None:
    """Declare ``stimsteer live`` and its options."""
    p = sub.add_parser("live", help="run a live closed loop with deadlines for a declared time (a simulated plant, "
                       "or LSL streams on this machine) and record it as a session")
    p.add_argument("model", metavar="MODEL_OR_PREDICTOR", help="model file written by `stimsteer fit` (either route)")
    p.add_argument("--limits", required=True, help="limits file (TOML); every delivered input is checked against it, "
                   "including rolling charge and energy windows, train length and duty cycle of a [physical] section")
    p.add_argument("--stimulation", help="stimulation description of the model's inputs (needed with [physical] "
                   "limits when the model records none), as for `stimsteer plan`")
    p.add_argument("--target", required=True, help="constant target 'name=value,...' or a CSV over the horizon "
                   "(as for `stimsteer plan`), kept for the whole run")
    p.add_argument("--duration-s", type=float, required=True, help="length of the controlled run, seconds")
    p.add_argument("--out", required=True, help="output folder: run.h5 and run.json (new or empty, unless --force)")
    p.add_argument("--plant", help="simulated plant file (e.g. demo_data/demo_plant.h5)")
    p.add_argument("--via-lsl", action="store_true", help="with --plant: put the plant behind LSL streams on this "
                   "machine and run the loop through the streaming bridge")
    p.add_argument("--inlet", help="name of the LSL stream of recorded channels (a live run on hardware)")
    p.add_argument("--outlet", default="stimsteer-commands", help="name of the LSL command stream to create "
                   "(default stimsteer-commands)")
    add_window_options(p, past=None, horizon="control horizon", default="default: the predictor's horizon; "
                       "required for a state-space model")
    p.add_argument("--overrun", choices=list(OVERRUN_POLICIES), default="hold", help="what a late step delivers: "
                   "the last delivered input (hold, default) or the safe fallback towards zero")
    p.add_argument("--resolve-timeout-s", type=float, default=5.0, help="bounded wait for the streams (default 5)")
    p.add_argument("--max-stall-s", type=float, default=1.0, help="stop when no sample arrived for this long "
                   "(default 1)")
    p.add_argument("--input-weight", type=float, default=1e-3, help="weight of input energy per uA^2 (default 1e-3)")
    p.add_argument("--offset-free", choices=["off", "constant", "ramp"], default="off", help="estimate an output "
                   "disturbance from the prediction errors and track without offset: constant offsets (constant) or "
                   "slow linear drift (ramp); default off")
    p.add_argument("--fast-step", action="store_true", help="decide each input with the precomputed fast step "
                   "(state-space models or direct predictors; needs the realtime extra, daqp) instead of the full "
                   "plan: for sample rates in the kHz. It plans with the per-sample limits; the gate clips each input "
                   "to what is left of every rolling window and train")
    p.add_argument("--realtime", action="store_true", help="ask for real-time scheduling (SCHED_FIFO) on one core "
                   "and locked memory for the run; what the system granted or refused is printed and kept in "
                   "run.json. Never required: a refusal changes nothing else, and all is undone at the end")
    p.add_argument("--seed", type=int, default=0, help="seed of the simulated plant's noise (default 0)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")


def _controller(args):
    predictor, provenance = load_predictor(args.model)
    names_in, names_out, units, rate = _channels(predictor, provenance)
    N = window_steps(args.horizon, rate, "--horizon") or getattr(predictor, "max_horizon_steps_", None)
    target, tracked = parse_target(args.target, names_out, N)
    args.input_units = _input_units(predictor, provenance)  # the command stream names them (empty: unknown)
    limits, physical = plan_limits(args.limits, getattr(args, "stimulation", None), provenance, rate=rate,
                                   names_in=names_in, names_out=names_out, model_units=args.input_units)
    weight = args.input_weight if physical is None else physical.input_weight(args.input_weight)
    ctrl = controller_for(predictor, load_limits(args.limits) if physical is None else limits,
                          horizon_steps=target.shape[0], output_weight=tracked.astype(float), input_weight=weight)
    if getattr(args, "fast_step", False):
        if args.offset_free != "off":
            raise InvalidParameterError("--offset-free needs the full plan's predictions; drop --fast-step (or "
                                        "--offset-free).")
        from ..mpc.fast_step import FastStep

        if not np.allclose(target, target[0]):
            raise InvalidParameterError("--fast-step follows a constant target; give name=value pairs, not a table "
                                        "that changes over the horizon.")
        return FastStep(ctrl), target[0], units, rate
    return ctrl, target, units, rate


def _source(args, ctrl, rate, stack):
    """The plant of the run and its pace, entered on ``stack`` (streams close when the run ends)."""
    if (args.plant is None) == (args.inlet is None):
        raise SessionError("give either --plant PLANT.h5 (a simulated plant) or --inlet NAME (an LSL stream of the "
                           "recorded channels), not both or neither.")
    if args.inlet is None:
        plant = load_plant(args.plant)
        if abs(float(plant.sample_rate_hz) - rate) > 1e-9 * rate:
            raise SessionError(f"the plant samples at {plant.sample_rate_hz:g} Hz but the model at {rate:g} Hz; "
                               "run the loop on a plant at the model's rate.")
        if not args.via_lsl:
            return plant, "wall"
    elif args.via_lsl:
        raise SessionError("--via-lsl puts a simulated --plant behind LSL streams; with --inlet the streams exist.")
    from ..stream import LslBridge, SimulatedLslPlant  # the stream extra is needed only here

    inlet, outlet = args.inlet, args.outlet
    if args.inlet is None:
        tag = f"stimsteer-sim-{os.getpid()}"
        inlet, outlet = f"{tag}-recording", f"{tag}-commands"
        stack.enter_context(SimulatedLslPlant(plant, output_stream=inlet, command_stream=outlet,
                                              output_names=ctrl.output_names_, seed=args.seed))
    bridge = LslBridge(inlet_name=inlet, outlet_name=outlet, input_names=ctrl.input_names_,
                       output_names=ctrl.output_names_, sample_rate_hz=rate, limits=ctrl.limits_,
                       energy_window_steps=energy_window(ctrl), resolve_timeout_s=args.resolve_timeout_s,
                       input_units=getattr(args, "input_units", None) or None)
    return stack.enter_context(bridge), "source"


def _lines(run, out) -> list:
    s = run.summary
    lat, jit, c, g = s["latency_s"], s["jitter_s"], s["counts"], s["gate"]
    us = lambda v: "n/a" if v is None else f"{v * 1e6:.0f} µs"  # noqa: E731
    lines = [
        f"ran {s['n_steps_run']} samples at {s['sample_rate_hz']:g} Hz ({s['pace']} pace, overrun policy "
        f"{s['overrun_policy']}); recorded {run.session.n_samples} samples to {out / 'run.h5'}",
        f"step latency p50 {us(lat['p50'])}, p99 {us(lat['p99'])}, max {us(lat['max'])}; jitter p50 "
        f"{us(jit['p50'])}, p99 {us(jit['p99'])} ({s['latency_definition']}; plant step p50 "
        f"{us(s['plant_step_s']['p50'])})",
        f"planned {c['planned']}, overruns {c['overrun']}, missed ticks {c['missed']}, failed plans {c['failed']}, "
        f"samples without data {c['no_data']}",
        f"gate: {g['admitted']} inputs passed as given, {g['reduced']} reduced to the largest safe input under a "
        f"rolling window or train limit, {g['replaced'] - g['reduced']} replaced by the safe fallback; unchecked "
        f"inputs {s['unchecked_inputs']}; delivered inputs over a hard limit {s['delivered_violations']}",
    ]
    late = c["overrun"] + c["missed"]
    if late > 0.1 * max(1, s["n_steps_run"]):
        cal = s["calibration_s"]
        lines.append(f"note: {late} of {s['n_steps_run']} steps missed their deadline of {us(s['sample_period_s'])} "
                     f"(timed plans: median {us(cal['median'])}); the loop held or fell back instead of controlling. "
                     "Use a cheaper controller (shorter --horizon) or a model at a lower rate.")
    if s.get("realtime", {}).get("requested"):
        asked = {k: v for k, v in s["realtime"].items() if k != "requested"}
        lines.append("real time: " + "; ".join(f"{k.replace('_', ' ')} {v}" for k, v in asked.items()))
    if "stream" in s:
        lines.append(f"stream: {s['stream']['dropped']} samples dropped by the source or the inlet buffer, "
                     f"{s['stream']['missing']} not arrived in time")
    return lines


def run(args) -> int:
    """Run the live loop, write the run folder, print its figures; 0 on success (2 when it stopped early)."""
    out = Path(args.out)
    if not args.duration_s > 0:
        raise SessionError(f"--duration-s must be a positive number of seconds; got {args.duration_s}.")
    with claim_output(out, force=args.force):
        ctrl, target, units, rate = _controller(args)
        n_steps = max(1, int(round(args.duration_s * rate)))
        with contextlib.ExitStack() as stack:
            plant, pace = _source(args, ctrl, rate, stack)
            # a simulated --plant run directly ("wall" pace) stands in for hardware: its step is off the loop's clock
            result = run_live(ctrl, plant, n_steps=n_steps, target=target, pace=pace, seed=args.seed,
                              overrun_policy=args.overrun, max_stall_s=args.max_stall_s, output_units=units,
                              offset_free=None if args.offset_free == "off" else args.offset_free,
                              simulated_plant=pace == "wall", realtime=args.realtime)
            if pace == "source":  # the bridge's own counts of the stream
                result.summary["stream"] = {"dropped": plant.n_dropped, "missing": plant.n_missing}
        summary = jsonable({**result.summary, "model_file": str(args.model), "limits_file": str(args.limits),
                            "caution": CAUTION})
        with atomic_dir(out, force=args.force) as tmp:
            save_session(result.session, tmp / "run.h5")
            (tmp / "run.json").write_text(json.dumps(summary, indent=2, allow_nan=False))
    for line in _lines(result, out):
        print(line)
    print(CAUTION)
    if result.stop_reason:
        raise SessionError(f"the run stopped early after {len(result.events)} of {n_steps} samples: "
                           f"{result.stop_reason} (the samples recorded are in {out / 'run.h5'}).")
    return 0
