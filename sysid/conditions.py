"""Models per condition and over sliding windows of trials, and how they change, with bootstrap intervals.

Trials carry a condition label (brain state, drug, task...): given explicitly or read from the session's metadata
``"trial_conditions"`` (one label per trial). :func:`fit_per_condition` fits one model of any registered method on
the trials of each condition; :func:`sliding_window_fits` fits one on each window of consecutive trials (a model
sequence over the session). :func:`condition_change_table` says how the model changes across conditions: the step
gain of each input-output pair (the response after ``horizon_steps`` samples to a unit step from rest) with its
bootstrap interval over the condition's trials (:mod:`stimsteer.sysid.ensemble`), and
:func:`condition_heldout_scores` scores each condition's model against one pooled model on the held-out trials of
that condition.

The step gain is read after :func:`gain_steps_from_data` samples unless a horizon is given: three times the
recording's memory (the time the impulse response of a quick ARX stays above 10 % of its peak,
:func:`~stimsteer.sysid.window_defaults.default_windows`), by when a geometric decay has fallen below 0.1 % of its
peak and the step response has settled (rule of thumb, no source); at most the shortest trial and the longest
horizon any model predicts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .ensemble import BootstrapEnsemble, _route_of
from .exceptions import InvalidParameterError, SessionError

__all__ = ["ConditionFits", "trial_conditions", "fit_per_condition", "sliding_window_fits", "step_gains",
           "condition_change_table", "window_change_table", "condition_heldout_scores", "gain_steps_from_data",
           "METADATA_KEY"]

#: Session metadata key holding one condition label per trial.
METADATA_KEY = "trial_conditions"


def trial_conditions(session, conditions=None) -> tuple:
    """One condition label per trial: ``conditions`` if given, else the session's ``metadata["trial_conditions"]``.

    Raises
    ------
    SessionError
        No labels, or not one per trial.
    """
    labels = session.metadata.get(METADATA_KEY) if conditions is None else conditions
    if labels is None:
        raise SessionError(f"the session has no condition labels; give one label per trial (conditions=... in "
                           "Python), or, for the command line, add a 'condition' column to the session table (the "
                           "trial's label on each of its rows) or store them in the session's metadata under "
                           f"{METADATA_KEY!r}.")
    labels = tuple(str(c) for c in labels)
    if len(labels) != session.n_trials:
        raise SessionError(f"condition labels must be one per trial: the session has {session.n_trials} trials and "
                           f"{len(labels)} labels were given.")
    return labels


def _groups(labels, min_trials: int, trials=None) -> dict:
    """``{condition: [trial indices]}`` over ``trials`` (default all), in order of first appearance."""
    groups = {}
    for i in range(len(labels)) if trials is None else (int(t) for t in trials):
        groups.setdefault(labels[i], []).append(i)
    few = {c: len(t) for c, t in groups.items() if len(t) < min_trials}
    if few:
        listed = ", ".join(f"{c!r} has {n}" for c, n in few.items())
        raise SessionError(f"too few trials per condition: {listed}; each condition needs at least {min_trials} "
                           "trials to fit (and to resample for its interval). Record more trials of it or merge "
                           "conditions.")
    return groups


@dataclass(frozen=True)
class ConditionFits:
    """Models fitted per condition.

    Attributes
    ----------
    models : dict of str to fitted predictor
    trials : dict of str to tuple of int
        The trial indices (of the given session) each model was fitted on.
    route, method : str
    """

    models: dict
    trials: dict
    route: str
    method: str

    def model_for(self, condition: str):
        """The model of one condition (for prediction or a plan under that condition)."""
        if condition not in self.models:
            raise InvalidParameterError(f"no model for condition {condition!r}; fitted: {sorted(self.models)}.")
        return self.models[condition]


def fit_per_condition(session, *, method="arx", method_settings=None, conditions=None, min_trials=2, trials=None):
    """One model of a registered method per condition, each fitted on that condition's trials only.

    Parameters
    ----------
    session : Session
    method : str, default "arx"
        Any registered method (route found from the registry).
    method_settings : dict, optional
    conditions : sequence of str, optional
        One label per trial (default: the session's metadata ``"trial_conditions"``).
    min_trials : int, default 2
    trials : sequence of int, optional
        Fit on these trials only (default all; ``fit`` passes its training trials, holding the rest out for scores).

    Returns
    -------
    ConditionFits
        ``trials`` in the session's numbering.

    Raises
    ------
    SessionError
        Missing labels, or a condition with fewer than ``min_trials`` trials (named, with the number needed).
    """
    from .routes import make_estimator

    route = _route_of(str(method))
    groups = _groups(trial_conditions(session, conditions), int(min_trials), trials)
    models = {c: make_estimator(*route, dict(method_settings or {})).fit(session.select_trials(t))
              for c, t in groups.items()}
    return ConditionFits(models, {c: tuple(t) for c, t in groups.items()}, *route)


def sliding_window_fits(session, *, method="arx", method_settings=None, window_trials=4, step_trials=1) -> list:
    """Models fitted on windows of consecutive trials: ``[(trial indices, predictor), ...]`` in session order.

    Raises
    ------
    InvalidParameterError
        A window or step below 1, or a window longer than the session.
    """
    from .routes import make_estimator

    W, S = int(window_trials), int(step_trials)
    if W < 1 or S < 1 or W > session.n_trials:
        raise InvalidParameterError(f"window_trials must be in [1, {session.n_trials}] and step_trials >= 1; got "
                                    f"{window_trials!r} and {step_trials!r}.")
    route = _route_of(str(method))
    out = []
    for start in range(0, session.n_trials - W + 1, S):
        idx = tuple(range(start, start + W))
        out.append((idx, make_estimator(*route, dict(method_settings or {})).fit(session.select_trials(idx))))
    return out


def gain_steps_from_data(session, predictors=()) -> tuple:
    """Samples after which :func:`step_gains` reads a step response, from the recording (see the module text).

    Parameters
    ----------
    session : Session or SessionFile
    predictors : sequence of fitted predictors
        Their ``max_horizon_steps_`` (when set) bound the answer.

    Returns
    -------
    steps : int
    why : str
        Where the number comes from, for the line a command prints.
    """
    from .window_defaults import default_windows

    d = default_windows(session)
    rate = float(session.sample_rate_hz)
    if d.memory_s is None:
        steps, why = int(d.horizon_steps), "no output varies; the shortest horizon"
    else:
        memory = max(1, int(np.ceil(d.memory_s * rate - 1e-9)))
        steps, why = 3 * memory, f"3 x the recording's memory of {memory} samples ({d.source})"
    bounds = [(int(b - a), "the shortest trial") for a, b in session.trials]
    bounds += [(int(p.max_horizon_steps_), "the longest horizon the model predicts") for p in predictors
               if p.max_horizon_steps_ is not None]
    bound, what = min(bounds) if bounds else (steps, "")
    if bound < steps:
        steps, why = bound, f"{why}, cut to {what}"
    return max(1, steps), why


def step_gains(predictor, horizon_steps: int = 50) -> np.ndarray:
    """Response after ``horizon_steps`` samples to a unit step on each input from rest, shape (p, m).

    The free response from rest is subtracted, so a constant offset does not count as gain.
    """
    u_rest, y_rest = predictor.rest_window()
    m, H = int(predictor.n_inputs_), int(horizon_steps)
    base = predictor.predict(u_rest, y_rest, np.zeros((H, m)))[-1]
    gains = np.empty((int(predictor.n_outputs_), m))
    for j in range(m):
        step = np.zeros((H, m))
        step[:, j] = 1.0
        gains[:, j] = predictor.predict(u_rest, y_rest, step)[-1] - base
    return gains


def condition_change_table(session, *, method="arx", method_settings=None, conditions=None, n_members=20,
                           seed=0, horizon_steps=None, level=0.95, trials=None, fits=None) -> pd.DataFrame:
    """Step gains per condition with bootstrap intervals over each condition's trials.

    Parameters
    ----------
    session : Session
    method, method_settings, conditions
        As in :func:`fit_per_condition`.
    n_members : int, default 20
        Bootstrap members per condition.
    seed : int, default 0
    horizon_steps : int, optional
        Samples after which the step response is read; default :func:`gain_steps_from_data`.
    level : float, default 0.95
    trials : sequence of int, optional
        The trials to use (default all; ``fit`` passes its training trials).
    fits : ConditionFits, optional
        The per-condition models already fitted on these trials (else fitted here).

    Returns
    -------
    pandas.DataFrame
        Columns ``condition``, ``n_trials``, ``output``, ``input``, ``step_gain`` (the condition's model fitted on
        all its trials), ``low``, ``high`` (the ``level`` percentile interval over the bootstrap members);
        ``attrs["gain_steps"]`` holds the horizon used.
    """
    if fits is None:
        fits = fit_per_condition(session, method=method, method_settings=method_settings, conditions=conditions,
                                 trials=trials)
    if horizon_steps is None:
        horizon_steps, _ = gain_steps_from_data(session, list(fits.models.values()))
    rows = []
    for k, (c, model) in enumerate(fits.models.items()):
        sub = session.select_trials(fits.trials[c])
        rows += _gain_rows({"condition": c, "n_trials": len(fits.trials[c])}, model, sub, method, method_settings,
                           n_members, int(seed) + k, horizon_steps, level)
    table = pd.DataFrame(rows)
    table.attrs["gain_steps"] = int(horizon_steps)
    return table


def condition_heldout_scores(fits, session, *, pooled, trials, conditions=None) -> pd.DataFrame:
    """Each condition's model against one pooled model, in free run on the held-out trials of that condition.

    Parameters
    ----------
    fits : ConditionFits
        Fitted on training trials only.
    session : Session
    pooled : fitted predictor
        One model of all training trials (the plain fit).
    trials : sequence of int
        The held-out trials (none of them among ``fits.trials``).
    conditions : sequence of str, optional
        One label per trial of ``session`` (default its metadata).

    Returns
    -------
    pandas.DataFrame
        Columns ``condition``, ``n_train``, ``n_test``, ``vaf_condition_model``, ``vaf_pooled_model`` (free-run
        VAF in %, mean over outputs; NaN for a condition with no held-out trial).
    """
    from .metrics import freerun_scores

    labels = trial_conditions(session, conditions)
    used = {t for ts in fits.trials.values() for t in ts}
    test = [int(t) for t in trials]
    if used & set(test):
        raise InvalidParameterError(f"held-out trials {sorted(used & set(test))} were used to fit the per-condition "
                                    "models; score on trials they were not fitted on.")
    rows = []
    for c, model in fits.models.items():
        held = [t for t in test if labels[t] == c]
        vaf = {"vaf_condition_model": np.nan, "vaf_pooled_model": np.nan}
        if held:
            sub = session.select_trials(held)
            vaf = {k: float(freerun_scores(p, sub).freerun["vaf"].mean())
                   for k, p in (("vaf_condition_model", model), ("vaf_pooled_model", pooled))}
        rows.append({"condition": c, "n_train": len(fits.trials[c]), "n_test": len(held), **vaf})
    return pd.DataFrame(rows)


def _gain_rows(head, model, session, method, method_settings, n_members, seed, horizon_steps, level) -> list:
    """Rows ``head + output, input, step_gain, low, high``: the model's step gains and their bootstrap interval over
    the trials of ``session`` (the ones the model was fitted on)."""
    q = [(1.0 - float(level)) / 2.0, (1.0 + float(level)) / 2.0]
    ens = BootstrapEnsemble(method=method, method_settings=method_settings, n_members=n_members,
                            seed=seed).fit(session)
    members = np.stack([step_gains(mb, horizon_steps) for mb in ens.members_])
    point = step_gains(model, horizon_steps)
    lo, hi = np.quantile(members, q, axis=0)
    return [{**head, "output": out, "input": inp, "step_gain": point[i, j], "low": lo[i, j], "high": hi[i, j]}
            for i, out in enumerate(model.output_names_) for j, inp in enumerate(model.input_names_)]


def window_change_table(session, *, method="arx", method_settings=None, window_trials=4, step_trials=None,
                        trials=None, n_members=20, seed=0, horizon_steps=None, level=0.95) -> pd.DataFrame:
    """Step gains per sliding window of consecutive trials, with bootstrap intervals over each window's trials.

    Parameters
    ----------
    session : Session
    method : str, default "arx"
    method_settings : dict, optional
    window_trials : int, default 4
        Trials per window; at least 2 (a window's interval resamples its trials).
    step_trials : int, optional
        Trials between the starts of two windows (default ``window_trials``: windows that do not overlap).
    trials : sequence of int, optional
        The trials to window over, in this order (default all; ``fit`` passes its training trials).
    n_members, seed, horizon_steps, level
        As in :func:`condition_change_table`.

    Returns
    -------
    pandas.DataFrame
        Columns ``window`` (0, 1, ...), ``trials`` (first-last trial index of the session), ``n_trials``, ``output``,
        ``input``, ``step_gain`` (the window's model), ``low``, ``high``; ``attrs["gain_steps"]`` holds the
        horizon used.

    Raises
    ------
    InvalidParameterError
        A window below 2 trials or longer than the trials given, or a step below 1.
    """
    idx = tuple(range(session.n_trials)) if trials is None else tuple(int(t) for t in trials)
    W = int(window_trials)
    S = W if step_trials is None else int(step_trials)
    if W < 2 or W > len(idx) or S < 1:
        raise InvalidParameterError(f"a window needs 2 to {len(idx)} trials (the trials it slides over) and a step of "
                                    f"at least 1 trial; got {window_trials!r} trials and a step of {S!r}.")
    sub = session.select_trials(idx)
    fits = sliding_window_fits(sub, method=method, method_settings=method_settings, window_trials=W, step_trials=S)
    if horizon_steps is None:
        horizon_steps, _ = gain_steps_from_data(sub, [model for _, model in fits])
    rows = []
    for k, (local, model) in enumerate(fits):
        head = {"window": k, "trials": f"{idx[local[0]]}-{idx[local[-1]]}", "n_trials": len(local)}
        rows += _gain_rows(head, model, sub.select_trials(local), method, method_settings, n_members,
                           int(seed) + k, horizon_steps, level)
    table = pd.DataFrame(rows)
    table.attrs["gain_steps"] = int(horizon_steps)
    return table
