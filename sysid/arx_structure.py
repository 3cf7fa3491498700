"""Structure selection for ridge ARX: output lags, input lags and delay chosen with the ridge strength by
cross-validation over whole trials, from one streaming pass.

Every candidate structure ``(na, nb, d)`` is scored on the same rows: those whose longest window of the grid,
``L_max = max(na_max, d_max + nb_max − 1)`` samples, lies inside one valid segment. Its regressors are a subset of
the lagged vector ``[Z_k; …; Z_{k−L_max}]`` whose moments one pass accumulates, so every structure and every ridge
strength is scored from those moments alone (as :mod:`stimsteer.sysid.arx` does for the strengths). The score is
the one-step validation error ``SSE / SST`` on held-out trials averaged over output channels (``1 − R²``). Among
the structures whose mean error is within :data:`STRUCTURE_TOLERANCE` (relative) or :data:`STRUCTURE_FLOOR`
(absolute) of the lowest, the one with the fewest coefficients wins (then the lower error),
so exact data, where every structure that contains the true one scores at rounding level, give the true structure.
Order selection by cross-validation on data not used for the fit follows Ljung (1999), System Identification,
2nd ed., ch. 16.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from .exceptions import InvalidParameterError
from .arx_cv import cv_errors, cv_table
from .arx_regression import _Problem

__all__ = ["AUTO", "DEFAULT_LAG_GRID", "DEFAULT_DELAY_GRID", "structure_candidates", "structure_table",
           "edge_notes", "select_structure", "best_alpha"]

#: The setting that asks for a lag or delay to be chosen from its grid.
AUTO = "auto"
#: Candidate output and input lag counts (samples): the stated grid of ``fit``'s automatic structure.
DEFAULT_LAG_GRID = (1, 2, 3, 4, 6, 8)
#: Candidate input delays (samples); 0 allows direct feed-through.
DEFAULT_DELAY_GRID = (0, 1, 2, 3)
#: Structures whose validation error is within this share of the lowest count as equally good (our own margin:
#: a 1 % difference of 1 − R² is below what separates structures on held-out trials of typical length).
STRUCTURE_TOLERANCE = 0.01
#: ... or within this absolute error (rounding level of exact data, where the best errors are ~1e-15).
STRUCTURE_FLOOR = 1e-9


def _grid(name, values, lowest) -> tuple:
    try:
        arr = np.atleast_1d(np.asarray(values))
    except (TypeError, ValueError):
        arr = np.asarray([None])
    ok = arr.ndim == 1 and arr.size > 0 and all(
        isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_)) and v >= lowest for v in arr.tolist())
    if not ok:
        raise InvalidParameterError(f"{name} must be a non-empty list of whole numbers >= {lowest}; got {values!r}.")
    return tuple(sorted({int(v) for v in arr.tolist()}))


def _one(name, value, grid, lowest) -> tuple:
    if isinstance(value, str) and value == AUTO:
        return grid
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < lowest:
        raise InvalidParameterError(f"{name} must be an integer >= {lowest} or 'auto' (chosen by cross-validation "
                                    f"from its grid); got {value!r}.")
    return (int(value),)


def structure_candidates(est) -> tuple[list, dict]:
    """The ``(na, nb, d)`` candidates of a RidgeArx's settings, and the grid of each (for edge reports)."""
    lags = _grid("lag_grid", est.lag_grid, 1)
    delays = _grid("delay_grid", est.delay_grid, 0)
    grids = {"output_lags": _one("output_lags", est.output_lags, lags, 0),
             "input_lags": _one("input_lags", est.input_lags, lags, 1),
             "delay_samples": _one("delay_samples", est.delay_samples, delays, 0)}
    cands = [(na, nb, d) for na in grids["output_lags"] for nb in grids["input_lags"]
             for d in grids["delay_samples"]]
    return cands, grids


