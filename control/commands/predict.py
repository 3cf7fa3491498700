"""``stimsteer predict``: the file workflow of a pattern prediction.

The numerics (reading the pattern, checking it against the model, predicting with the held-out band) are
:func:`stimsteer.sysid.predict_pattern` and its neighbours; this module turns a
:class:`~stimsteer.sysid.PatternPrediction` into ``prediction.csv`` and ``prediction.png`` in one folder, written
atomically (a failure leaves no folder behind; an existing folder is kept unless ``force``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ...sysid import InvalidParameterError, load_pattern, load_predictor, open_session_source, predict_pattern, \
    trial_end_window
from ...sysid import IntervalForm, rest_window
from ...sysid._files import atomic_dir
from ...sysid.caution import CAUTION
from ..figures._titles import fitted_what
from ..figures.predict import prediction_figure
from ._common import claimed, open_for_model
from .plan import trial_ref

__all__ = ["add_parser", "prediction_table", "run", "write_prediction"]


def prediction_table(pred, intervals=None) -> pd.DataFrame:
    """Time, inputs, predicted outputs and the held-out RMSE per output, in the session table's column syntax.

    Columns: ``time [s] @ <rate> Hz``, ``in:<name> [<unit>]``, ``out:<name> [<unit>]`` and
    ``rmse:<name> [<unit>]`` (the band's half-width); with ``intervals = (lower, upper)`` (each (n_samples,
    n_outputs), an ensemble's 95 % prediction interval) also ``lo95:<name> [<unit>]`` and ``hi95:<name> [<unit>]``.
    """
    rate = 1.0 / np.median(np.diff(pred.time_s)) if pred.time_s.size > 1 else float("nan")
    cols = {f"time [s] @ {rate:.12g} Hz" if np.isfinite(rate) else "time [s]": pred.time_s}
    for j, (n, unit) in enumerate(zip(pred.input_names, pred.input_units)):
        cols[f"in:{n} [{unit}]"] = pred.u[:, j]
    for j, (n, unit) in enumerate(zip(pred.output_names, pred.output_units)):
        cols[f"out:{n} [{unit}]"] = pred.y[:, j]
    for j, (n, unit) in enumerate(zip(pred.output_names, pred.output_units)):
        cols[f"rmse:{n} [{unit}]"] = pred.band[:, j]
    for tag, bound in zip(("lo95", "hi95"), intervals or ()):
        for j, (n, unit) in enumerate(zip(pred.output_names, pred.output_units)):
            cols[f"{tag}:{n} [{unit}]"] = bound[:, j]
    return pd.DataFrame(cols)


def write_prediction(pred, out_dir, *, force: bool = False, intervals=None, what: str = "") -> dict:
    """Write ``prediction.csv`` (:func:`prediction_table`) and ``prediction.png`` into ``out_dir``, atomically.

    Parameters
    ----------
    pred : PatternPrediction
    out_dir : str or Path
        The folder to create.
    force : bool, default False
        Replace an existing folder.
    intervals : (ndarray, ndarray), optional
        Lower and upper 95 % prediction interval, each (n_samples, n_outputs) (see :func:`prediction_table`).
    what : str, optional
        The model and route, for the figure's title (:func:`stimsteer.control.figures._titles.fitted_what`).

    Returns
    -------
    dict
        ``{"csv": Path, "png": Path}`` of the final files.
    """
    out = Path(out_dir)
    with atomic_dir(out, force=force) as tmp:
        prediction_table(pred, intervals).to_csv(tmp / "prediction.csv", index=False, float_format="%.10g")
        prediction_figure(pred, what=what).savefig(tmp / "prediction.png", dpi=110)
    return {"csv": out / "prediction.csv", "png": out / "prediction.png"}


# ---------------------------------------------------------------------------------------------------- command line
def add_parser(sub) -> None:
    """Declare ``stimsteer predict`` and its options."""
    p = sub.add_parser("predict", help="predict the response to a stimulation pattern with a fitted model")
    p.add_argument("model", help="model file written by `stimsteer fit`")
    p.add_argument("--pattern",
                   help="CSV of inputs: 'time [s]' and one 'in:<name> [<unit>]' column per model input")
    p.add_argument("--score-trial", type=trial_ref, metavar="SESSION:INDEX",
                   help="instead of a pattern: predict this recorded trial from its first past-window samples, as "
                   "`fit` scores held-out trials, and print its free-run scores")
    p.add_argument("--out", help="output folder for prediction.csv and prediction.png (with --pattern)")
    p.add_argument("--from-trial", type=trial_ref, metavar="SESSION:INDEX",
                   help="start from the end of this recorded trial (default: from rest)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")


def _score_trial(args, predictor, provenance) -> int:
    from ...sysid.patterns import _check_channels, _model_channels, score_trial

    path, index = args.score_trial
    with open_for_model(path, provenance) as session:
        model = _model_channels(provenance)
        _check_channels("the session", session.input_names, session.input_units, session.sample_rate_hz, model)
        scores = score_trial(predictor, session, index)
    print(f"free-run scores of trial {index} of {path} (the first {int(predictor.past_steps_)} samples of each valid "
          "segment given, the rest predicted from the inputs; the rule `fit` uses for held-out trials):")
    print(scores.to_text())
    return 0


def _intervals(predictor, past, pattern):
    """An ensemble's 95 % prediction interval over the pattern from the same past window, else None."""
    if not isinstance(predictor, IntervalForm):
        return None
    u_past, y_past = past if past is not None else rest_window(predictor, predictor.n_inputs_, predictor.n_outputs_)
    _, lo, hi = predictor.predict_interval(u_past, y_past, pattern.u, level=0.95)
    return lo, hi


def run(args) -> int:
    """Run ``stimsteer predict`` from parsed arguments."""
    if (args.pattern is None) == (getattr(args, "score_trial", None) is None):
        raise InvalidParameterError("give either --pattern FILE (predict a stimulation pattern) or --score-trial "
                                    "SESSION:INDEX (score a recorded trial), not both or neither.")
    if args.score_trial is not None:
        return _score_trial(args, *load_predictor(args.model))
    if args.out is None:
        raise InvalidParameterError("--pattern needs --out FOLDER for prediction.csv and prediction.png.")
    with claimed(args.out, force=args.force, command="predict"):
        predictor, provenance = load_predictor(args.model)
        pattern = load_pattern(args.pattern)
        past, start = None, "rest"
        if args.from_trial is not None:
            path, index = args.from_trial
            with open_for_model(path, provenance) as session:  # our HDF5 layout: only the trial's last window is read
                past = trial_end_window(session, index, predictor, provenance)
            start = f"the end of trial {index} of {path}"
        prediction = predict_pattern(predictor, provenance, pattern, past=past, start=start)
        intervals = _intervals(predictor, past, pattern)
        files = write_prediction(prediction, args.out, force=args.force, intervals=intervals,
                                 what=fitted_what(provenance))
    print(f"predicted {len(prediction.output_names)} output(s) over {pattern.u.shape[0]} samples from {start}")
    for note in prediction.notes:
        print(f"caution: {note}")
    if intervals is not None:
        print("with 95 % prediction intervals of the bootstrap ensemble (columns lo95:, hi95:)")
    print(f"wrote {files['csv']} and {files['png']}")
    print(CAUTION)
    return 0
