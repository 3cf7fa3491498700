"""One entry point for both routes: split the trials, fit on the training trials, score on the held-out trials.

:func:`fit_route` is what ``stimsteer fit`` runs. Everything the estimator selects (ridge strength, order,
regularisation) is chosen inside the training trials; the held-out trials are touched only once, for the scores.
:data:`METHODS` maps ``(route, method)`` to a factory ``settings -> unfitted estimator``; registering a method is
one line (``METHODS[("direct", "lsq")] = _Lazy("stimsteer.sysid.datadriven.lsq:LsqPredictor")``).

The second half of the module predicts the response to a new stimulation pattern (``stimsteer predict``): reading a
pattern table, checking it against the model, predicting from rest or from the end of a recorded trial, and
writing the prediction with its held-out error band.
"""

from __future__ import annotations

import contextlib
import importlib
import inspect
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ._files import atomic_dir
from ._headers import CHANNEL_RE as _CHANNEL_RE, TIME_RE as _TIME_RE
from .exceptions import FileFormatError, SessionError, StimsteerWarning
from .metrics import Scores, _free_run, freerun_scores, kstep_scores
from .quality import OFFSET_WARN_FRACTION, output_moments
from .session import TrialSplit

__all__ = [
    "METHODS",
    "DEFAULT_HORIZON_STEPS",
    "FitResult",
    "fit_route",
    "make_estimator",
    "open_session_source",
    "Pattern",
    "PatternPrediction",
    "load_pattern",
    "rest_window",
    "trial_end_window",
    "predict_pattern",
    "write_prediction",
]

#: k-step horizon scored when neither the caller nor the predictor fixes one (samples).
DEFAULT_HORIZON_STEPS = 10
#: At most this many k-step windows are scored (evenly strided); the stride used is recorded.
_MAX_WINDOWS = 5000  # k-step windows scored per held-out session (evenly strided beyond that)


class _Lazy:
    """Factory for ``"module:Class"``: imports on first use and builds ``Class(**settings)``.

    ``aliases`` map route-level setting names to the class's own, e.g. ``{"past_steps": ("output_lags",
    "input_lags")}`` for ridge ARX; an explicit class setting wins over an alias. ``streaming`` says the class's
    ``fit`` takes a lazily opened session file (also read from a ``supports_streaming`` class attribute).
    """

    def __init__(self, target: str, aliases: dict | None = None, *, streaming: bool = False):
        self.target = target
        self.aliases = dict(aliases or {})
        self._streaming = bool(streaming)

    @property
    def streaming(self) -> bool:
        """Whether the estimator's ``fit`` reads a lazily opened session file chunk by chunk."""
        return self._streaming or bool(getattr(self.cls(), "supports_streaming", False))

    def cls(self):
        module, _, name = self.target.partition(":")
        return getattr(importlib.import_module(module), name)

    def parameters(self) -> tuple:
        """Keyword names the estimator's constructor accepts, plus the aliases."""
        sig = inspect.signature(self.cls().__init__)
        own = [p for p in sig.parameters if p != "self"]
        return tuple(own) + tuple(a for a in self.aliases if a not in own)

    def __call__(self, settings: dict | None):
        cls = self.cls()
        given = dict(settings or {})
        for alias, names in self.aliases.items():
            if alias in given:
                value = given.pop(alias)
                if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
                    raise SessionError(f"{alias} must be a whole number of samples >= 1 (on the command line: "
                                       f"--{alias.replace('_', '-')} N); got {value!r}.")
                for n in names:
                    given.setdefault(n, value)
        allowed = set(self.parameters())
        unknown = sorted(set(given) - allowed)
        if unknown:
            raise SessionError(
                f"unknown setting(s) {unknown} for {cls.__name__}; allowed: {sorted(allowed)}. Check the spelling."
            )
        required = [name for name, par in inspect.signature(cls.__init__).parameters.items()
                    if name != "self" and par.default is inspect.Parameter.empty
                    and par.kind in (par.KEYWORD_ONLY, par.POSITIONAL_OR_KEYWORD)]
        missing = [name for name in required if name not in given]
        if missing:
            options = " and ".join(f"--{name.replace('_', '-')} N" for name in missing)
            raise SessionError(
                f"{cls.__name__} needs {', '.join(missing)} (on the command line: {options}); give "
                f"{'them' if len(missing) > 1 else 'it'} in samples."
            )
        return cls(**given)

    def __repr__(self):
        return f"_Lazy({self.target!r})"


