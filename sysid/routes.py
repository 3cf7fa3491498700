"""One entry point for both routes: split the trials, fit on the training trials, score on the held-out trials.

:func:`fit_route` is what ``stimsteer fit`` runs. Everything the estimator selects (ridge strength, order,
regularisation) is chosen inside the training trials; the held-out trials are touched only once, for the scores.
:data:`METHODS` maps ``(route, method)`` to a factory ``settings -> unfitted estimator``; registering a method is
one line (``METHODS[("direct", "mine")] = MethodEntry("my_package.my_module:MyPredictor")``, see
:mod:`stimsteer.sysid.registry`).

Predicting the response to a new stimulation pattern lives in :mod:`stimsteer.sysid.patterns` (re-exported here);
writing it to files in ``stimsteer.control.commands.predict``.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .exceptions import InvalidParameterError, StimsteerWarning
from .registry import METHODS, MethodEntry
from .metrics import Scores, freerun_scores, kstep_scores
from .quality import OFFSET_WARN_FRACTION, baseline_moments, check_representable
from .session import TrialSplit
from .trial_sources import open_session_source
from .patterns import Pattern, PatternPrediction, load_pattern, rest_window, trial_end_window, predict_pattern
from ._records import jsonable, session_record, window_stride
from .trial_sources import _split, _subsets

__all__ = ["METHODS", "MethodEntry", "DEFAULT_HORIZON_STEPS", "FitResult", "fit_route", "make_estimator", "open_session_source",
           "Pattern", "PatternPrediction", "load_pattern", "rest_window", "trial_end_window", "predict_pattern"]


#: k-step horizon scored when neither the caller nor the predictor fixes one (samples).
DEFAULT_HORIZON_STEPS = 10
#: At most this many k-step windows are scored (evenly strided); the stride used is recorded.
_MAX_WINDOWS = 5000  # k-step windows scored per held-out session (evenly strided beyond that)




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
    selection_notes : tuple of str
        The estimator's remarks on its selection (``selection_notes_``: a grid edge that won, an order cap that
        binds, an unstable order kept), printed by ``stimsteer fit``.
    """

    predictor: object
    route: str
    method: str
    split: TrialSplit
    selection_table: pd.DataFrame
    heldout: Scores
    provenance: dict
    selection_notes: tuple = ()


def _selection_table(predictor) -> pd.DataFrame:
    for attr in ("structure_table_", "cv_table_", "order_table_", "selection_table_"):
        table = getattr(predictor, attr, None)
        if isinstance(table, pd.DataFrame):
            return table
    return pd.DataFrame()


def _factory(route: str, method: str) -> MethodEntry:
    key = (str(route), str(method))
    if key not in METHODS:
        known = ", ".join(f"--route {r} --method {m}" for r, m in sorted(METHODS))
        raise InvalidParameterError(f"no method {method!r} on route {route!r}; available: {known}.")
    return METHODS[key]


def make_estimator(route: str, method: str, settings: dict | None = None, *, horizon_steps: int | None = None,
                   past_steps: int | None = None):
    """An unfitted estimator of a registered method, built from its settings.

    Parameters
    ----------
    route, method : str
        A key of :data:`METHODS`.
    settings : dict, optional
        Constructor settings, given by the user: every one must be a setting of the method (or an alias, e.g.
        ``past_steps`` for ridge ARX's lags).
    horizon_steps, past_steps : int, optional
        Defaults of a caller (the benchmark, ``fit``'s scoring horizon), passed only to a method that takes them
        and only where ``settings`` does not give them.

    Raises
    ------
    InvalidParameterError
        Unknown route/method or settings, or a required setting missing.
    """
    factory = _factory(route, method)
    settings = dict(settings or {})
    for name, value in (("horizon_steps", horizon_steps), ("past_steps", past_steps)):
        if value is not None and name in factory.parameters():
            settings.setdefault(name, int(value))
    return factory(settings)