def _curve(table) -> tuple:
    """``(alpha, mean_error, std_error)`` arrays of a strength table (a DataFrame, or those three arrays)."""
    if isinstance(table, tuple):
        return table
    return tuple(table[c].to_numpy() for c in ("alpha", "mean_error", "std_error"))


def _errors_curve(errors: np.ndarray, alphas: np.ndarray) -> tuple:
    """:func:`_curve` of ``cv_table(errors, alphas, k)`` without building the table (the same numbers)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows when no fold could be scored
        return alphas, np.nanmean(errors, axis=1), np.nanstd(errors, axis=1)


def structure_table(rows: list) -> pd.DataFrame:
    """One row per structure: its best strength's mean and spread of the validation error; the selected one first,
    then the others best first.

    ``rows`` holds ``(na, nb, d, n_coef, cv_table)`` with ``cv_table`` as :meth:`RidgeArx._cross_validate` makes
    (or its :func:`_curve`).
    """
    out = []
    for na, nb, d, n_coef, table in rows:
        alpha, err, std = _curve(table)
        if not np.isfinite(err).any():
            out.append((na, nb, d, n_coef, float(alpha[0]), np.inf, np.nan))
            continue
        best = np.flatnonzero(err <= np.nanmin(err) * (1 + 1e-12) + 1e-300)
        i = int(best[np.argmax(alpha[best])])  # ties: the largest strength
        out.append((na, nb, d, n_coef, float(alpha[i]), float(err[i]), float(std[i])))
    frame = pd.DataFrame(out, columns=["output_lags", "input_lags", "delay_samples", "n_coefficients", "alpha",
                                       "mean_error", "std_error"])
    frame = frame.sort_values(["mean_error", "n_coefficients", "alpha"], ascending=[True, True, False],
                              kind="stable").reset_index(drop=True)
    best = frame["mean_error"].iloc[0]
    near = frame["mean_error"].to_numpy() <= best + max(STRUCTURE_TOLERANCE * best, STRUCTURE_FLOOR)
    pick = int(np.flatnonzero(near)[np.argmin(frame["n_coefficients"].to_numpy()[near])]) if np.isfinite(best) else 0
    frame["selected"] = np.arange(len(frame)) == pick
    # the selected structure first, then the others best first
    return pd.concat([frame.iloc[[pick]], frame.drop(index=pick)], ignore_index=True)


def edge_notes(chosen: dict, grids: dict, alpha: float, alphas: np.ndarray) -> tuple:
    """One sentence per chosen value that sits on an edge of a grid that could be widened."""
    notes = []
    for name, value in chosen.items():
        grid = grids[name]
        if len(grid) < 2:
            continue  # a value the user fixed is not a grid edge
        if value == grid[-1]:
            notes.append(f"{name} = {value} is the largest value of its grid {list(grid)}: a larger value might fit "
                         f"better; widen the grid (lag_grid / delay_grid) to check.")
        elif value == grid[0] and value > (1 if name == "input_lags" else 0):
            notes.append(f"{name} = {value} is the smallest value of its grid {list(grid)}: widen the grid "
                         "downwards to check.")
    a = float(alpha)
    if alphas.size >= 2 and a == alphas[-1]:
        notes.append(f"alpha = {a:g} is the largest ridge strength of the grid ({alphas[0]:g} … {alphas[-1]:g}): "
                     "stronger shrinkage might predict better; add larger alphas.")
    elif alphas.size >= 2 and a == alphas[0] and a > 0:
        notes.append(f"alpha = {a:g} is the smallest ridge strength of the grid ({alphas[0]:g} … {alphas[-1]:g}): "
                     "the data need (almost) no shrinkage; add smaller alphas (or 0, least squares) to check.")
    return tuple(notes)



class _Tables(dict):
    """``{structure: cv_table}`` of the scored candidates, each table made from its errors when it is asked for."""

    def __init__(self, errors: dict, alphas: np.ndarray, k: int):
        super().__init__(errors)
        self.alphas, self.k = alphas, k

    def __getitem__(self, structure):
        return cv_table(super().__getitem__(structure), self.alphas, self.k)

    def errors(self, structure) -> np.ndarray:
        """The structure's ``(n_alphas, k)`` validation errors."""
        return super().__getitem__(structure)


