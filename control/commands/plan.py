"""The file workflow of ``stimsteer plan``: load a saved predictor and a limits file, plan, write the plan folder.

Numerics live in :mod:`stimsteer.control.mpc`; this module only loads, calls the public API and writes files
(atomically: a failed run leaves nothing behind). The figure comes from :mod:`stimsteer.control.figures.plan`.

Exit codes (:data:`EXIT_CODES`, printed by ``stimsteer plan --help``): 0 an optimal plan was written; 3 the plan is
not optimal (infeasible, or the solver failed) and the safe fallback was written, its files say so on their first
line and in ``plan.json``; 2 bad input (one line on stderr, nothing written); 1 an internal error.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import sys
import textwrap
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ...sysid import (StateSpaceForm, StimsteerError, load_predictor, open_session_source, rest_window,
                      trial_end_window)
from ...sysid._files import atomic_dir
from ...sysid._records import jsonable, versions
from ...sysid.caution import CAUTION
from ..figures._titles import fitted_what
from ..figures.plan import plan_figure
from ..figures.pulse_plan import pulse_plan_figure_of
from .._plan_physical import limits_record, plan_limits, signed_input_notes
from .._pulse_text import pulse_plan_lines
from ..limits import load_limits
# the mpc submodules, not the package: stimsteer.control.mpc forwards the old names of this workflow to here
from ..mpc.dispatch import controller_for
from ..mpc.output_ranges import FLAG_FRACTION, check_flag_fraction, output_ranges, recorded_output_range
from ..mpc.plan import Plan
from ..mpc.target import _is_constant_target, parse_target
from ._common import add_window_options, open_for_model

__all__ = ["EXIT_CODES", "PlanRun", "add_parser", "plan_to_folder", "run", "trial_ref", "write_plan"]

#: What ``stimsteer plan`` returns, for scripts (also in the README and ``stimsteer plan --help``).
EXIT_CODES = {
    0: "an optimal plan was written",
    3: "no optimal plan: the limits cannot be met (infeasible) or the solver failed; the safe fallback was written "
       "and its files say so (first line '# status: ...' of plan.csv and plan_pattern.csv, 'status' in plan.json)",
    2: "bad input (a file, a setting, the limits): one line on stderr, nothing written",
    1: "internal error (a bug): one line on stderr; please report it",
}
#: The exit code of a plan that is written but not optimal.
EXIT_NOT_OPTIMAL = 3

_MICROAMPERE = {"uA", "µA", "μA", "microampere", "microamperes"}  # spellings of the limits file's unit


@dataclass(frozen=True)
class PlanRun:
    """What :func:`plan_to_folder` did: the plan, the files written and readable summary lines."""

    plan: Plan
    files: dict
    lines: tuple


def plan_to_folder(model_path, *, target, limits_path, out_dir, horizon_steps=None, from_trial=None,
                   output_weight=1.0, input_weight=1e-3, force=False, stimulation=None, robust=None,
                   flag_fraction=FLAG_FRACTION) -> PlanRun:
    """Load a saved predictor and a limits file, plan towards a target, and write the plan folder.

    Parameters
    ----------
    model_path : str or Path
        A model file of ``stimsteer fit`` (:func:`stimsteer.sysid.storage.load_predictor`).
    target : str
        See :func:`stimsteer.control.mpc.parse_target`.
    limits_path : str or Path
        A limits file (:func:`stimsteer.control.limits.load_limits`), matched to the model's inputs by name.
    out_dir : str or Path
        New or empty folder (or ``force``).
    horizon_steps : int or WindowLength, optional
        Default: the target table's rows, else the predictor's horizon, else the horizon ``fit`` scored the model
        at (its provenance).
    from_trial : (str, int), optional
        ``(session path, trial index)``: plan from the end of that recorded trial; default from rest.
    output_weight, input_weight : float
        Scalar weights; outputs not named in the target get weight 0.
    force : bool
        Replace an existing output folder.
    stimulation : str or Path, optional
        The stimulation description of the model's inputs (:mod:`stimsteer.sysid.stimulation`); needed when the
        limits are physical (``[physical]``) and the model records none. Then the pulse files are written too
        (:mod:`stimsteer.control.pulse_plan`) and ``input_weight`` is per physical unit² (µA², or (mW/mm²)²).
    robust : {"worst", "average"}, optional
        For a bootstrap ensemble (``fit --bootstrap N``): plan robust over its members
        (:class:`~stimsteer.control.mpc.robust.RobustPlanner`); default the ensemble's mean prediction.
    flag_fraction : float, default :data:`stimsteer.control.mpc.output_ranges.FLAG_FRACTION`
        An untargeted output whose predicted move exceeds this fraction of its recorded range is flagged (console,
        figure and ``plan.json``'s ``output_ranges``).

    Returns
    -------
    PlanRun
    """
    check_flag_fraction(flag_fraction)
    predictor, provenance = load_predictor(model_path)
    names_in, names_out, units, rate = _channels(predictor, provenance)
    limits, physical = plan_limits(limits_path, stimulation, provenance, rate=rate, names_in=names_in,
                                   names_out=names_out, model_units=_input_units(predictor, provenance))
    if physical is None:
        limits = load_limits(limits_path)
    else:
        input_weight = physical.input_weight(input_weight)
    N = horizon_steps.steps(rate, option="--horizon") if hasattr(horizon_steps, "steps") else horizon_steps
    if N is None and _is_constant_target(target):  # a table gives its own length
        N = getattr(predictor, "max_horizon_steps_", None) or (provenance.get("horizon_steps") if
                                                               isinstance(provenance, dict) else None)
    tgt, tracked = parse_target(target, names_out, N)
    N = tgt.shape[0]
    weight = float(output_weight) * tracked.astype(float)
    ctrl = _robust_planner(predictor, limits, N, weight, input_weight, robust) if robust is not None else \
        controller_for(predictor, limits, horizon_steps=N, output_weight=weight, input_weight=input_weight)
    u_past, y_past, start = _start_window(predictor, ctrl, len(names_in), len(names_out), from_trial, provenance)
    if physical is not None:
        physical.u_past = np.asarray(u_past, np.float64)
    plan = ctrl.plan(u_past, y_past, target=tgt)
    recorded, recorded_from = _recorded_range(model_path, provenance, from_trial)
    ranges = output_ranges(plan, np.asarray(y_past)[-1], units=units, targeted=tracked, recorded=recorded,
                           recorded_from=recorded_from, flag_fraction=flag_fraction)
    extra = {**_model_record(model_path, provenance, out_dir), "limits_file": str(limits_path), "start": start,
             "tracked_outputs": [n for n, t in zip(names_out, tracked) if t], "sample_rate_hz": rate,
             "limits": limits_record(ctrl.limits_, physical), "controller": type(ctrl).__name__,
             "method": getattr(ctrl, "method_", "model"), "what": _what(provenance, ctrl)}
    if physical is not None:  # the compiled limits are bounds on the model inputs, in the mapping's units
        extra["limits_input_units"] = list(physical.mapping.model_units())
    signed = signed_input_notes(plan, physical)  # a negative input without a description: said, not refused
    if signed:
        extra["notes"] = signed
    files = write_plan(plan, out_dir, sample_rate_hz=rate, output_units=units, tracked=tracked, extra=extra,
                       force=force, physical=physical, ranges=ranges,
                       input_units=(physical.mapping.model_units() if physical is not None else
                                    _input_units(predictor, provenance) or None))
    lines = [f"planned {N} steps ({N / rate:.4g} s) of {len(names_in)} input(s) from {start} with "
             f"{type(ctrl).__name__} ({extra['method']}): status {plan.status}, {plan.solver}, "
             f"{1e3 * plan.solve_time_s:.1f} ms"]
    if physical is not None:
        lines.append(f"pulses: {physical.record['status']}; checks "
                     f"{'all passed' if physical.record['all_checks_passed'] else 'FAILED'}")
        lines += pulse_plan_lines(physical, plan)  # per site: pulses, amplitudes, charge, the tightest check
    notes = _notes(plan, provenance if physical is None else {})  # physical limits: units converted by pint
    notes += signed
    return PlanRun(plan=plan, files=files, lines=tuple(lines + notes + ranges.lines()))


def _start_window(predictor, ctrl, n_in, n_out, from_trial, provenance):
    """The past window a plan starts from (rest, or the end of a recorded trial with the inputs applied before it
    that the controller's windows reach back to) and its description."""
    window_of = predictor if hasattr(predictor, "past_steps_") else ctrl  # a bare model: the controller's window
    if from_trial is None:
        u_past, y_past = rest_window(window_of, n_in, n_out)
        return u_past, y_past, "rest"
    path, index = from_trial
    with open_for_model(path, provenance) as session:  # our HDF5 layout: only the trial's last window is read
        u_past, y_past = trial_end_window(session, index, window_of, provenance)
        u_past = _applied_before(session, index, u_past, max(ctrl.energy_window_steps_ or 0,
                                                              getattr(ctrl, "history_steps_", 0) + 1) or None)
    return u_past, y_past, f"the end of trial {index} of {path}"


def _input_units(predictor, provenance):
    """The model's input units as recorded (empty when unknown)."""
    s = provenance.get("session", {}) if isinstance(provenance, dict) else {}
    return tuple(s.get("input_units") or getattr(predictor, "input_units_", None) or ())


def _robust_planner(predictor, limits, N, weight, input_weight, mode):
    """The planner robust over an ensemble's members (``--robust``); refuses a model that is not an ensemble."""
    from ...sysid import IntervalForm, InvalidParameterError
    from ..mpc.robust import RobustPlanner

    if not isinstance(predictor, IntervalForm):
        raise InvalidParameterError(f"--robust {mode} plans over the members of a bootstrap ensemble; this model is a "
                                    f"single {type(predictor).__name__}. Fit it with `stimsteer fit ... --bootstrap "
                                    "N` first.")
    return RobustPlanner(ensemble=predictor, limits=limits, horizon_steps=N, mode=mode, output_weight=weight,
                         input_weight=input_weight).fit()


def _what(provenance, ctrl) -> str:
    """The route, method and controller of a plan, for its title: "direct route, hankel (HankelPredictor) with
    DataPredictiveController"."""
    return f"{fitted_what(provenance)} with {type(ctrl).__name__}"


def _recorded_range(model_path, provenance, from_trial):
    """The outputs' recorded range from the session the model was fitted on (its file as the model records it,
    else beside the model file), else from the ``--from-trial`` session; ``(None, why)`` when neither is readable."""
    given = provenance.get("session_file") if isinstance(provenance, dict) else None
    candidates = []
    if given:
        candidates += [Path(given), Path(model_path).parent / Path(given).name]
    if from_trial is not None:
        candidates.append(Path(from_trial[0]))
    for path in candidates:
        if path.is_file():
            try:
                with open_session_source(path) as session:
                    return recorded_output_range(session), f"the session {path}"
            except (StimsteerError, OSError):
                continue
    why = f"nowhere: the fitted session {given} is not readable here" if given else \
        "nowhere: the model file names no session"
    return None, why + "; untargeted outputs are not flagged (give --from-trial SESSION:INDEX to read one)"


def _applied_before(session, index, u_past, window):
    """The inputs applied before the end of a trial, as far back as the energy budget's window reaches (its last
    ``window − 1`` samples, across trial boundaries: they were delivered), or ``u_past`` when that is longer."""
    if window is None or window - 1 <= len(u_past):
        return u_past
    stop = int(np.asarray(session.trials)[index, 1])
    u, _, _ = session.read(max(0, stop - (window - 1)), stop)
    return np.array(u, dtype=np.float64)


def _model_record(model_path, provenance, out_dir) -> dict:
    """What identifies the model a plan was made with: its file (relative to the plan folder when they share a
    parent folder, so the record survives moving both, e.g. the demo's output), the file's SHA-256, the hash of the
    session it was fitted on (from its provenance) and the package versions of this run."""
    model, out = Path(model_path).resolve(), Path(out_dir).resolve()
    shown = os.path.relpath(model, out) if out.parent in model.parents else str(model)
    digest = hashlib.sha256()
    with open(model, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    session = provenance.get("session", {}) if isinstance(provenance, dict) else {}
    return {"model_file": shown, "model_sha256": digest.hexdigest(),
            "session_content_hash": session.get("content_hash"), "versions": versions()}


def _notes(plan, provenance) -> list:
    """The summary lines after the first: solver notes, unit caution, cost terms, binding limits, slack."""
    lines = []
    if plan.message:
        lines.append(f"note: {plan.message}")
    lines += [f"broken limit: {b}" for b in plan.broken_limits]
    recorded = provenance.get("session", {}).get("input_units") if isinstance(provenance, dict) else None
    other = sorted({str(u) for u in (recorded or ()) if str(u).strip() not in _MICROAMPERE})
    if other:
        lines.append(f"note: the model's inputs were recorded in {', '.join(other)}, while the limits file declares "
                     "µA; the limits were applied to the recorded numbers as they are. Check that they match.")
    lines.append("cost: " + ", ".join(f"{k} {v:.4g}" for k, v in plan.cost_terms.items()))
    lines += [f"active: {s}" for s in plan.active_summary()] or ["active: no limit is binding"]
    if plan.slack_total > 0:
        lines.append(f"output bounds exceeded by up to {float(np.max(plan.output_slack)):.4g} (soft bounds)")
    return lines


def _channels(predictor, provenance):
    """Input and output names, output units and the sample rate of a saved predictor."""
    s = provenance.get("session", {}) if isinstance(provenance, dict) else {}
    src = predictor.state_space_model() if isinstance(predictor, StateSpaceForm) else None
    names_in = tuple(s.get("input_names") or (src.input_names if src else predictor.input_names_))
    names_out = tuple(s.get("output_names") or (src.output_names if src else predictor.output_names_))
    units = tuple(s.get("output_units") or ("a.u.",) * len(names_out))
    rate = float(s.get("sample_rate_hz") or (src.sample_rate_hz if src else
                                             getattr(predictor, "sample_rate_hz_", 1.0)))
    return names_in, names_out, units, rate


def write_plan(plan: Plan, out_dir, *, sample_rate_hz, output_units=None, tracked=None, extra=None,
               force=False, physical=None, input_units=None, ranges=None) -> dict:
    """Write a plan to a folder: table, stimulation pattern, figure and summary, atomically.

    Files: ``plan.csv`` (``time [s] @ <rate> Hz``, ``in:<name> [<input unit>]`` (``input_units``, default uA),
    ``out:<name> [<unit>]`` predicted, ``target:<name> [<unit>]`` for tracked outputs, ``lower:<name> [<input
    unit>]`` / ``upper:<name> [<input unit>]`` the window each
    step's input obeys), ``plan_pattern.csv`` (the inputs alone, in the pattern layout of ``stimsteer predict
    --pattern``), ``plan.png`` and ``plan.json`` (status, cost terms, active and broken limits, caution, and
    ``extra``; JSON-safe values by :func:`stimsteer.sysid._records.jsonable`). Both tables open with the plan's
    status on comment lines (``# status: ...``; readers skip them, e.g. ``pandas.read_csv(..., comment="#")``).

    Returns
    -------
    dict of str to Path
        ``csv``, ``pattern``, ``png``, ``json``.
    """
    out_dir = Path(out_dir)
    p = len(plan.output_names)
    units = tuple(output_units) if output_units else ("a.u.",) * p
    tracked = np.ones(p, bool) if tracked is None else np.asarray(tracked, bool)
    rate = float(sample_rate_hz)
    t = np.arange(plan.horizon_steps) / rate
    time_col = f"time [s] @ {rate:.12g} Hz"
    # the inputs' own unit (the model's, e.g. mA or uC/s under a stimulation mapping), so `predict` reads it back
    iu = [str(x) for x in (input_units or ("uA",) * len(plan.input_names))]
    ins = {f"in:{n} [{iu[i]}]": plan.inputs[:, i] for i, n in enumerate(plan.input_names)}
    table = {time_col: t, **ins}
    table.update({f"out:{n} [{u}]": plan.predicted_outputs[:, j] for j, (n, u) in enumerate(zip(plan.output_names,
                                                                                                   units))})
    if plan.target_kind == "output":
        table.update({f"target:{n} [{units[j]}]": plan.target[:, j] for j, n in enumerate(plan.output_names)
                      if tracked[j]})
    lb, ub = plan.step_bounds
    table.update({f"lower:{n} [{iu[i]}]": lb[:, i] for i, n in enumerate(plan.input_names)})
    table.update({f"upper:{n} [{iu[i]}]": ub[:, i] for i, n in enumerate(plan.input_names)})
    summary = jsonable({**plan.to_dict(), **(extra or {})})
    if ranges is not None:  # every output's predicted range and the flag on untargeted ones (issue 18)
        summary["output_ranges"] = jsonable(ranges.to_dict())
    head = _status_lines(plan)
    with atomic_dir(out_dir, force=force) as tmp:
        for name, frame in (("plan.csv", table), ("plan_pattern.csv", {time_col: t, **ins})):
            with open(tmp / name, "w", encoding="utf-8", newline="") as fh:
                fh.write(head)
                pd.DataFrame(frame).to_csv(fh, index=False, float_format="%.10g", lineterminator="\n")
        plan_figure(plan, t, units, tracked, ranges=ranges, what=(extra or {}).get("what", "")).savefig(
            tmp / "plan.png", dpi=110)
        pulse_files = {}
        if physical is not None:  # the pulse files and their checks (stimsteer.control.pulse_plan)
            base = {k: (extra or {}).get(k) for k in ("model_file", "model_sha256", "session_content_hash",
                                                      "versions")}
            summary["pulse_plan"] = jsonable(physical.write(tmp, plan, base))
            pulse_files = {f.split(".")[0] + "_" + f.split(".")[1]: out_dir / f for f in physical.record["files"]}
            # the pulses in physical units and the margin of every check (stimsteer.control.figures.pulse_plan)
            pulse_plan_figure_of(physical, plan, what=(extra or {}).get("what", "")).savefig(
                tmp / "plan_pulses.png", dpi=110)
            pulse_files["plan_pulses_png"] = out_dir / "plan_pulses.png"
        (tmp / "plan.json").write_text(json.dumps(summary, indent=2, allow_nan=False))
    return {**{k: out_dir / f for k, f in (("csv", "plan.csv"), ("pattern", "plan_pattern.csv"),
                                           ("png", "plan.png"), ("json", "plan.json"))}, **pulse_files}


def _status_lines(plan: Plan) -> str:
    """The comment lines that open both plan tables: the status first, then what a reader must know about it."""
    kind = "optimised plan" if plan.ok else "SAFE FALLBACK, not an optimised plan"
    lines = [f"# status: {plan.status} ({kind})"]
    if plan.message:
        lines.append(f"# note: {' '.join(plan.message.split())}")
    lines += [f"# broken limit: {b}" for b in plan.broken_limits]
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------------------------------------------- command line
def trial_ref(text):
    """``SESSION:INDEX`` of ``--from-trial``, as (path, index)."""
    path, sep, index = str(text).rpartition(":")
    if not sep or not path or not index.strip().lstrip("-").isdigit():
        raise argparse.ArgumentTypeError(f"expected SESSION:INDEX, e.g. session.h5:3; got {text!r}")
    return path, int(index)


def add_parser(sub) -> None:
    """Declare ``stimsteer plan`` and its options."""
    p = sub.add_parser("plan", help="plan stimulation towards a target under declared limits with a fitted model or "
                       "predictor; writes the plan table, pattern, figure and summary",
                       epilog="exit codes:\n" + "\n".join(textwrap.fill(text, 100, initial_indent=f"  {code}  ",
                                                                       subsequent_indent="     ")
                                                         for code, text in EXIT_CODES.items()),
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("model", metavar="MODEL_OR_PREDICTOR", help="model file written by `stimsteer fit` (either route)")
    p.add_argument("--target", required=True,
                   help="CSV of target outputs over the horizon (one column per tracked output, named after it), or "
                   "a constant 'name=value,name=value'; outputs not named are not tracked")
    p.add_argument("--limits", required=True, help="limits file (TOML, see stimsteer.control.limits)")
    p.add_argument("--out", required=True, help="output folder (must be new or empty, unless --force)")
    add_window_options(p, past=None, horizon="planning horizon", default="default: the target table's rows, "
                       "else the predictor's horizon, else the horizon the model was scored at by `fit`")
    p.add_argument("--from-trial", type=trial_ref, metavar="SESSION:INDEX",
                   help="plan from the end of this recorded trial (default: from rest)")
    p.add_argument("--output-weight", type=float, default=1.0, help="weight of output tracking (default 1)")
    p.add_argument("--input-weight", type=float, default=1e-3, help="weight of input energy per uA^2 (default 1e-3)")
    p.add_argument("--robust", choices=["worst", "average"],
                   help="with a model fitted with --bootstrap N: plan robust over its members, minimising the worst "
                   "member's cost or their average (default: plan with the members' mean)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    p.add_argument("--stimulation", metavar="FILE", help="stimulation description of the model's inputs (TOML, see "
                   "stimsteer.sysid.stimulation); with physical limits, plan also writes the parameter table and "
                   "the pulse list (CSV, NWB) with every safety check")
    p.add_argument("--flag-fraction", type=float, default=FLAG_FRACTION, dest="flag_fraction", metavar="F",
                   help="flag an untargeted output whose predicted move exceeds this fraction of its recorded range "
                   f"(default {FLAG_FRACTION})")


def _delivered(done) -> bool:
    """The pulse list holds the plan (no check failed)."""
    return not json.loads(Path(done.files["json"]).read_text())["pulse_plan"]["status"].startswith("not delivered")


def run(args) -> int:
    """Run ``stimsteer plan`` from parsed arguments."""
    done = plan_to_folder(args.model, target=args.target, limits_path=args.limits, out_dir=args.out,
                         horizon_steps=args.horizon, from_trial=args.from_trial,
                         output_weight=args.output_weight, input_weight=args.input_weight, force=args.force,
                         stimulation=args.stimulation, robust=getattr(args, "robust", None),
                         flag_fraction=args.flag_fraction)
    print("\n".join(done.lines))
    print(f"wrote {', '.join(str(p) for p in done.files.values())}")
    print(CAUTION)
    if done.plan.ok and done.files.get("plan_pulses_csv") is None or done.plan.ok and _delivered(done):
        return 0
    sys.stderr.write(f"stimsteer plan: the plan is {done.plan.status}: the safe fallback was written (its files say "
                     f"so); exit code {EXIT_NOT_OPTIMAL}\n")
    return EXIT_NOT_OPTIMAL