METHODS = {
    ("indirect", "arx"): _Lazy("stimsteer.sysid.arx:RidgeArx", {"past_steps": ("output_lags", "input_lags")}),
    ("indirect", "subspace"): _Lazy("stimsteer.sysid.subspace.estimator:SubspaceId", streaming=True),
    ("direct", "lsq"): _Lazy("stimsteer.sysid.datadriven.lsq:LsqPredictor", streaming=True),
    ("direct", "hankel"): _Lazy("stimsteer.sysid.datadriven.hankel_predictor:HankelPredictor", streaming=True),
}


# ------------------------------------------------------------------------------------------------ trial subsets
class _TrialSubset:
    """A lazy view of some trials of a session file: same sample grid, only those trials' segments."""

    def __init__(self, source, indices):
        self._src = source
        if "out" not in inspect.signature(source.read).parameters:
            self.read = source.read  # the source's own signature, so readers see that it takes no buffers
        self.trials = np.asarray(source.trials)[list(indices)]
        for attr in ("n_samples", "n_inputs", "n_outputs", "sample_rate_hz", "input_names", "output_names",
                     "input_units", "output_units"):
            setattr(self, attr, getattr(source, attr))

    @property
    def n_trials(self) -> int:
        return int(self.trials.shape[0])

    def segments(self, min_length: int = 1):
        starts, stops = self.trials[:, 0], self.trials[:, 1]
        out = []
        for a, b in self._src.segments(min_length):
            i = int(np.searchsorted(starts, a, side="right") - 1)
            if i >= 0 and b <= stops[i]:
                out.append((a, b))
        return out

    def read(self, start: int, stop: int, *, out=None):
        """The source's window; ``out`` (buffers to read into) is passed on, so a streaming fit of a trial subset
        reads as fast as one of the whole file. Offered only when the source's own ``read`` takes it."""
        return self._src.read(start, stop) if out is None else self._src.read(start, stop, out=out)


def _split(source, n_test, test_fraction, seed) -> TrialSplit:
    """The seeded trial split; identical to :meth:`Session.split` (which it calls for a Session)."""
    if hasattr(source, "split"):
        return source.split(n_test, test_fraction=test_fraction, seed=seed)
    n = int(np.asarray(source.trials).shape[0])
    n_test = max(1, int(round(test_fraction * n))) if n_test is None else int(n_test)
    if n < 2 or not 1 <= n_test <= n - 1:
        raise SessionError(
            f"a held-out split needs at least 2 trials and 1 <= n_test <= n_trials - 1; this session has {n} "
            f"trial(s) and n_test={n_test}. Record more trials or split the recording into trials."
        )
    perm = np.random.default_rng(seed).permutation(n)
    return TrialSplit(train=tuple(sorted(int(i) for i in perm[n_test:])),
                      test=tuple(sorted(int(i) for i in perm[:n_test])), seed=int(seed))


def _subsets(source, split: TrialSplit, streaming: bool):
    if hasattr(source, "select_trials"):
        return source.select_trials(split.train), source.select_trials(split.test)
    if streaming:
        return _TrialSubset(source, split.train), _TrialSubset(source, split.test)
    whole = source.to_session()
    return whole.select_trials(split.train), whole.select_trials(split.test)


@contextlib.contextmanager
def open_session_source(path):
    """Yield the recording at ``path`` for fitting: lazily opened when it is our HDF5 layout, else loaded whole.

    A lazily opened file lets streaming estimators (ridge ARX, subspace) fit recordings larger than memory.
    """
    from .io import detect_format, load_session, open_session_file

    if detect_format(path) == "hdf5":
        with open_session_file(path) as f:
            yield f
    else:
        yield load_session(path)