def _longest(c) -> int:
    na, nb, d = c
    return max(na, d + nb - 1)


def best_alpha(errors: np.ndarray, alphas: np.ndarray) -> float:
    """The strength a structure's ``(n_alphas, k)`` validation errors choose: the largest among equal lowest mean
    errors (the first when no fold could be scored)."""
    mean = _errors_curve(errors, alphas)[1]
    return float(alphas[mean == np.nanmin(mean)].max()) if (~np.isnan(mean)).any() else float(alphas[0])


def _chosen(candidates, n_coef, scored, errors, alphas, k):
    """The selected structure and the structure table from the scored candidates' errors."""
    found = dict(zip(scored, errors))
    empty = np.full((alphas.size, k), np.nan)
    # each candidate's strength curve from its errors; a table (a DataFrame, ~1 ms each) only for the chosen one
    rows = [(*c, n_coef[i], _errors_curve(found.get(i, empty), alphas)) for i, c in enumerate(candidates)]
    structures = structure_table(rows)
    top = structures.loc[structures["selected"]].iloc[0]
    return (int(top["output_lags"]), int(top["input_lags"]), int(top["delay_samples"])), structures, found


def select_structure(est, session, candidates, alphas, keep: dict | None = None, ahead=None):
    """The best ``(na, nb, d)`` of a RidgeArx by trial-wise cross-validation, and the table of every candidate.

    Returns ``(structure, table)``; ``table`` is None when there is one candidate (nothing to choose). ``keep`` (a
    dict) receives the shared rows' moments (``"moments"``: what ``_accumulate`` returns), their lag count
    (``"n_lags"``) and each scored candidate's strength table (``"tables"``): a chosen structure whose own rows are
    the shared ones (its longest lag is the grid's) needs no second pass nor second cross-validation.

    ``ahead(structure, keep)`` (large Grams): the final fit's strength-free part, prepared on the worker the last
    folds leave idle for the structure the other folds choose; ``keep["ahead"]`` receives ``(structure, its
    result)`` (None where it failed), for the caller to use when all folds choose the same.
    """
    if len(candidates) == 1:
        return candidates[0], None
    n_lags = max(_longest(c) for c in candidates)
    probe = est._validated(session, max(candidates, key=_longest), n_lags)
    folds, total, k, _scheme, _shift = est._accumulate(session, probe)
    probs = [_Problem(probe.p, probe.m, na, nb, d, probe.fit_intercept, n_lags) for na, nb, d in candidates]
    n_coef = [q.x_idx.size + int(q.fit_intercept) for q in probs]
    scored = [i for i, q in enumerate(probs) if total.n >= n_coef[i]]
    keep = {} if keep is None else keep
    keep.update(moments=(folds, total, k, _scheme, _shift), n_lags=n_lags)

    def work(partial):  # on a cross-validation worker, with the errors of every fold but the last ones
        try:
            structure = _chosen(candidates, n_coef, scored, partial, alphas, k)[0]
            return structure, ahead(structure, keep)
        except Exception:  # the caller fits as it would without (and meets the same error there, if any)
            return None

    later = {"work": work} if ahead is not None else None
    errors = cv_errors([probs[i] for i in scored], folds, total, alphas, ahead=later) if scored else []
    structure, structures, found = _chosen(candidates, n_coef, scored, errors, alphas, k)
    keep.update(tables=_Tables({candidates[i]: found[i] for i in scored}, alphas, k))
    if later is not None and "result" in later:
        keep["ahead"] = later["result"]
    return structure, structures

