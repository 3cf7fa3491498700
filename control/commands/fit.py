"""``stimsteer fit``: fit a predictor on training trials, score it on held-out trials, save it with its provenance."""

from __future__ import annotations

import argparse
import contextlib
import sys
import warnings

from ...sysid import METHODS, InvalidParameterError, SessionError, fit_route, save_predictor
from ...sysid._files import atomic_path
from ...sysid.routes import _factory
from ...sysid.window_defaults import resolve_windows
from . import _fit_changes as changes
from ._common import add_channel_options, add_window_options, claimed, open_selected, whole_number, window_length
from .convert import add_blank_option, blank_outputs

__all__ = ["add_parser", "run"]


def _fraction(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number between 0 and 1; got {text!r}") from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"expected a number strictly between 0 and 1; got {value:g}")
    return value


def _forgetting(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number in (0, 1]; got {text!r}") from None
    if not 0.0 < value <= 1.0:
        raise argparse.ArgumentTypeError(f"expected a number in (0, 1] (1 = no forgetting; 0.99 remembers about 100 "
                                         f"samples); got {value:g}")
    return value


#: Method settings from the command line: option (argparse dest), the method that takes it, the setting it feeds.
_METHOD_OPTIONS = (("forgetting", "recursive", "forgetting"), ("dictionary", "lifted", "dictionary"),
                   ("dictionary_size", "lifted", "n_features"), ("knots", "hammerstein", "n_knots"))


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
    p.add_argument("--bootstrap", type=whole_number(2), metavar="N",
                   help="fit N members of the method on bootstrap resamples of the training trials (an ensemble "
                   "with prediction intervals); prints the held-out coverage of its 95 %% intervals")
    p.add_argument("--conditions", action="store_true",
                   help="also fit one model per condition on its training trials (labels from the session table's "
                   "'condition' column or its metadata 'trial_conditions'), score each against the pooled model on the held-out trials, and report "
                   "step gains per condition with 95 %% bootstrap intervals; writes the folder MODEL_conditions/ "
                   "beside --out (condition_<label>.h5 model files, conditions.csv, step_gains.csv)")
    p.add_argument("--trial-windows", dest="trial_windows", type=whole_number(2), metavar="K",
                   help="also report how the model changes over the session: one model per window of K consecutive "
                   "training trials, its step gains with 95 %% bootstrap intervals over the window's trials; "
                   "writes MODEL_trial_windows.csv beside --out")
    p.add_argument("--gain-after", dest="gain_after", type=window_length("--gain-after"), metavar="LENGTH",
                   help="with --conditions or --trial-windows: read the step gains this long after the step, a time "
                   "(500ms, 0.5s) or a number of samples (50samples); default from the data: 3 x the recording's "
                   "memory, at most the shortest trial")
    p.add_argument("--window-step", dest="window_step", type=whole_number(1), metavar="S",
                   help="with --trial-windows: trials between the starts of two windows (default K: windows that do "
                   "not overlap)")
    p.add_argument("--forgetting", type=_forgetting, metavar="F",
                   help="recursive: forgetting factor in (0, 1] (default 1, no forgetting; 0.99 remembers about 100 "
                   "samples)")
    p.add_argument("--dictionary", choices=["rff", "rbf", "poly2"],
                   help="lifted: features of the past window: random Fourier (rff, default), radial (rbf) or every "
                   "product of two entries (poly2)")
    p.add_argument("--dictionary-size", dest="dictionary_size", type=whole_number(0), metavar="N",
                   help="lifted: number of features (default: chosen by cross-validation from 0, 25, 50, 100)")
    p.add_argument("--knots", type=whole_number(3), metavar="N",
                   help="hammerstein: knots of each site's piecewise-linear recruitment map (default 7)")
    p.add_argument("--force", action="store_true", help="replace an existing model file")
    p.add_argument("--order-figure", dest="order_figure", metavar="PNG",
                   help="also write the order choice as a figure: held-out error against order beside the singular "
                   "values (methods that choose an order, e.g. subspace)")
    add_blank_option(p)


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
    for dest, method, name in _METHOD_OPTIONS:
        value = getattr(args, dest, None)
        if value is None:
            continue
        if args.method != method:
            raise InvalidParameterError(f"--{dest.replace('_', '-')} is for the {method} method; drop it or use "
                                        f"--method {method}.")
        settings[name] = value
    if getattr(args, "window_step", None) is not None and getattr(args, "trial_windows", None) is None:
        raise InvalidParameterError("--window-step needs --trial-windows K (the trials per window).")
    changes.refuse_gain_after(args)
    return settings


#: Rows of a long selection table printed by ``fit`` (the best ones and the selected one; the model file has all).
_SHOWN_ROWS = 10


def _selection_text(result) -> str:
    """The selection table (its best rows when long, the selected row always) and the selection notes."""
    table = result.selection_table
    if table is None or table.empty:  # a method with nothing to choose among (pandas would print its empty repr)
        return "\n".join(["  none: this method fits its settings as given"]
                         + [f"note: {n}" for n in result.selection_notes])
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
    figure_path = getattr(args, "order_figure", None)
    paths = changes.change_paths(args)
    with claimed(args.out, force=args.force, command="fit"), \
            _maybe_claimed(figure_path, args.force), _maybe_claimed(paths.get("conditions"), args.force), \
            _maybe_claimed(paths.get("trial_windows"), args.force):
        result, extra_lines, writers = _fit(args, settings)
        figure = _order_figure(result) if figure_path else None  # refused before anything is written
        provenance = {**result.provenance, "session_file": str(args.session)}
        save_predictor(result.predictor, args.out, provenance=provenance, overwrite=args.force)
        if figure is not None:
            with atomic_path(figure_path) as tmp:
                figure.savefig(tmp, dpi=110, format="png")
        extra_lines += [write(paths[key], args.force, provenance) for key, write in writers.items()]
    split = result.split
    print(f"{args.route} / {args.method}: {type(result.predictor).__name__} fitted on trials {list(split.train)}")
    print("selection (training trials only):")
    print(_selection_text(result))
    print(f"held-out scores on trials {list(split.test)} (seed {split.seed}; means over output channels):")
    print(result.heldout.to_text())
    for line in extra_lines:
        print(line)
    print(f"model written to {args.out}")
    return 0


def _maybe_claimed(path, force):
    """Claim the order figure's file too when one is asked for."""
    return claimed(path, force=force, command="fit") if path else contextlib.nullcontext()


def _order_figure(result):
    """The order choice of the fit as a figure (:func:`stimsteer.control.figures.fit.order_choice_figure`)."""
    from ..figures._titles import fitted_what
    from ..figures.fit import order_choice_figure

    return order_choice_figure(result.selection_table, what=fitted_what(result.provenance))


def _fit(args, settings):
    """``fit_route`` on the session file (its channel selection applied, its windows resolved at its rate); its
    warnings become one stderr line each."""
    with warnings.catch_warnings(record=True) as caught, open_selected(args.session, args) as session:
        warnings.simplefilter("always")
        session, blanked = blank_outputs(session, args.blank_ms)
        if blanked:
            print(blanked)
        past, horizon, note = resolve_windows(session, args.past, args.horizon)
        if args.method == "arx" and args.past is None:
            past = None  # ridge ARX chooses its lags by cross-validation
            note = (note or "") + " (arx: its lags, the past window, are chosen by cross-validation instead.)"
        if note:
            print(note)
        takes_past = "past_steps" in _factory(args.route, args.method).parameters()
        if past is not None and (args.past is not None or takes_past):
            settings = {**settings, "past_steps": past}  # a default only to a method that takes a past window
        _check_windows(args, session)  # refused before the fit
        changes.check_conditions(args, session, _split_of(args, session).train)
        plain = settings
        try:
            route, method, settings = _bootstrapped(args, settings)
            result = fit_route(session, route=route, method=method, settings=settings, seed=args.seed,
                               test_fraction=args.test_fraction, horizon_steps=horizon)
            lines, writers = _change_lines(args, result, session, plain)
            lines = _uncertainty_lines(args, result, session) + lines
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
    return result, lines, writers


def _bootstrapped(args, settings):
    """With ``--bootstrap N``: the ensemble method wrapping the chosen one; else the method as given."""
    n = getattr(args, "bootstrap", None)
    if n is None:
        return args.route, args.method, settings
    return "indirect", "bootstrap", {"method": args.method, "method_settings": settings, "n_members": int(n)}


def _uncertainty_lines(args, result, session) -> list:
    """The ensemble's held-out interval coverage."""
    from ...sysid import IntervalForm, interval_coverage
    from ...sysid.trial_sources import _subsets

    lines = []
    pred = result.predictor
    if isinstance(pred, IntervalForm):
        _, test = _subsets(session, result.split, False)
        H = int(result.provenance["horizon_steps"])
        cov = interval_coverage(pred, test, horizon_steps=H, level=0.95)
        lines.append(f"95 % prediction intervals ({len(pred.members_)} bootstrap members) on held-out trials, 1-{H} "
                     "steps ahead: coverage per output " + ", ".join(
                         f"{n} {100 * c:.1f} %" for n, c in zip(pred.output_names_, cov)) + " (aim: 95 %)")
    return lines


def _split_of(args, session):
    """The trial split ``fit_route`` will make (same seed and fraction), for checks before the fit."""
    from ...sysid.trial_sources import _split

    return _split(session, None, args.test_fraction, args.seed)


def _check_windows(args, session) -> None:
    """``--trial-windows K`` must leave at least one window in the training trials of the split."""
    K = getattr(args, "trial_windows", None)
    if K is None:
        return
    n_train = len(_split_of(args, session).train)
    if K > n_train:
        raise InvalidParameterError(f"--trial-windows {K} is more than the {n_train} training trials (of "
                                    f"{session.n_trials}, with --test-fraction {args.test_fraction:g}); give 2 to "
                                    f"{n_train} trials per window.")


def _change_lines(args, result, session, given):
    """With ``--conditions`` / ``--trial-windows K``: the lines to print and the writers of their files
    (:mod:`._fit_changes`), on the training trials of the split; ``given`` are the method settings as given."""
    whole = session if hasattr(session, "select_trials") else session.to_session()
    lines, writers = [], {}
    if getattr(args, "conditions", False):
        more, writers["conditions"] = changes.condition_report(args, result, whole, given)
        lines += more
    if getattr(args, "trial_windows", None) is not None:
        more, writers["trial_windows"] = changes.window_report(args, result, whole, given)
        lines += more
    return lines, writers
