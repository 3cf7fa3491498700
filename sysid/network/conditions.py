"""Network figures per experimental condition, their differences, and bootstrap intervals over trials.

Trials carry a condition label (one per trial: ``session.metadata["trial_conditions"]``, or given explicitly). For
each condition a model is fitted to its trials (any function ``session -> StateSpaceModel``, e.g. a
map-constrained fit) and its per-site figures are computed: the squared H2 norm to the recorded channels (always,
coordinate-free) and, when the model's states are the nodes of a network map, the average controllability of each
site. Differences are taken against the first condition (in order of first appearance). Intervals are percentile
bootstrap intervals (Efron and Tibshirani 1993, An Introduction to the Bootstrap, ch. 13): trials are resampled with
replacement within each condition, independently across conditions, the model refitted and the figures recomputed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import InvalidParameterError, SessionError
from ..session import Session
from .controllability import _require_stable, average_controllability_values
from .outputs import site_output_controllability

__all__ = ["trial_conditions", "condition_figures", "ConditionFigures", "CONDITIONS_KEY"]

#: The session metadata key holding one condition label per trial.
CONDITIONS_KEY = "trial_conditions"


def trial_conditions(session, labels=None) -> tuple:
    """One condition label per trial (:func:`stimsteer.sysid.conditions.trial_conditions`), at least two of each.

    Raises
    ------
    SessionError
        When no labels exist, their count differs from the number of trials, or a condition has fewer than 2
        trials (no bootstrap interval).
    """
    from ..conditions import trial_conditions as _labels_per_trial

    labels = _labels_per_trial(session, labels)
    for c in dict.fromkeys(labels):
        if labels.count(c) < 2:
            raise SessionError(f"condition {c!r} has {labels.count(c)} trial; each condition needs at least 2 trials "
                               "for a bootstrap interval.")
    if len(set(labels)) < 2:
        raise SessionError(f"all trials are labelled {labels[0]!r}; give at least two conditions to compare.")
    return labels


def _resampled(session, idx) -> Session:
    """The session of trials ``idx`` (repeats allowed), concatenated."""
    parts = [session.trials[i] for i in idx]
    stops = np.cumsum([b - a for a, b in parts])
    return Session(u=np.concatenate([session.u[a:b] for a, b in parts]),
                   y=np.concatenate([session.y[a:b] for a, b in parts]),
                   mask=np.concatenate([session.mask[a:b] for a, b in parts]),
                   output_mask=np.concatenate([session.output_mask[a:b] for a, b in parts]),
                   trials=np.column_stack([np.concatenate(([0], stops[:-1])), stops]),
                   sample_rate_hz=session.sample_rate_hz, input_names=session.input_names,
                   output_names=session.output_names, input_units=session.input_units,
                   output_units=session.output_units)


def _figures(model, gramian_steps) -> dict:
    out = {"h2_squared": np.asarray(site_output_controllability(model, horizon_steps=gramian_steps).h2_squared)}
    if isinstance(model.info.get("network_map"), dict):
        A = np.asarray(model.A)
        if gramian_steps is None:
            _require_stable(A, "the average controllability of a condition's model", model.spectral_radius)
        out["average_controllability"] = average_controllability_values(A, np.asarray(model.B), gramian_steps)
    return out


@dataclass(frozen=True)
class ConditionFigures:
    """Per-condition figures, differences against the first condition, and bootstrap intervals.

    Attributes
    ----------
    table : pandas.DataFrame
        Columns ``condition`` (a label, or ``"B - A"`` for a difference), ``figure``, ``site``, ``estimate``,
        ``ci_low``, ``ci_high``, ``n_trials``.
    n_boot : int
    seed : int
    level : float
        Interval coverage (0.95).
    """

    table: object
    n_boot: int
    seed: int
    level: float


def condition_figures(session, fit_model, *, labels=None, n_boot: int = 200, seed: int = 0, level: float = 0.95,
                      gramian_steps: int | None = None) -> ConditionFigures:
    """Fit a model per condition and compare their network figures with bootstrap intervals over trials.

    Parameters
    ----------
    session : Session
    fit_model : callable
        ``fit_model(session) -> StateSpaceModel``.
    labels : sequence of str, optional
        One per trial; default the session's ``metadata["trial_conditions"]``.
    n_boot : int, default 200
    seed : int, default 0
    level : float, default 0.95
    gramian_steps : int, optional

    Returns
    -------
    ConditionFigures
    """
    import pandas as pd

    if isinstance(n_boot, bool) or int(n_boot) != n_boot or n_boot < 10:
        raise InvalidParameterError(f"n_boot must be a whole number >= 10; got {n_boot!r}.")
    labels = trial_conditions(session, labels)
    conds = list(dict.fromkeys(labels))
    idx = {c: [i for i, lab in enumerate(labels) if lab == c] for c in conds}
    rng = np.random.default_rng(seed)
    models = {c: fit_model(_resampled(session, idx[c])) for c in conds}
    point = {c: _figures(models[c], gramian_steps) for c in conds}
    boot = {c: [] for c in conds}
    for _ in range(int(n_boot)):
        for c in conds:
            pick = rng.choice(idx[c], size=len(idx[c]), replace=True)
            boot[c].append(_figures(fit_model(_resampled(session, pick)), gramian_steps))
    sites = list(models[conds[0]].input_names)
    q = [(1 - level) / 2 * 100, (1 + level) / 2 * 100]
    rows = []
    for c in conds:
        for fig, est in point[c].items():
            lo, hi = np.percentile(np.array([b[fig] for b in boot[c]]), q, axis=0)
            rows += [(c, fig, s, est[j], lo[j], hi[j], len(idx[c])) for j, s in enumerate(sites)]
    ref = conds[0]
    for c in conds[1:]:
        for fig, est in point[c].items():
            diff = np.array([b[fig] for b in boot[c]]) - np.array([b[fig] for b in boot[ref]])
            lo, hi = np.percentile(diff, q, axis=0)
            d = est - point[ref][fig]
            rows += [(f"{c} - {ref}", fig, s, d[j], lo[j], hi[j], len(idx[c]) + len(idx[ref]))
                     for j, s in enumerate(sites)]
    table = pd.DataFrame(rows, columns=["condition", "figure", "site", "estimate", "ci_low", "ci_high", "n_trials"])
    return ConditionFigures(table=table, n_boot=int(n_boot), seed=int(seed), level=float(level))
