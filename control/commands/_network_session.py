"""``stimsteer network --map MAP --session SESSION``: fit the map-constrained model and compare conditions."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ...sysid import InvalidParameterError, load_session
from ...sysid.mapfit import MapConstrainedFit, compare_with_unconstrained
from ...sysid.network.conditions import CONDITIONS_KEY, condition_figures

__all__ = ["session_outputs", "read_mixing", "model_condition_tables"]


def _selected(session, args):
    """The session with the command's ``--inputs``/``--outputs``/``--drop`` applied."""
    from ._common import selection

    chosen = selection(args)
    return session.select(**chosen) if chosen else session


def read_mixing(path, net, output_names) -> np.ndarray:
    """The mixing matrix from a CSV: a header ``channel,<node>,...`` then one row per recorded channel."""
    table = pd.read_csv(path)
    if table.columns[0] != "channel" or sorted(table.columns[1:]) != sorted(net.node_names):
        raise InvalidParameterError(f"{path}: the header must be 'channel' then the map's nodes "
                                    f"({', '.join(net.node_names)}); got {list(table.columns)}.")
    if sorted(table["channel"].astype(str)) != sorted(output_names):
        raise InvalidParameterError(f"{path}: the channels {list(table['channel'])} must be the session's outputs "
                                    f"{list(output_names)}.")
    table = table.set_index(table["channel"].astype(str)).loc[list(output_names), list(net.node_names)]
    try:
        return table.to_numpy(dtype=np.float64)
    except ValueError:
        raise InvalidParameterError(f"{path}: every mixing weight must be a number.") from None


def _edges(net, fit):
    rows = []
    W = np.asarray(net.weights)
    for i, j in zip(*np.nonzero(fit.support_)):
        rows.append((net.node_names[j], net.node_names[i], W[i, j], fit.A_[i, j]))
    return pd.DataFrame(rows, columns=["from", "to", "map_weight", "fitted_weight"])


def session_outputs(net, args):
    """The map-constrained model fitted to ``args.session`` and the extra tables (edges, scores, conditions)."""
    session = _selected(load_session(args.session), args)
    stimulated = [c.strip() for c in args.stimulated.split(",") if c.strip()]
    mixing = None if args.mixing is None else read_mixing(args.mixing, net, session.output_names)
    fit, scores = compare_with_unconstrained(session, net, stimulated, mixing=mixing, shrink=args.shrink,
                                             seed=args.seed)
    tables = {"map_fit_edges.csv": _edges(net, fit), "map_fit_scores.csv": scores.table.assign(
        test_trials=" ".join(str(i) for i in scores.test_trials), seed=scores.seed)}
    labels = None if args.conditions is None else [c.strip() for c in args.conditions.split(",")]
    if labels is not None or CONDITIONS_KEY in session.metadata:
        def refit(s):
            return MapConstrainedFit(network_map=net, stimulated=stimulated, mixing=mixing,
                                     shrink=args.shrink).fit(s).model_

        tables["conditions.csv"] = condition_figures(session, refit, labels=labels, n_boot=args.bootstrap,
                                                     seed=args.seed, gramian_steps=args.gramian_steps).table
    return fit.model_, tables


def model_condition_tables(predictor, args) -> dict:
    """``conditions.csv`` for a fitted model: the same method, with the same settings, refitted per condition.

    The predictor must be an estimator (``get_params`` and ``fit``: it is cloned with scikit-learn's ``clone``) with
    the state-space form; a bare state-space model has no method to refit.
    """
    from sklearn.base import clone

    if not (callable(getattr(type(predictor), "fit", None)) and callable(getattr(type(predictor), "get_params", None))):
        raise InvalidParameterError(
            f"per-condition figures refit the model's method on each condition's trials, but the model file holds a "
            f"{type(predictor).__name__} without a fitting method; save the fitted estimator (stimsteer fit).")
    session = _selected(load_session(args.session), args)
    labels = None if args.conditions is None else [c.strip() for c in args.conditions.split(",")]

    def refit(s):
        return clone(predictor).fit(s).state_space_model()

    table = condition_figures(session, refit, labels=labels, n_boot=args.bootstrap, seed=args.seed,
                              gramian_steps=args.gramian_steps).table
    return {"conditions.csv": table}