# ------------------------------------------------------------------------------------------------ fit_route
@dataclass(frozen=True)
class FitResult:
    """What :func:`fit_route` returns.

    Attributes
    ----------
    predictor : fitted predictor
        Fitted on the training trials only.
    route, method : str
    split : TrialSplit
        Training and held-out trial indices and the seed.
    selection_table : pandas.DataFrame
        The estimator's own selection table (ridge CV curve ``cv_table_``, subspace ``order_table_``, ...).
    heldout : Scores
        k-step and free-run scores on the held-out trials.
    provenance : dict
        JSON-like record: session hash and description, settings, split, seed, horizon, stride, scores.
    """

    predictor: object
    route: str
    method: str
    split: TrialSplit
    selection_table: pd.DataFrame
    heldout: Scores
    provenance: dict


def _selection_table(predictor) -> pd.DataFrame:
    for attr in ("cv_table_", "order_table_", "selection_table_"):
        table = getattr(predictor, attr, None)
        if isinstance(table, pd.DataFrame):
            return table
    return pd.DataFrame()


def _factory(route: str, method: str) -> _Lazy:
    key = (str(route), str(method))
    if key not in METHODS:
        known = ", ".join(f"--route {r} --method {m}" for r, m in sorted(METHODS))
        raise SessionError(f"no method {method!r} on route {route!r}; available: {known}.")
    return METHODS[key]


def make_estimator(route: str, method: str, settings: dict | None = None, *, horizon_steps: int | None = None):
    """An unfitted estimator of a registered method, built from its settings.

    Parameters
    ----------
    route, method : str
        A key of :data:`METHODS`.
    settings : dict, optional
        Constructor settings; ``past_steps`` is understood by every method.
    horizon_steps : int, optional
        Passed to estimators that take ``horizon_steps`` unless ``settings`` already gives it.

    Raises
    ------
    SessionError
        Unknown route/method or settings, or a required setting missing.
    """
    factory = _factory(route, method)
    settings = dict(settings or {})
    if horizon_steps is not None and "horizon_steps" in factory.parameters():
        settings.setdefault("horizon_steps", int(horizon_steps))
    return factory(settings)


def _session_record(source) -> dict:
    return {
        "content_hash": source.content_hash(),
        "n_samples": int(source.n_samples), "n_trials": int(np.asarray(source.trials).shape[0]),
        "sample_rate_hz": float(source.sample_rate_hz),
        "input_names": list(source.input_names), "input_units": list(source.input_units),
        "output_names": list(source.output_names), "output_units": list(source.output_units),
    }


