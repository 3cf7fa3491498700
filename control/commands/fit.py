"""``stimsteer fit``: fit a predictor on training trials, score it on held-out trials, save it with its provenance."""

from __future__ import annotations

import argparse
import sys
import warnings

from ...sysid import METHODS, InvalidParameterError, SessionError, fit_route, save_predictor
from ...sysid.routes import _factory
from ...sysid.window_defaults import resolve_windows
from ._common import add_channel_options, add_window_options, claimed, open_selected, whole_number

__all__ = ["add_parser", "run"]


def _fraction(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1; got {text!r}") from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"expected a number strictly between 0 and 1; got {value:g}")
    return value


def add_parser(subparsers) -> None:
    """Declare ``stimsteer fit`` and its options."""
    p = subparsers.add_parser("fit", help="fit a predictor on training trials, score it on held-out trials, save it")
    p.add_argument("session", help="session file (our HDF5 layout is read lazily; CSV/Parquet/NWB are loaded)")
    p.add_argument("--route", required=True, choices=["indirect", "direct"], help="model (indirect) or data (direct)")
    by_route = {}
    for route, method in METHODS:  # the registry decides: a registered method is a choice at once
        by_route.setdefault(route, []).append(method)
    p.add_argument("--method", required=True, choices=sorted({m for _, m in METHODS}),
                   help="; ".join(f"{r}: {', '.join(ms)}" for r, ms in sorted(by_route.items())))
    p.add_argument("--out", required=True, help="model file to write (HDF5)")
    add_window_options(p, past="past window (arx: output and input lags, chosen by cross-validation when not "
                       "given)", horizon="prediction horizon (scored; direct methods fit it)")
    add_channel_options(p)
    p.add_argument("--delay-steps", dest="delay", type=whole_number(0), metavar="N",
                   help="arx: input delay in samples, 0 = direct feed-through (default: chosen from 0 to 3 by "
                   "cross-validation)")
    p.add_argument("--seed", type=whole_number(0), default=0, help="seed of the held-out trial split (default 0)")
    p.add_argument("--test-fraction", type=_fraction, default=0.25, help="share of trials held out (default 0.25)")
    p.add_argument("--centre-outputs", action="store_true",
                   help="subspace, lsq, hankel: fit on the outputs minus their training mean (for a baseline "
                   "offset); predictions and plans stay in the recorded units (arx fits an intercept instead)")
    p.add_argument("--force", action="store_true", help="replace an existing model file")


def _settings(args) -> dict:
    settings = {}
    if getattr(args, "delay", None) is not None:
        if args.method != "arx":
            raise InvalidParameterError("--delay-steps is for the arx method; the other methods take the delay from "
                                        "their past window.")
        settings["delay_samples"] = args.delay
    if args.centre_outputs:
        if args.method == "arx":
            raise InvalidParameterError("--centre-outputs is for the subspace, lsq and hankel methods; ridge ARX fits "
                                        "an intercept of its own.")
        settings["centre_outputs"] = True
    return settings


#: Rows of a long selection table printed by ``fit`` (the best ones and the selected one; the model file has all).
_SHOWN_ROWS = 10


def _selection_text(result) -> str:
    """The selection table (its best rows when long, the selected row always) and the selection notes."""
    table = result.selection_table
    shown = table
    if len(table) > _SHOWN_ROWS:
        keep = set(range(_SHOWN_ROWS))
        if "selected" in table.columns:
            keep |= set(int(i) for i in table.index[table["selected"].astype(bool)])
        shown = table.iloc[sorted(keep)]
    lines = [shown.to_string(index=False, float_format=lambda v: f"{v:.4g}")]
    if len(shown) < len(table):
        lines.append(f"({len(shown)} of {len(table)} candidates shown, the selected one first; all are in the model "
                     "file)")
    lines += [f"note: {n}" for n in result.selection_notes]
    return "\n".join(lines)


def run(args) -> int:
    """Claim the model file, fit, save it, print the selection and held-out scores; 0 on success."""
    settings = _settings(args)
    with claimed(args.out, force=args.force, command="fit"):
        result = _fit(args, settings)
        provenance = {**result.provenance, "session_file": str(args.session)}
        save_predictor(result.predictor, args.out, provenance=provenance, overwrite=args.force)
    split = result.split
    print(f"{args.route} / {args.method}: {type(result.predictor).__name__} fitted on trials {list(split.train)}")
    print("selection (training trials only):")
    print(_selection_text(result))
    print(f"held-out scores on trials {list(split.test)} (seed {split.seed}; means over output channels):")
    print(result.heldout.to_text())
    print(f"model written to {args.out}")
    return 0


def _fit(args, settings):
    """``fit_route`` on the session file (its channel selection applied, its windows resolved at its rate); its
    warnings become one stderr line each."""
    with warnings.catch_warnings(record=True) as caught, open_selected(args.session, args) as session:
        warnings.simplefilter("always")
        past, horizon, note = resolve_windows(session, args.past, args.horizon)
        if args.method == "arx" and args.past is None:
            past = None  # ridge ARX chooses its lags by cross-validation
            note = (note or "") + " (arx: its lags, the past window, are chosen by cross-validation instead.)"
        if note:
            print(note)
        takes_past = "past_steps" in _factory(args.route, args.method).parameters()
        if past is not None and (args.past is not None or takes_past):
            settings = {**settings, "past_steps": past}  # a default only to a method that takes a past window
        try:
            result = fit_route(session, route=args.route, method=args.method, settings=settings, seed=args.seed,
                               test_fraction=args.test_fraction, horizon_steps=horizon)
        except (InvalidParameterError, SessionError) as exc:
            # the estimator names its own settings; say which option set them
            given = [f"{value.option or '--' + name} {value}" for name, value in (("past", args.past),
                                                                                   ("horizon", args.horizon))
                     if value is not None]
            why = " and ".join(given) if given else "the defaults from the data"
            raise type(exc)(f"{exc} (the window came from {why}: past {past} and horizon {horizon} samples)") \
                from None
    for w in caught:
        sys.stderr.write(f"stimsteer fit: warning: {w.message}\n")
    return result
