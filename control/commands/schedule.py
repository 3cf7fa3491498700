"""``stimsteer schedule``: an exciting stimulation schedule for the next session, inside the declared limits, as a
CSV file that opens with the caution."""

from __future__ import annotations

import re
import sys
import warnings

from ...sysid import InvalidParameterError, LimitsError, StimsteerError, required_order
from ...sysid.exceptions import StimsteerWarning
from ...sysid.caution import CAUTION
from ..limits import load_limits
from ..schedule import SCHEDULE_KINDS, design_schedule, save_schedule
from ._common import add_window_options, claimed, window_steps

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    """Declare ``stimsteer schedule`` and its options."""
    p = subparsers.add_parser("schedule", help="design an exciting stimulation schedule for the next session, inside "
                              "the declared limits, and write it as a CSV")
    p.add_argument("--limits", required=True, help="limits file (TOML, see stimsteer.control.limits)")
    p.add_argument("--inputs", type=int, help="number of stimulation inputs, a check against the limits file "
                   "(default: the inputs the limits file declares)")
    p.add_argument("--order", type=int,
                   help="excitation order to guarantee: past window + horizon + expected number of states "
                   "(or give --past and --horizon instead)")
    add_window_options(p, past="past window the next fits will use", horizon="prediction / control horizon",
                       default="at --rate-hz; give both, or --order")
    p.add_argument("--states", type=int, help="expected number of states (default: the past window)")
    p.add_argument("--out", required=True, help="schedule file to write (CSV)")
    p.add_argument("--kind", choices=list(SCHEDULE_KINDS), default="prbs", help="signal family (default prbs)")
    p.add_argument("--rate-hz", type=float, default=1000.0, help="sample rate of the schedule (default 1000)")
    p.add_argument("--trials", type=int, help="number of trials (default: enough for the order, at least 4)")
    p.add_argument("--trial-s", type=float, default=10.0, help="trial length in seconds (default 10)")
    p.add_argument("--rest-s", type=float, default=2.0, help="rest before, between and after trials (default 2)")
    p.add_argument("--seed", type=int, default=0, help="seed of every random choice (default 0)")
    p.add_argument("--hold-steps", type=int, help="samples each value is held (prbs, multilevel; default 1, or for "
                   "prbs under a slew limit the fewest samples a full swing needs, so the declared window is used)")
    p.add_argument("--levels", type=int, default=5, help="number of levels (multilevel; default 5)")
    p.add_argument("--pulse-rate-hz", type=float, help="mean pulse rate (pulses; default rate / 5)")
    p.add_argument("--band-hz", type=float, help="highest excited frequency (multisine; default Nyquist)")
    p.add_argument("--energy-window-steps", type=int,
                   help="window of the limits' energy budget, samples (default --order, which also covers any "
                   "shorter planning horizon)")
    p.add_argument("--force", action="store_true", help="replace an existing schedule file")


def _order(args) -> int:
    if args.order is not None:
        return args.order
    if args.past is None or args.horizon is None:
        raise InvalidParameterError("give --order K, or --past and --horizon (e.g. 40ms or 10samples; optionally "
                                    "--states) so the order past + horizon + states can be derived.")
    if not (args.rate_hz > 0):
        raise InvalidParameterError(f"--rate-hz must be a positive number of samples per second; got {args.rate_hz}.")
    past = window_steps(args.past, args.rate_hz, "--past")
    horizon = window_steps(args.horizon, args.rate_hz, "--horizon")
    order = required_order(past, horizon, args.states)
    states = f"states {args.states}" if args.states is not None else "states (assumed = past window)"
    print(f"order {order} = past window {past} + horizon {horizon} + {states} (samples at {args.rate_hz:g} Hz)")
    return order


# the API's parameter names in its messages, and the flags a user of this command types instead
_FLAGS = {"sample_rate_hz": "--rate-hz", "n_levels": "--levels", "n_trials": "--trials", "trial_s": "--trial-s",
          "rest_s": "--rest-s", "hold_steps": "--hold-steps", "pulse_rate_hz": "--pulse-rate-hz",
          "band_hz": "--band-hz", "energy_window_steps": "--energy-window-steps", "min_interval_steps": None}
_NAMES = re.compile(r"(?<![\w-])(" + "|".join(_FLAGS) + r")(?![\w-])")


def _design(args, limits, order):
    """``design_schedule`` with the command's settings; its messages name the flags, not the API's parameters."""
    try:
        return design_schedule(
            limits, order=order, kind=args.kind, sample_rate_hz=args.rate_hz, n_trials=args.trials,
            trial_s=args.trial_s, rest_s=args.rest_s, seed=args.seed, energy_window_steps=args.energy_window_steps,
            hold_steps=args.hold_steps, n_levels=args.levels, pulse_rate_hz=args.pulse_rate_hz,
            band_hz=args.band_hz,
        )
    except StimsteerError as exc:
        text = _NAMES.sub(lambda m: _FLAGS[m.group(1)] or "the minimum inter-pulse interval", str(exc))
        text = re.sub(r"^order must be", "--order must be", text)
        if text == str(exc):
            raise
        raise type(exc)(text) from None


def run(args) -> int:
    """Design the schedule, write it, print its summary; 0 on success."""
    with claimed(args.out, force=args.force, command="schedule"):
        order = _order(args)
        limits = load_limits(args.limits)
        if args.inputs is not None and limits.n_inputs != args.inputs:
            raise LimitsError(f"{args.limits} declares limits for {limits.n_inputs} input(s) but --inputs is "
                              f"{args.inputs}; declare one [inputs.<name>] table per input or fix --inputs.")
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", StimsteerWarning)
            schedule = _design(args, limits, order)
        save_schedule(schedule, args.out, overwrite=args.force)
    for w in caught:  # after the file is written: a refused output stays one line
        sys.stderr.write(f"stimsteer schedule: warning: {w.message}\n")
    print(schedule.to_text())
    print(f"schedule written to {args.out}")
    print(CAUTION)
    return 0