def _stride(test, past: int, horizon: int, max_windows: int) -> int:
    n = sum(max(0, e - s - past - horizon + 1) for s, e in test.segments(min_length=past + horizon))
    return max(1, -(-n // max_windows))


def _heldout(predictor, test, horizon, max_windows, freerun_max_steps) -> Scores:
    past = int(getattr(predictor, "past_steps_"))
    scores = kstep_scores(predictor, test, horizon_steps=horizon,
                          stride_steps=_stride(test, past, horizon, max_windows))
    if test.segments(min_length=past + 2):
        scores = scores.merged(freerun_scores(predictor, test, max_steps=freerun_max_steps))
    return scores


def _offset_fractions(train) -> tuple[np.ndarray, np.ndarray]:
    """Per output channel: the mean over the training samples and ``mean² / mean square``."""
    _n, mean, ms = output_moments(train)
    return mean, np.divide(mean ** 2, ms, out=np.zeros(mean.size), where=ms > 0)


def _warn_offsets(predictor, train, method: str) -> float:
    """Warn when the training outputs carry an offset that a predictor without a constant term cannot represent."""
    if getattr(predictor, "fit_intercept", False) or getattr(predictor, "centre_outputs", False) is True:
        return 0.0
    mean, frac = _offset_fractions(train)
    i = int(np.argmax(frac)) if frac.size else 0
    if frac.size and frac[i] > OFFSET_WARN_FRACTION:
        names = tuple(getattr(train, "output_names", ()) or (f"y{j}" for j in range(frac.size)))
        units = tuple(getattr(train, "output_units", ()) or ("",) * frac.size)
        warnings.warn(
            f"the training outputs carry a constant offset that the {method} model, which has no constant term, "
            f"cannot represent: channel {names[i]!r} has mean {mean[i]:.4g} {units[i]}, {100 * frac[i]:.0f} % of "
            f"its mean square ({int(np.sum(frac > OFFSET_WARN_FRACTION))} of {frac.size} channels above "
            f"{100 * OFFSET_WARN_FRACTION:.0f} %). "
            + "Refit with --centre-outputs (centre_outputs=True), or use the arx method, which fits an intercept.",
            StimsteerWarning, stacklevel=3)
    return float(frac.max(initial=0.0))


def _jsonable(value):
    """Settings as JSON-like values (arrays and tuples become lists, numpy scalars Python numbers)."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.generic):
        return value.item()
    return value


def fit_route(session, *, route: str, method: str, settings: dict | None = None, test_fraction: float = 0.25,
              n_test: int | None = None, seed: int = 0, horizon_steps: int | None = None,
              max_windows: int = _MAX_WINDOWS, freerun_max_steps: int | None = None) -> FitResult:
    """Fit a predictor of one route on the training trials and score it on held-out trials.

    Parameters
    ----------
    session : Session or SessionFile
    route : {"indirect", "direct"}
    method : str
        ``"arx"`` or ``"subspace"`` (indirect), ``"lsq"`` or ``"hankel"`` (direct), as registered in
        :data:`METHODS`.
    settings : dict, optional
        Constructor arguments of the estimator; ``past_steps`` is understood by every method (for ridge ARX it sets
        both lag counts unless they are given).
    test_fraction : float, default 0.25
        Share of trials held out (see :meth:`Session.split`); ignored when ``n_test`` is given.
    n_test : int, optional
    seed : int, default 0
        Seed of the trial split.
    horizon_steps : int, optional
        k-step horizon scored; also passed to estimators that take ``horizon_steps``. Default: the predictor's
        ``max_horizon_steps_``, else :data:`DEFAULT_HORIZON_STEPS`.
    max_windows : int, default 2000
        At most this many k-step windows are scored, evenly strided (the stride is recorded).
    freerun_max_steps : int, optional
        Cap of the free-run length per held-out segment (default: whole segments).

    Returns
    -------
    FitResult

    Raises
    ------
    SessionError
        Unknown route/method or settings, fewer than two trials, or held-out trials too short to score.

    Warns
    -----
    StimsteerWarning
        When the predictor has no constant term (subspace, direct methods) and a training output's mean holds more
        than :data:`OFFSET_WARN_FRACTION` of its mean square; the largest share is recorded in the provenance as
        ``output_offset_fraction``.
    """
    factory = _factory(route, method)
    estimator = make_estimator(route, method, settings, horizon_steps=horizon_steps)
    split = _split(session, n_test, test_fraction, seed)
    train, test = _subsets(session, split, factory.streaming)
    predictor = estimator.fit(train)
    offset = _warn_offsets(predictor, train, method)
    limit = getattr(predictor, "max_horizon_steps_", None)
    horizon = int(horizon_steps) if horizon_steps is not None else int(limit or DEFAULT_HORIZON_STEPS)
    heldout = _heldout(predictor, test, horizon, int(max_windows), freerun_max_steps)
    provenance = {
        "route": str(route), "method": str(method), "estimator": type(predictor).__name__,
        "settings": _jsonable(predictor.get_params()), "split": split.as_dict(), "seed": int(seed),
        "test_fraction": float(test_fraction), "session": _session_record(session),
        "horizon_steps": horizon, "stride_steps": int(heldout.stride_steps), "heldout": heldout.to_dict(),
        "output_offset_fraction": offset,
    }
    return FitResult(predictor, str(route), str(method), split, _selection_table(predictor), heldout, provenance)


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
    from .io import _time_grid, comment_lines

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
        raise FileFormatError(f"{path}: row {r} of column {col!r} is empty or not a finite number; a pattern "
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
    band = Scores.from_dict(provenance["heldout"]).error_band(T)
    return PatternPrediction(pattern.time_s, pattern.u, y, band, pattern.input_names, pattern.input_units,
                             model["output_names"], model["output_units"], str(start))


_MAX_PANELS = 8


def _prediction_table(pred: PatternPrediction) -> pd.DataFrame:
    rate = 1.0 / np.median(np.diff(pred.time_s)) if pred.time_s.size > 1 else float("nan")
    cols = {f"time [s] @ {rate:.12g} Hz" if np.isfinite(rate) else "time [s]": pred.time_s}
    for j, (n, unit) in enumerate(zip(pred.input_names, pred.input_units)):
        cols[f"in:{n} [{unit}]"] = pred.u[:, j]
    for j, (n, unit) in enumerate(zip(pred.output_names, pred.output_units)):
        cols[f"out:{n} [{unit}]"] = pred.y[:, j]
    for j, (n, unit) in enumerate(zip(pred.output_names, pred.output_units)):
        cols[f"rmse:{n} [{unit}]"] = pred.band[:, j]
    return pd.DataFrame(cols)


def _plot_prediction(pred: PatternPrediction, path: Path) -> None:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    shown = min(len(pred.output_names), _MAX_PANELS)
    fig = Figure(figsize=(8.0, 1.5 + 1.4 * (shown + 1)), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(shown + 1, 1, sharex=True, gridspec_kw={"height_ratios": [0.8] + [1.0] * shown})
    t = pred.time_s
    ax = axes[0]
    for j, (n, unit) in enumerate(zip(pred.input_names, pred.input_units)):
        ax.step(t, pred.u[:, j], where="post", lw=1.0, label=f"{n} [{unit}]")
    ax.set_ylabel("input")
    ax.legend(loc="upper right", fontsize=7, frameon=False, ncol=min(4, len(pred.input_names)))
    for j in range(shown):
        ax = axes[j + 1]
        y, b = pred.y[:, j], pred.band[:, j]
        ax.fill_between(t, y - b, y + b, color="#9ecae1", alpha=0.6, lw=0, label="± held-out RMSE")
        ax.plot(t, y, color="#08519c", lw=1.2, label="predicted")
        ax.set_ylabel(f"{pred.output_names[j]}\n[{pred.output_units[j]}]", fontsize=8)
        if j == 0:
            ax.legend(loc="upper right", fontsize=7, frameon=False, ncol=2)
    for ax in axes:
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(axis="y", color="0.9", lw=0.6)
    axes[-1].set_xlabel("time [s]")
    note = f" (first {shown} of {len(pred.output_names)} outputs; all in the CSV)" if shown < len(pred.output_names) \
        else ""
    fig.suptitle(f"Predicted response from {pred.start}{note}", fontsize=10)
    fig.savefig(path, dpi=110)


def write_prediction(pred: PatternPrediction, out_dir, *, force: bool = False) -> dict:
    """Write ``prediction.csv`` (time, inputs, predicted outputs, held-out RMSE per output) and ``prediction.png``.

    The folder is written atomically (:func:`stimsteer.sysid._files.atomic_dir`); CSV columns use the session
    table syntax (``time [s] @ <rate> Hz``, ``in:<name> [<unit>]``, ``out:<name> [<unit>]``) plus
    ``rmse:<name> [<unit>]`` for the band half-width.

    Returns
    -------
    dict
        ``{"csv": Path, "png": Path}`` of the final files.
    """
    out = Path(out_dir)
    with atomic_dir(out, force=force) as tmp:
        _prediction_table(pred).to_csv(tmp / "prediction.csv", index=False, float_format="%.10g")
        _plot_prediction(pred, tmp / "prediction.png")
    return {"csv": out / "prediction.csv", "png": out / "prediction.png"}