def _heldout(predictor, test, horizon, max_windows, freerun_max_steps) -> Scores:
    past = int(getattr(predictor, "past_steps_"))
    scores = kstep_scores(predictor, test, horizon_steps=horizon,
                          stride_steps=window_stride(test, past, horizon, max_windows))
    if test.segments(min_length=past + 2):
        scores = scores.merged(freerun_scores(predictor, test, max_steps=freerun_max_steps))
    return scores


def _warn_offsets(predictor, train, method: str) -> float:
    """Warn when the training outputs rest on an offset that a predictor without a constant term cannot represent.

    The offset is judged on the pre-stimulation baseline only (:func:`~stimsteer.sysid.quality.baseline_moments`):
    a mean that comes with one-signed stimulation is response, reproduced from the inputs, and centring it away
    would make the model fit a shifted response.
    """
    if getattr(predictor, "fit_intercept", False) or getattr(predictor, "centre_outputs", False) is True:
        return 0.0
    n_base, mean, frac = baseline_moments(train)
    i = int(np.argmax(frac)) if frac.size else 0
    if frac.size and frac[i] > OFFSET_WARN_FRACTION:
        names = tuple(getattr(train, "output_names", ()) or (f"y{j}" for j in range(frac.size)))
        units = tuple(getattr(train, "output_units", ()) or ("",) * frac.size)
        warnings.warn(
            f"the training outputs rest on a constant offset before stimulation that the {method} model, which has "
            f"no constant term, cannot represent: channel {names[i]!r} has a pre-stimulation baseline of "
            f"{mean[i]:.4g} {units[i]} ({n_base} samples), {100 * frac[i]:.0f} % of its baseline mean square "
            f"({int(np.sum(frac > OFFSET_WARN_FRACTION))} of {frac.size} channels above "
            f"{100 * OFFSET_WARN_FRACTION:.0f} %). "
            + "Refit with --centre-outputs (centre_outputs=True), or use the arx method, which fits an intercept.",
            StimsteerWarning, stacklevel=3)
    return float(frac.max(initial=0.0))

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
    InvalidParameterError
        Unknown route/method or settings, or a required setting missing.
    SessionError
        Fewer than two trials, held-out trials too short to score, or a sample beyond
        :data:`~stimsteer.sysid.quality.MAGNITUDE_LIMIT` in magnitude (rescale the channel).

    Warns
    -----
    StimsteerWarning
        When the predictor has no constant term (subspace, direct methods) and a training output's
        pre-stimulation baseline mean holds more than :data:`OFFSET_WARN_FRACTION` of its baseline mean square; the
        largest share is recorded in the provenance as ``output_offset_fraction``.
    """
    from .subspace.closed_loop import method_for_session  # data recorded under feedback: the closed-loop method

    method = method_for_session(session, route, method, settings)
    factory = _factory(route, method)
    estimator = make_estimator(route, method, settings, horizon_steps=horizon_steps)
    check_representable(session)
    split = _split(session, n_test, test_fraction, seed)
    train, test = _subsets(session, split, factory.streaming)
    predictor = estimator.fit(train)
    offset = _warn_offsets(predictor, train, method)
    limit = getattr(predictor, "max_horizon_steps_", None)
    horizon = int(horizon_steps) if horizon_steps is not None else int(limit or DEFAULT_HORIZON_STEPS)
    heldout = _heldout(predictor, test, horizon, int(max_windows), freerun_max_steps)
    provenance = {
        "route": str(route), "method": str(method), "estimator": type(predictor).__name__,
        "settings": jsonable(predictor.get_params(deep=False)), "split": split.as_dict(), "seed": int(seed),
        "test_fraction": float(test_fraction), "session": session_record(session),
        "horizon_steps": horizon, "stride_steps": int(heldout.stride_steps), "heldout": heldout.to_dict(),
        "output_offset_fraction": offset,
    }
    notes = tuple(str(n) for n in getattr(predictor, "selection_notes_", ()) or ())
    provenance["selection_notes"] = list(notes)
    return FitResult(predictor, str(route), str(method), split, _selection_table(predictor), heldout, provenance,
                     notes)
