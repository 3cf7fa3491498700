"""The ``stimsteer`` command: one subcommand per user task.

A thin shell: parse, load, call the public API, print. No numerics here. Every toolkit error becomes one line on
stderr and exit code 2; nothing is half-written (outputs go through ``stimsteer.sysid._files``).

Each subcommand is a pair: ``_add_<name>(subparsers)`` declares its options and ``_run_<name>(args)`` does the work.
Register a new pair in ``_SUBCOMMANDS``.
"""

from __future__ import annotations

import argparse
import os
import sys

from ..sysid.caution import CAUTION
from ..sysid.exceptions import StimsteerError

__all__ = ["main", "build_parser", "CAUTION"]



class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit code 2."""

    def error(self, message):
        sys.stderr.write(f"stimsteer: error: {message} (see `{self.prog} --help`)\n")
        sys.exit(2)


# ---------------------------------------------------------------------------------------------------- inspect
def _add_inspect(sub):
    p = sub.add_parser("inspect", help="summarise a session: channels, rate, trials, gaps, flat or saturated channels")
    p.add_argument("session", help="session file (our HDF5 layout, CSV/Parquet table, or NWB)")
    p.add_argument("--past-steps", dest="past", type=int, default=10, metavar="N",
                   help="past window of the direct route, in samples, for the excitation check (default 10)")
    p.add_argument("--horizon-steps", dest="horizon", type=int, default=20, metavar="N",
                   help="prediction horizon of the direct route, in samples, for the excitation check (default 20)")
    p.add_argument("--states", type=int, default=None, metavar="N",
                   help="state dimension assumed by the excitation check (default: the past window)")
    return p


def _run_inspect(args):
    from ..sysid.excitation import excitation_report
    from ..sysid.quality import describe_session
    from ..sysid.routes import open_session_source

    with open_session_source(args.session) as session:  # our HDF5 layout is read lazily, in one pass each
        print(describe_session(session).to_text())
        print(excitation_report(session, past_steps=args.past, horizon_steps=args.horizon,
                                n_states=args.states).to_text())
    return 0


# ---------------------------------------------------------------------------------------------------- demo
def _add_demo(sub):
    p = sub.add_parser("demo", help="run the whole job on the shipped demo session and write the outputs to --out")
    p.add_argument("--out", required=True, help="output folder (must be new or empty, unless --force)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    return p


def _run_demo(args):
    from .demo import run_demo

    run_demo(args.out, force=args.force, echo=print)
    return 0


# ---------------------------------------------------------------------------------------------------- fit
def _fraction(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1; got {text!r}") from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"expected a number strictly between 0 and 1; got {value:g}")
    return value


def _add_fit(sub):
    p = sub.add_parser("fit", help="fit a predictor on training trials, score it on held-out trials, save it")
    p.add_argument("session", help="session file (our HDF5 layout is read lazily; CSV/Parquet/NWB are loaded)")
    p.add_argument("--route", required=True, choices=["indirect", "direct"], help="model (indirect) or data (direct)")
    p.add_argument("--method", required=True, choices=["arx", "subspace", "lsq", "hankel"],
                   help="indirect: arx, subspace; direct: lsq, hankel")
    p.add_argument("--out", required=True, help="model file to write (HDF5)")
    p.add_argument("--horizon-steps", dest="horizon", type=int, metavar="N",
                   help="prediction horizon in samples (scored; direct methods fit it)")
    p.add_argument("--past-steps", dest="past", type=int, metavar="N",
                   help="past window in samples (arx: output and input lags)")
    p.add_argument("--seed", type=int, default=0, help="seed of the held-out trial split (default 0)")
    p.add_argument("--test-fraction", type=_fraction, default=0.25, help="share of trials held out (default 0.25)")
    p.add_argument("--centre-outputs", action="store_true",
                   help="subspace, lsq, hankel: fit on the outputs minus their training mean (for a baseline "
                   "offset); predictions and plans stay in the recorded units (arx fits an intercept instead)")
    p.add_argument("--force", action="store_true", help="replace an existing model file")
    return p


def _echo_warnings(command, caught):
    for w in caught:
        sys.stderr.write(f"stimsteer {command}: warning: {w.message}\n")


def _run_fit(args):
    import warnings
    from pathlib import Path

    from ..sysid.routes import fit_route, open_session_source
    from ..sysid.storage import save_predictor

    if Path(args.out).exists() and not args.force:
        raise StimsteerError(f"model file {args.out} already exists; choose another --out or pass --force.")
    settings = {} if args.past is None else {"past_steps": args.past}
    if args.centre_outputs:
        if args.method == "arx":
            raise StimsteerError("--centre-outputs is for the subspace, lsq and hankel methods; ridge ARX fits an "
                                 "intercept of its own.")
        settings["centre_outputs"] = True
    with warnings.catch_warnings(record=True) as caught, open_session_source(args.session) as session:
        warnings.simplefilter("always")
        result = fit_route(session, route=args.route, method=args.method, settings=settings, seed=args.seed,
                           test_fraction=args.test_fraction, horizon_steps=args.horizon)
    _echo_warnings("fit", caught)
    provenance = {**result.provenance, "session_file": str(args.session)}
    save_predictor(result.predictor, args.out, provenance=provenance, overwrite=args.force)
    split = result.split
    print(f"{args.route} / {args.method}: {type(result.predictor).__name__} fitted on trials {list(split.train)}")
    print("selection (training trials only):")
    print(result.selection_table.to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    print(f"held-out scores on trials {list(split.test)} (seed {split.seed}; means over output channels):")
    print(result.heldout.to_text())
    print(f"model written to {args.out}")
    return 0


# ---------------------------------------------------------------------------------------------------- predict
def _trial_ref(text):
    path, sep, index = str(text).rpartition(":")
    if not sep or not path or not index.strip().lstrip("-").isdigit():
        raise argparse.ArgumentTypeError(f"expected SESSION:INDEX, e.g. session.h5:3; got {text!r}")
    return path, int(index)


def _add_predict(sub):
    p = sub.add_parser("predict", help="predict the response to a stimulation pattern with a fitted model")
    p.add_argument("model", help="model file written by `stimsteer fit`")
    p.add_argument("--pattern", required=True,
                   help="CSV of inputs: 'time [s]' and one 'in:<name> [<unit>]' column per model input")
    p.add_argument("--out", required=True, help="output folder for prediction.csv and prediction.png")
    p.add_argument("--from-trial", type=_trial_ref, metavar="SESSION:INDEX",
                   help="start from the end of this recorded trial (default: from rest)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    return p


def _run_predict(args):
    from ..sysid.routes import load_pattern, open_session_source, predict_pattern, trial_end_window
    from .commands.predict import write_prediction
    from ..sysid.storage import load_predictor

    predictor, provenance = load_predictor(args.model)
    pattern = load_pattern(args.pattern)
    past, start = None, "rest"
    if args.from_trial is not None:
        path, index = args.from_trial
        with open_session_source(path) as session:  # our HDF5 layout: only the trial's last window is read
            past = trial_end_window(session, index, predictor, provenance)
        start = f"the end of trial {index} of {path}"
    prediction = predict_pattern(predictor, provenance, pattern, past=past, start=start)
    files = write_prediction(prediction, args.out, force=args.force)
    print(f"predicted {len(prediction.output_names)} output(s) over {pattern.u.shape[0]} samples from {start}")
    print(f"wrote {files['csv']} and {files['png']}")
    print(CAUTION)
    return 0


# ---------------------------------------------------------------------------------------------------- network
def _add_network(sub):
    p = sub.add_parser("network", help="network-control tables and figures of a fitted state-space model: "
                       "controllability, site ranking, minimum-energy transitions")
    p.add_argument("model", help="model file written by `stimsteer fit --route indirect`")
    p.add_argument("--out", required=True, help="output folder for the CSV tables and PNG figures")
    p.add_argument("--target", metavar="PATTERN",
                   help="target activity pattern: one value per recorded channel, comma-separated (e.g. "
                   "'0.5,0,1.2'), or a CSV file holding such a row (optionally under a header of channel names)")
    p.add_argument("--start", metavar="PATTERN", help="start pattern, same forms as --target (default: rest)")
    p.add_argument("--horizon-steps", type=int, help="samples of the minimum-energy transition (default 2 x states)")
    p.add_argument("--max-set-size", type=int, choices=[1, 2, 3], default=2,
                   help="largest number of sites stimulated together in the ranking (default 2)")
    p.add_argument("--normalise", action="store_true",
                   help="analyse A / (1 + sigma_max(A)) for Gramian and site controllability (Gu et al. 2015); "
                   "default: the fitted A as it is")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    return p


def _run_network(args):
    from ..sysid.storage import load_predictor
    from .figures_network import read_pattern, state_space_of, write_network_outputs

    if args.start is not None and args.target is None:
        raise StimsteerError("--start needs --target: give the pattern to move to as well.")
    predictor, provenance = load_predictor(args.model)
    model = state_space_of(predictor, args.model)
    target = None if args.target is None else read_pattern(args.target, model.output_names)
    start = None if args.start is None else read_pattern(args.start, model.output_names)
    recorded = provenance.get("session") if isinstance(provenance, dict) else None
    units = {k: recorded.get(k) for k in ("input_units", "output_units")} if isinstance(recorded, dict) else {}
    result = write_network_outputs(model, args.out, target=target, start=start, horizon_steps=args.horizon_steps,
                                   max_set_size=args.max_set_size, normalise=args.normalise, force=args.force,
                                   **units)
    print("\n".join(result.lines))
    print(f"wrote {len(result.files)} files to {args.out}: " + ", ".join(sorted(p.name for p in result.files.values())))
    if target is not None:
        print("note: the minimum-energy input is a figure of the model, not a stimulation plan: no declared limit "
              "was applied to it. Design stimulation with `stimsteer plan --limits`.")
    print(CAUTION)
    return 0


# ---------------------------------------------------------------------------------------------------- schedule
def _add_schedule(sub):
    p = sub.add_parser("schedule", help="design an exciting stimulation schedule for the next session, inside the "
                       "declared limits, and write it as a CSV")
    p.add_argument("--limits", required=True, help="limits file (TOML, see stimsteer.control.limits)")
    p.add_argument("--inputs", required=True, type=int, help="number of stimulation inputs (must match the limits)")
    p.add_argument("--order", type=int,
                   help="excitation order to guarantee: past window + horizon + expected number of states "
                   "(or give --past-steps and --horizon-steps instead)")
    p.add_argument("--past-steps", type=int, help="past window the next fits will use, samples")
    p.add_argument("--horizon-steps", type=int, help="prediction / control horizon, samples")
    p.add_argument("--states", type=int, help="expected number of states (default: the past window)")
    p.add_argument("--out", required=True, help="schedule file to write (CSV)")
    p.add_argument("--kind", choices=["pulses", "prbs", "multilevel", "multisine"], default="prbs",
                   help="signal family (default prbs)")
    p.add_argument("--rate-hz", type=float, default=1000.0, help="sample rate of the schedule (default 1000)")
    p.add_argument("--trials", type=int, help="number of trials (default: enough for the order, at least 4)")
    p.add_argument("--trial-s", type=float, default=10.0, help="trial length in seconds (default 10)")
    p.add_argument("--rest-s", type=float, default=2.0, help="rest before, between and after trials (default 2)")
    p.add_argument("--seed", type=int, default=0, help="seed of every random choice (default 0)")
    p.add_argument("--hold-steps", type=int, default=1, help="samples each value is held (prbs, multilevel)")
    p.add_argument("--levels", type=int, default=5, help="number of levels (multilevel; default 5)")
    p.add_argument("--pulse-rate-hz", type=float, help="mean pulse rate (pulses; default rate / 5)")
    p.add_argument("--band-hz", type=float, help="highest excited frequency (multisine; default Nyquist)")
    p.add_argument("--energy-window-steps", type=int,
                   help="window of the limits' energy budget, samples (default --order, which also covers any "
                   "shorter planning horizon)")
    p.add_argument("--force", action="store_true", help="replace an existing schedule file")
    return p


def _run_schedule(args):
    from ..sysid.excitation import required_order
    from ..sysid.exceptions import LimitsError
    from ..sysid.schedule import design_schedule, save_schedule
    from .limits import load_limits

    order = args.order
    if order is None:
        if args.past_steps is None or args.horizon_steps is None:
            raise StimsteerError("give --order K, or --past-steps and --horizon-steps (and optionally --states) so "
                                 "the order past + horizon + states can be derived.")
        order = required_order(args.past_steps, args.horizon_steps, args.states)
        print(f"order {order} = past window {args.past_steps} + horizon {args.horizon_steps} + "
              f"{'states ' + str(args.states) if args.states is not None else 'states (assumed = past window)'}")
    limits = load_limits(args.limits)
    if limits.n_inputs != args.inputs:
        raise LimitsError(f"{args.limits} declares limits for {limits.n_inputs} input(s) but --inputs is "
                          f"{args.inputs}; declare one [inputs.<name>] table per input or fix --inputs.")
    lo, hi = limits.input_bounds()
    schedule = design_schedule(
        n_inputs=args.inputs, order=order, lo=lo, hi=hi, slew=limits.slew_max_ua, kind=args.kind,
        sample_rate_hz=args.rate_hz, n_trials=args.trials, trial_s=args.trial_s, rest_s=args.rest_s,
        seed=args.seed, input_names=limits.input_names, energy_budget=limits.energy_budget_ua2,
        energy_window_steps=args.energy_window_steps, hold_steps=args.hold_steps, n_levels=args.levels,
        pulse_rate_hz=args.pulse_rate_hz, band_hz=args.band_hz,
    )
    save_schedule(schedule, args.out, overwrite=args.force)
    print(schedule.to_text())
    print(f"schedule written to {args.out}")
    print(CAUTION)
    return 0


# ---------------------------------------------------------------------------------------------------- plan
def _add_plan(sub):
    p = sub.add_parser("plan", help="plan stimulation towards a target under declared limits with a fitted model or "
                       "predictor; writes the plan table, pattern, figure and summary")
    p.add_argument("model", metavar="MODEL_OR_PREDICTOR", help="model file written by `stimsteer fit` (either route)")
    p.add_argument("--target", required=True,
                   help="CSV of target outputs over the horizon (one column per tracked output, named after it), or "
                   "a constant 'name=value,name=value'; outputs not named are not tracked")
    p.add_argument("--limits", required=True, help="limits file (TOML, see stimsteer.control.limits)")
    p.add_argument("--out", required=True, help="output folder (must be new or empty, unless --force)")
    p.add_argument("--horizon-steps", type=int, dest="horizon_steps", metavar="N",
                   help="planning horizon in samples (default: the target table's rows, else the predictor's horizon)")
    p.add_argument("--from-trial", type=_trial_ref, metavar="SESSION:INDEX",
                   help="plan from the end of this recorded trial (default: from rest)")
    p.add_argument("--output-weight", type=float, default=1.0, help="weight of output tracking (default 1)")
    p.add_argument("--input-weight", type=float, default=1e-3, help="weight of input energy per uA^2 (default 1e-3)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    return p


def _run_plan(args):
    from .mpc import plan_to_folder

    run = plan_to_folder(args.model, target=args.target, limits_path=args.limits, out_dir=args.out,
                         horizon_steps=args.horizon_steps, from_trial=args.from_trial,
                         output_weight=args.output_weight, input_weight=args.input_weight, force=args.force)
    print("\n".join(run.lines))
    print(f"wrote {', '.join(str(p) for p in run.files.values())}")
    print(CAUTION)
    return 0


# ---------------------------------------------------------------------------------------------------- bench
def _add_bench(sub):
    p = sub.add_parser("bench", help="benchmark the indirect and direct routes on the same held-out trials "
                       "(prediction, closed-loop control, data-length, noise and horizon sweeps) and write a report")
    p.add_argument("session", help="session file (our HDF5 layout, CSV/Parquet table, or NWB)")
    p.add_argument("--out", required=True, help="output folder for the report (must be new or empty, unless --force)")
    p.add_argument("--scheduler", metavar="ADDR",
                   help="run the tasks on a Dask cluster, e.g. tcp://host:8786 (needs the dist extra); default: the "
                   "local cores")
    p.add_argument("--limits", metavar="LIMITS.toml",
                   help="declared stimulation limits (TOML); default: the recorded input range of the training trials")
    p.add_argument("--plant", metavar="PLANT.h5",
                   help="ground-truth plant of a simulated session: closed loops run on it and the noise sweep "
                   "re-records from it (default: a surrogate plant fitted on the held-out trials)")
    p.add_argument("--seed", type=int, default=0, help="master seed of splits, subsets and plant noise (default 0)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local worker processes (default: all available cores; 1 runs in this process)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder whole")
    p.add_argument("--quick", action="store_true", help="a fast look: 2 splits, one point per sweep, short loops")
    return p


def _run_bench(args):
    from pathlib import Path

    from ..sysid.io import load_session
    from .evaluation import BenchSettings, run_bench
    from .limits import load_limits
    from .plants import load_plant
    from .report import REPORT_FILE, check_out_dir, summarize

    if args.workers is not None and args.workers < 1:
        raise StimsteerError(f"--workers must be at least 1; got {args.workers}.")
    check_out_dir(args.out, force=args.force)
    session = load_session(args.session)
    plant = None if args.plant is None else load_plant(args.plant)
    limits = None if args.limits is None else load_limits(args.limits)
    settings = (BenchSettings.quick if args.quick else BenchSettings)(seed=args.seed)
    source = {"session_file": str(args.session), "plant_file": args.plant, "limits_file": args.limits}
    result = run_bench(session, settings, plant=plant, limits=limits, out_dir=args.out, force=args.force,
                       scheduler=args.scheduler, n_workers=args.workers, progress=sys.stderr.isatty(),
                       source=source)
    print("\n".join(f"- {line}" for line in summarize(result)))
    print(f"report written to {Path(args.out) / REPORT_FILE}")
    print(CAUTION)
    return 0


_SUBCOMMANDS = {
    "fit": (_add_fit, _run_fit),
    "predict": (_add_predict, _run_predict),
    "network": (_add_network, _run_network),
    "schedule": (_add_schedule, _run_schedule),
    "plan": (_add_plan, _run_plan),
    "bench": (_add_bench, _run_bench),
    "inspect": (_add_inspect, _run_inspect),
    "demo": (_add_demo, _run_demo),
}


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="stimsteer",
        description="Check stimulation sessions, fit predictors of the stimulated response, design stimulation "
        "under declared limits, and benchmark the indirect (model) and direct (data) routes. " + CAUTION,
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for name, (add, _run) in _SUBCOMMANDS.items():
        add(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _add, run = _SUBCOMMANDS[args.command]
    try:
        return int(run(args) or 0)
    except StimsteerError as exc:
        return _fail(args.command, str(exc), 2)
    except (FileNotFoundError, IsADirectoryError, NotADirectoryError, PermissionError) as exc:
        return _fail(args.command, f"{exc.strerror or exc}: {exc.filename}", 2)
    except KeyboardInterrupt:
        return _fail(args.command, "interrupted; no partial output was kept.", 130)
    except Exception as exc:  # a bug, not bad input: still one line, with the way to see the traceback
        if os.environ.get("STIMSTEER_DEBUG"):
            raise
        return _fail(args.command, f"internal error ({type(exc).__name__}: {exc}); please report it with the "
                     "command you ran (set STIMSTEER_DEBUG=1 to see the traceback).", 1)


def _fail(command: str, message: str, code: int) -> int:
    sys.stderr.write(f"stimsteer {command}: error: {' '.join(message.split())}\n")
    return code


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
