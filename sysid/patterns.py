"""Predicting the response to a new stimulation pattern (``stimsteer predict``): reading a pattern table, checking
it against the model, and predicting from rest or from the end of a recorded trial, with the held-out error band.

Writing the prediction to files is the command's business (``stimsteer.control.commands.predict``).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ._headers import CHANNEL_RE as _CHANNEL_RE, TIME_RE as _TIME_RE
import warnings

from .chaining import chain_radius, growth_text
from .exceptions import FileFormatError, SessionError, StimsteerWarning
from .metrics import Scores, _free_run, freerun_scores

__all__ = ["Pattern", "PatternPrediction", "load_pattern", "rest_window", "trial_end_window", "predict_pattern",
           "score_trial"]


# ------------------------------------------------------------------------------------------------ patterns
@dataclass(frozen=True)
class Pattern:
    """A stimulation pattern read by :func:`load_pattern`.

    Attributes
    ----------
    time_s : ndarray, shape (n_samples,)
    u : ndarray, shape (n_samples, n_inputs)
    input_names, input_units : tuple of str
    sample_rate_hz : float
    """

    time_s: np.ndarray
    u: np.ndarray
    input_names: tuple
    input_units: tuple
    sample_rate_hz: float


@dataclass(frozen=True)
class PatternPrediction:
    """Predicted response to a pattern, with the held-out error band.

    Attributes
    ----------
    time_s : ndarray, shape (n_samples,)
    u : ndarray, shape (n_samples, n_inputs)
    y : ndarray, shape (n_samples, n_outputs)
        Predicted outputs.
    band : ndarray, shape (n_samples, n_outputs)
        Held-out RMSE at each step after the start (k-step RMSE up to the scored horizon, free-run RMSE beyond).
    input_names, input_units, output_names, output_units : tuple of str
    start : str
        ``"rest"`` or where the past window came from.
    notes : tuple of str
        Cautions about this prediction: an unstable chained recursion (with its spectral radius and the growth it
        allows over the pattern) and a pattern longer than any held-out free run (the band is NaN beyond it).
    """

    time_s: np.ndarray
    u: np.ndarray
    y: np.ndarray
    band: np.ndarray
    input_names: tuple
    input_units: tuple
    output_names: tuple
    output_units: tuple
    start: str
    notes: tuple = ()


_PATTERN_LAYOUT = "'time [s]' (optionally 'time [s] @ <rate> Hz') and one 'in:<name> [<unit>]' column per input"


def _pattern_columns(columns, path):
    time_col, rate_text, inputs, other = None, None, [], []
    for col in (str(c) for c in columns):
        t, ch = _TIME_RE.match(col), _CHANNEL_RE.match(col)
        if t is not None and time_col is None:
            time_col, rate_text = col, t["rate"]
        elif ch is not None and ch["role"] == "in" and ch["name"] and ch["unit"].strip():
            inputs.append((col, ch["name"], ch["unit"].strip()))
        elif col == "trial":  # a schedule's trial labels: the pattern is the whole schedule, rests included
            continue
        else:
            other.append(col)
    if time_col is None or not inputs or other:
        raise FileFormatError(
            f"{path} is not a stimulation pattern table: expected columns {_PATTERN_LAYOUT}; found {list(columns)}"
            + (f" (not recognised: {other})" if other else "") + ". Rename the columns to this layout."
        )
    return time_col, rate_text, inputs


def load_pattern(path) -> Pattern:
    """Read a stimulation pattern from a CSV table (the session table's column syntax, inputs only).

    Layout: a ``time [s]`` column (optionally ``time [s] @ <rate> Hz``) on a uniform grid and one
    ``in:<name> [<unit>]`` column per stimulation input, every cell a finite number. Example header:
    ``time [s] @ 1000 Hz,in:site_a [uA],in:site_b [uA]``. A ``trial`` column (as in a schedule written by
    ``stimsteer schedule``) is allowed and ignored, so a schedule can be predicted whole.

    Raises
    ------
    FileFormatError
        Other columns, missing units, non-numeric or empty cells, or a non-uniform time grid.
    FileNotFoundError
    """
    from .io.tables import _data_row, _time_grid, comment_lines

    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(2, "no such pattern file", str(path))
    try:
        frame = pd.read_csv(path, skiprows=comment_lines(path))
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise FileFormatError(f"{path} is not a readable CSV table ({exc}); expected {_PATTERN_LAYOUT}.") from None
    time_col, rate_text, inputs = _pattern_columns(frame.columns, path)
    if frame.shape[0] == 0:
        raise FileFormatError(f"{path} holds a header but no rows; expected one row per sample of the pattern.")
    values = frame[[time_col] + [c for c, _, _ in inputs]].apply(pd.to_numeric, errors="coerce").to_numpy(float)
    bad = ~np.isfinite(values)
    if bad.any():
        r, c = (int(v[0]) for v in np.nonzero(bad))
        col = time_col if c == 0 else inputs[c - 1][0]
        raise FileFormatError(f"{path}: {_data_row(r)} of column {col!r} is empty or not a finite number; a pattern "
                              "needs a value for every input at every sample.")
    rate, _t0 = _time_grid(values[:, 0], rate_text, path, time_col) if values.shape[0] > 1 or rate_text else \
        (None, None)
    if rate is None:
        raise FileFormatError(f"{path}: one row cannot give the sampling rate; write the header as "
                              "'time [s] @ <rate> Hz'.")
    return Pattern(values[:, 0].copy(), values[:, 1:].copy(), tuple(n for _, n, _ in inputs),
                   tuple(x for _, _, x in inputs), float(rate))


def _model_channels(provenance: dict) -> dict:
    try:
        s = provenance["session"]
        return {k: tuple(s[k]) for k in ("input_names", "input_units", "output_names", "output_units")} | \
            {"sample_rate_hz": float(s["sample_rate_hz"])}
    except (KeyError, TypeError):
        raise FileFormatError("the model's provenance lacks the session description (channel names, units, rate); "
                              "refit it with `stimsteer fit`.") from None


def _check_channels(what: str, names, units, rate, model: dict) -> None:
    exp_n, exp_u = model["input_names"], model["input_units"]
    if len(names) != len(exp_n):
        raise SessionError(f"{what} has {len(names)} input(s) {list(names)}; the model has {len(exp_n)}: "
                           f"{list(exp_n)}. Give one column per model input.")
    if tuple(names) != exp_n:
        raise SessionError(f"{what} has inputs {list(names)}; the model expects {list(exp_n)} in this order. "
                           "Rename or reorder the columns.")
    for n, got, exp in zip(names, units, exp_u):
        if got != exp:
            raise SessionError(f"input {n!r} is in {got!r} in {what}, but the model was fitted in {exp!r}. "
                               "Convert the values to the model's unit.")
    if abs(rate - model["sample_rate_hz"]) > 1e-6 * model["sample_rate_hz"]:
        raise SessionError(f"{what} is sampled at {rate:g} Hz; the model runs at {model['sample_rate_hz']:g} Hz. "
                           "Resample it to the model's rate.")


def rest_window(predictor, n_inputs: int, n_outputs: int) -> tuple[np.ndarray, np.ndarray]:
    """A past window at rest: the predictor's own ``rest_window()`` if it has one, else zero inputs and outputs.

    Zero outputs are the resting level of models fitted without an intercept (e.g. on centred data).
    """
    if hasattr(predictor, "rest_window"):
        return predictor.rest_window()
    past = int(getattr(predictor, "past_steps_"))
    return np.zeros((past, int(n_inputs))), np.zeros((past, int(n_outputs)))


def trial_end_window(session, trial_index: int, predictor, provenance: dict) -> tuple[np.ndarray, np.ndarray]:
    """The last ``past_steps_`` samples of a recorded trial, as the past window of a prediction.

    Raises
    ------
    SessionError
        The trial does not exist, is shorter than the window, holds masked samples in it, or the session's
        channels, units or rate differ from the model's.
    """
    model = _model_channels(provenance)
    _check_channels("the session", session.input_names, session.input_units, session.sample_rate_hz, model)
    if tuple(session.output_names) != model["output_names"] or tuple(session.output_units) != model["output_units"]:
        raise SessionError(f"the session's outputs {list(session.output_names)} ({list(session.output_units)}) differ "
                           f"from the model's {list(model['output_names'])} ({list(model['output_units'])}).")
    trials = np.asarray(session.trials)
    i = int(trial_index)
    if not 0 <= i < trials.shape[0]:
        raise SessionError(f"trial {i} does not exist; the session has trials 0 to {trials.shape[0] - 1}.")
    past = int(getattr(predictor, "past_steps_"))
    a, b = int(trials[i, 0]), int(trials[i, 1])
    if b - a < past:
        raise SessionError(f"trial {i} has {b - a} samples; the model needs a past window of {past}.")
    u, y, mask = session.read(b - past, b)
    if not np.all(mask):
        raise SessionError(f"the last {past} samples of trial {i} include masked samples; choose another trial.")
    return np.array(u), np.array(y)


def predict_pattern(predictor, provenance: dict, pattern: Pattern, *, past=None, start: str = "rest") \
        -> PatternPrediction:
    """Predict the response to ``pattern`` from ``past = (u_past, y_past)`` (default: rest), with its error band.

    Predictors with a finite ``max_horizon_steps_`` are chained block by block on their own predictions.

    Raises
    ------
    SessionError
        The pattern's inputs, units or rate differ from the model's.
    """
    model = _model_channels(provenance)
    _check_channels("the pattern", pattern.input_names, pattern.input_units, pattern.sample_rate_hz, model)
    n_in, n_out = len(model["input_names"]), len(model["output_names"])
    u_past, y_past = rest_window(predictor, n_in, n_out) if past is None else past
    P, T = int(getattr(predictor, "past_steps_")), pattern.u.shape[0]
    u_all = np.concatenate([np.asarray(u_past, dtype=np.float64)[-P:] if P else np.zeros((0, pattern.u.shape[1])),
                            pattern.u])
    y_known = np.asarray(y_past, dtype=np.float64)[-P:] if P else np.zeros((0, len(model["output_names"])))
    # Predictors with a finite horizon are chained, feeding back their own predictions (as in free-run scoring).
    y = _free_run(predictor, u_all, y_known, P, getattr(predictor, "max_horizon_steps_", None))
    scores = Scores.from_dict(provenance["heldout"])
    band = scores.error_band(T)
    notes = _long_pattern_notes(predictor, scores, T)
    for n in notes:
        warnings.warn(n, StimsteerWarning, stacklevel=2)
    return PatternPrediction(pattern.time_s, pattern.u, y, band, pattern.input_names, pattern.input_units,
                             model["output_names"], model["output_units"], str(start), tuple(notes))


def _long_pattern_notes(predictor, scores: Scores, n_steps: int) -> list:
    """Cautions for a prediction of ``n_steps`` samples: unstable recursion, band shorter than the pattern."""
    notes = []
    limit = getattr(predictor, "max_horizon_steps_", None)
    if limit is None or n_steps > int(limit):
        radius = chain_radius(predictor)
        if radius is not None and radius >= 1.0:
            how = "chaining this predictor's blocks" if limit is not None else "this model's free run"
            notes.append(f"{how} is unstable ({growth_text(radius, n_steps, limit)}); the prediction of this "
                         f"{n_steps}-sample pattern may diverge. Predict patterns of at most {limit or 'a few'} "
                         "samples from a measured past, or refit (another method, a longer past window, or a larger "
                         "regularisation).")
    covered = scores.covered_steps()
    if covered is not None and n_steps > covered:
        notes.append(f"the held-out error band covers {covered} samples (the longest held-out free run); this "
                     f"pattern has {n_steps}, and the band is left empty (NaN) beyond sample {covered}.")
    return notes


def score_trial(predictor, session, trial_index: int) -> Scores:
    """Free-run scores of one recorded trial by the rule ``fit`` and ``bench`` use for held-out trials.

    The predictor is given the first ``past_steps_`` measured samples of each valid segment of the trial and
    predicts the rest of the segment from its inputs alone (:func:`~stimsteer.sysid.metrics.freerun_scores`), so on
    a held-out trial this reproduces the free-run score ``fit`` printed for it.

    Raises
    ------
    SessionError
        The trial does not exist or has no segment longer than the past window.
    """
    trials = np.asarray(session.trials)
    i = int(trial_index)
    if not 0 <= i < trials.shape[0]:
        raise SessionError(f"trial {i} does not exist; the session has trials 0 to {trials.shape[0] - 1}.")
    from .trial_sources import _TrialSubset

    one = session.select_trials([i]) if hasattr(session, "select_trials") else _TrialSubset(session, [i])
    return freerun_scores(predictor, one)
