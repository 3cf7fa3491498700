"""Uncertainty by the bootstrap over trials: an ensemble of any registered route, with prediction intervals.

Each member is the chosen method fitted on a resample (with replacement) of the training trials, whole trials
being the independent units (the block/cluster bootstrap: samples inside a trial are correlated, trials are not).
The trials a member did not draw (out of bag) give its prediction errors at every horizon step; a 95 % prediction
interval at step ``h`` is the 2.5–97.5 % range of ``ŷ_b + e`` over the members' predictions ``ŷ_b`` and the pooled
out-of-bag errors ``e`` at that step (the members' spread carries the estimation uncertainty, the errors the noise
and the model error). Beyond the longest out-of-bag horizon the last step's errors are used.

The ensemble is itself a predictor (the mean of its members); when every member has linear prediction maps so does
the ensemble (the mean of affine maps), and ``member_maps`` gives each member's maps to the robust planner
(:mod:`stimsteer.control.mpc.robust`).

References
----------
Efron B., Tibshirani R. J. (1993), An Introduction to the Bootstrap, Chapman & Hall: ch. 13 (percentile
intervals) and ch. 17 (out-of-bag prediction error).
Davison A. C., Hinkley D. V. (1997), Bootstrap Methods and their Application, Cambridge: section 2.4 (clustered
data: resample the clusters).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ._base import BasePredictor, check_fitted
from ._progress import progress
from .exceptions import InvalidParameterError, SessionError
from .protocols import LinearPredictor, PredictionMaps
from .registry import METHODS

__all__ = ["BootstrapEnsemble", "resample_trials", "bootstrap_draws", "interval_coverage"]

_MAX_RESIDUAL_WINDOWS = 200  # out-of-bag windows per member (evenly strided beyond that)
_MAX_POOL = 400  # pooled errors used per horizon step when forming intervals
_COVERAGE_BATCH = 50  # windows whose member predictions are made at once (interval_coverage)


def resample_trials(session, indices):
    """A session made of the given trials in the given order, repeats allowed (a bootstrap resample).

    Parameters
    ----------
    session : Session
    indices : sequence of int
        Trial indices, each in ``[0, n_trials)``; a trial may appear more than once.
    """
    idx = [int(i) for i in np.atleast_1d(indices)]
    if not idx or min(idx) < 0 or max(idx) >= session.n_trials:
        raise SessionError(f"trial indices must be in [0, {session.n_trials}); got {idx}.")
    parts = [session.trials[i] for i in idx]
    stops = np.cumsum([b - a for a, b in parts])
    return dataclasses.replace(
        session, u=np.concatenate([session.u[a:b] for a, b in parts]),
        y=np.concatenate([session.y[a:b] for a, b in parts]),
        mask=np.concatenate([session.mask[a:b] for a, b in parts]),
        output_mask=np.concatenate([session.output_mask[a:b] for a, b in parts]),  # blanked outputs stay blanked
        trials=np.column_stack([np.concatenate(([0], stops[:-1])), stops]),
        metadata={**session.metadata, "bootstrap_trials": idx})


def bootstrap_draws(n_trials: int, n_members: int, seed: int) -> list:
    """``n_members`` draws of ``n_trials`` trial indices with replacement, from ``seed`` (sorted within a draw)."""
    rng = np.random.default_rng(seed)
    return [np.sort(rng.integers(0, n_trials, n_trials)) for _ in range(int(n_members))]


def _route_of(method: str) -> tuple:
    keys = [k for k in METHODS if k[1] == method and method != "bootstrap"]
    if not keys:
        known = sorted({m for _, m in METHODS if m != "bootstrap"})
        raise InvalidParameterError(f"method must be a registered method to bootstrap, one of {known}; got "
                                    f"{method!r}.")
    return keys[0]


def _oob_errors(member, session, horizon: int):
    """Prediction errors of ``member`` on ``session`` (its out-of-bag trials), shape (n_windows, horizon, p).

    Windows are evenly strided over every valid segment; a window shorter than ``horizon`` is padded with NaN.
    """
    P = int(member.past_steps_)
    out = []
    for a, b in session.segments(min_length=P + 1):
        u, y, _ = session.read(a, b)
        starts = np.arange(P, len(u))
        out.extend((u, y, s) for s in starts)
    if not out:
        return np.empty((0, horizon, session.n_outputs))
    pick = np.linspace(0, len(out) - 1, min(len(out), _MAX_RESIDUAL_WINDOWS)).astype(int)
    errs = np.full((pick.size, horizon, session.n_outputs), np.nan)
    for row, k in enumerate(pick):
        u, y, s = out[k]
        h = min(horizon, len(u) - s)
        errs[row, :h] = y[s:s + h] - member.predict(u[s - P:s], y[s - P:s], u[s:s + h])
    return errs


class BootstrapEnsemble(BasePredictor):
    """Members of one registered method fitted on bootstrap resamples of the trials; prediction intervals.

    Parameters
    ----------
    method : str, default "arx"
        A registered method (any route): ``arx``, ``subspace``, ``lsq``, ``hankel``, ``lifted``, ``hammerstein``...
    method_settings : dict, optional
        Settings of every member (as for ``fit_route``'s ``settings``).
    past_steps : int, optional
        The members' past window (their ``past_steps`` setting, unless ``method_settings`` gives one).
    n_members : int, default 20
    residual_horizon_steps : int, default 50
        Longest horizon at which out-of-bag errors are collected, samples.
    seed : int, default 0

    Attributes
    ----------
    members_ : list of fitted predictors
    draws_ : list of ndarray
        The trial indices each member was fitted on.
    selection_table_ : pandas.DataFrame
        Per member: distinct trials drawn and trials out of bag.
    errors_ : ndarray, shape (n_errors, residual_horizon_steps, p)
        Pooled out-of-bag errors (NaN where a window ended early).
    route_, has_linear_maps, past_steps_, max_horizon_steps_, n_inputs_, n_outputs_, input_names_,
    output_names_, input_units_, output_units_, selection_notes_

    Raises
    ------
    SessionError
        Fewer than 2 trials (no bootstrap over trials is possible; 10 or more give useful intervals), or no member
        left any trial out of bag.
    InvalidParameterError
        An unknown method, or fewer than 2 members.
    """

    storage_kind = "bootstrap_ensemble"
    #: Not in the benchmark's default method set (opt in with a MethodSpec): 3.6x the quick bench's time for an
    #: ensemble of a method already in the set (measured in benchmarks/README.md, bench_accuracy.py bench-set).
    in_default_bench = False

    def __init__(self, *, method="arx", method_settings=None, past_steps=None, n_members=20,
                 residual_horizon_steps=50, seed=0):
        self.method = method
        self.method_settings = method_settings
        self.past_steps = past_steps
        self.n_members = n_members
        self.residual_horizon_steps = residual_horizon_steps
        self.seed = seed

    @property
    def has_linear_maps(self) -> bool:
        members = getattr(self, "members_", None)
        return bool(members) and all(isinstance(m, LinearPredictor) and m.has_linear_maps for m in members)

    def fit(self, session):
        """Fit every member on its resample of the trials and collect its out-of-bag errors."""
        from .routes import make_estimator

        route = _route_of(str(self.method))
        B, H = int(self.n_members), int(self.residual_horizon_steps)
        if B < 2 or H < 1:
            raise InvalidParameterError(f"n_members must be >= 2 and residual_horizon_steps >= 1; got {B} and {H}.")
        if session.n_trials < 2:
            raise SessionError(f"the bootstrap over trials needs at least 2 trials (10 or more for useful "
                               f"intervals); the session has {session.n_trials}. Record more trials or split long "
                               "ones.")
        members, draws, errors = [], bootstrap_draws(session.n_trials, B, int(self.seed)), []
        settings = dict(self.method_settings or {})
        if self.past_steps is not None:
            settings.setdefault("past_steps", self.past_steps)
        with progress(B, f"bootstrap members ({route[0]}/{route[1]})", unit="member") as bar:
            for draw in draws:
                est = make_estimator(*route, settings)
                members.append(est.fit(resample_trials(session, draw)))
                oob = np.setdiff1d(np.arange(session.n_trials), draw)
                if oob.size:
                    errors.append(_oob_errors(members[-1], session.select_trials(oob), H))
                bar.update()
        errors = [e for e in errors if e.size]
        if not errors:
            raise SessionError("no bootstrap member left a trial out of bag to measure its errors; use more trials.")
        self.members_, self.draws_, self.route_ = members, draws, route
        self.selection_table_ = _member_table(draws, session.n_trials)
        self.errors_ = np.concatenate(errors)
        self._describe(members[0])
        self.selection_notes_ = (f"{B} members of {route[0]}/{route[1]} on bootstrap resamples of "
                                 f"{session.n_trials} trials; intervals from {self.errors_.shape[0]} out-of-bag "
                                 "windows.",)
        return self

    def _describe(self, first):
        self.past_steps_ = max(int(m.past_steps_) for m in self.members_)
        hs = [m.max_horizon_steps_ for m in self.members_ if m.max_horizon_steps_ is not None]
        self.max_horizon_steps_ = min(hs) if hs else None
        for name in ("n_inputs_", "n_outputs_", "input_names_", "output_names_", "input_units_", "output_units_"):
            setattr(self, name, getattr(first, name))

    # -------------------------------------------------------------------------------------------- predict
    def member_predictions(self, u_past, y_past, u_future) -> np.ndarray:
        """Every member's predictions of a batch of windows, shape (n_members, n_windows, n_future, p)."""
        check_fitted(self, "members_")
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        return np.stack([m.predict_many(up, yp, uf) for m in self.members_])

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """The members' mean prediction, shape (n_windows, n_future, p)."""
        return self.member_predictions(u_past, y_past, u_future).mean(axis=0)

    def predict_interval(self, u_past, y_past, u_future, *, level=0.95):
        """Prediction and its interval for one window: ``(mean, lower, upper)``, each (n_future, p).

        Parameters
        ----------
        level : float, default 0.95
            Coverage the interval aims at, in (0, 1).
        """
        preds = self.member_predictions(*self._window(u_past, y_past, u_future))[:, 0]
        return (preds.mean(axis=0), *self._bounds(preds, float(level)))

    def _bounds(self, preds, level):
        """Quantiles of member predictions plus pooled out-of-bag errors, per step and output.

        The pools depend on the errors alone (made and sorted once per horizon, :meth:`_pools`), so each quantile's
        two order statistics lie in short sorted runs of the sums (:func:`_sum_quantiles`); they are interpolated
        as :func:`numpy.quantile` does (its ``linear`` method: the same numbers).
        """
        if not 0.0 < level < 1.0:
            raise InvalidParameterError(f"level must be in (0, 1), e.g. 0.95; got {level!r}.")
        q = np.array([(1.0 - level) / 2.0, (1.0 + level) / 2.0])
        n_future, p = preds.shape[1], preds.shape[2]
        lo, hi = np.empty((n_future, p)), np.empty((n_future, p))
        pools = self._pools(n_future)
        for size in sorted({e.shape[1] for e in pools}):
            steps = [h for h in range(n_future) if pools[h].shape[1] == size]
            a = preds[:, steps].transpose(1, 2, 0).reshape(len(steps) * p, -1)  # (steps · p, members)
            e = np.concatenate([pools[h] for h in steps])  # (steps · p, pool), sorted along each row
            lo[steps], hi[steps] = (v.reshape(len(steps), p) for v in _sum_quantiles(a, e, q))
        return lo, hi

    def _pools(self, n_future: int) -> list:
        """Per horizon step, the pooled out-of-bag errors used for its interval, each (p, n), sorted along rows.

        A fixed subsample (seed 0, drawn step by step) of at most ``_MAX_POOL`` complete error vectors: the same
        window gives the same interval; cached per horizon length until the errors change.
        """
        key = (id(self.errors_), int(n_future))
        cache = self.__dict__.setdefault("_pool_cache", {})
        if key not in cache:
            cache.clear()
            p, H = self.errors_.shape[2], self.errors_.shape[1]
            rng, pools = np.random.default_rng(0), []
            for h in range(n_future):
                e = self.errors_[:, min(h, H - 1)]
                e = e[np.all(np.isfinite(e), axis=1)]
                if e.shape[0] > _MAX_POOL:
                    e = e[rng.choice(e.shape[0], _MAX_POOL, replace=False)]
                if not e.shape[0]:
                    e = np.zeros((1, p))
                pools.append(np.sort(e.T, axis=1))
            cache[key] = pools
        return cache[key]

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The mean of the members' maps (every member must have linear maps)."""
        maps = self.member_maps(past_steps, horizon_steps)
        return PredictionMaps(P=np.mean([m.P for m in maps], axis=0), F=np.mean([m.F for m in maps], axis=0),
                              c=np.mean([m.c for m in maps], axis=0), past_steps=int(past_steps),
                              horizon_steps=int(horizon_steps))

    def member_maps(self, past_steps: int, horizon_steps: int) -> list:
        """Each member's prediction maps, for planning robust over the ensemble.

        Raises
        ------
        InvalidParameterError
            When a member has no linear maps (lifted, Hammerstein, ℓ1 Hankel members).
        """
        check_fitted(self, "members_")
        if not self.has_linear_maps:
            raise InvalidParameterError(f"the {self.method} members have no linear prediction maps; a plan robust "
                                        "over the ensemble needs a linear method (arx, subspace, lsq, hankel l2).")
        return [m.prediction_maps(int(past_steps), int(horizon_steps)) for m in self.members_]

    def rest_window(self):
        """Zero inputs and the members' mean resting output over the ensemble's past window."""
        check_fitted(self, "members_")
        ys = [m.rest_window()[1][-1] for m in self.members_]
        return np.zeros((self.past_steps_, self.n_inputs_)), np.tile(np.mean(ys, axis=0), (self.past_steps_, 1))

    # -------------------------------------------------------------------------------------------- storage
    def to_state(self) -> dict:
        """The members' own states, the draws and the pooled errors."""
        check_fitted(self, "members_")
        params = self.get_params()
        params["method_settings"] = {k: v for k, v in dict(self.method_settings or {}).items()}
        params["past_steps"] = -1 if self.past_steps is None else int(self.past_steps)
        return {"params": params, "route": list(self.route_), "errors": self.errors_,
                "draws": np.stack(self.draws_), "members": {f"m{i}": m.to_state() for i, m in
                                                           enumerate(self.members_)}}

    @classmethod
    def from_state(cls, state: dict) -> "BootstrapEnsemble":
        """Rebuild a fitted ensemble from :meth:`to_state` output."""
        params = dict(state["params"])
        params["past_steps"] = None if int(params.get("past_steps", -1)) < 0 else int(params["past_steps"])
        params["method_settings"] = {k: tuple(v) if isinstance(v, list) else v
                                     for k, v in dict(params.get("method_settings") or {}).items()}
        obj = cls(**params)
        obj.route_ = tuple(state["route"])
        member_cls = METHODS[obj.route_].cls()
        members = state["members"]
        obj.members_ = [member_cls.from_state(members[f"m{i}"]) for i in range(len(members))]
        obj.draws_ = [np.asarray(d) for d in np.atleast_2d(state["draws"])]
        obj.errors_ = np.asarray(state["errors"], float)
        obj._describe(obj.members_[0])
        obj.selection_table_ = _member_table(obj.draws_, int(obj.draws_[0].size))
        obj.selection_notes_ = ()
        obj._mark_fitted()
        return obj


def _member_table(draws, n_trials):
    """One row per member: the distinct trials it drew and those left out of bag."""
    import pandas as pd

    return pd.DataFrame([{"member": i, "distinct_trials": int(np.unique(d).size),
                          "out_of_bag_trials": int(n_trials - np.unique(d).size)} for i, d in enumerate(draws)])


def _sum_quantiles(a: np.ndarray, e: np.ndarray, q: np.ndarray) -> list:
    """Per row ``r``, :func:`numpy.quantile` of the sums ``a[r, b] + e[r, i]`` over every ``(b, i)``, at each ``q``.

    ``e`` is sorted along its rows, so row ``b`` of the sums is sorted too (rounding is monotone). A quantile in the
    lower half needs the order statistics of ranks ``k`` and ``k + 1`` from the bottom: every sum at or below
    ``τ = max_b (a_b + e_{K-1})`` with ``K = ⌈(k + 2) / B⌉`` lies in the first ``K'`` entries of its row
    (``K'`` the longest such run), and at least ``k + 2`` sums do, so the ranks are found among ``B K'`` sums
    instead of all ``B n`` (one partition); the upper half likewise from the top (on the negated sums: negation is
    exact). The interpolation is NumPy's ``linear`` method (``(N − 1) q`` and its two-sided formula). NaN anywhere
    hands the work to :func:`numpy.quantile` itself.
    """
    B, n = a.shape[1], e.shape[1]
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(e))):
        return list(np.quantile((a[:, :, None] + e[:, None, :]).reshape(a.shape[0], -1), q, axis=-1))
    N = B * n
    out = []
    for v in (N - 1) * q:
        i0 = int(np.floor(v))
        i1 = min(i0 + 1, N - 1)
        if v <= (N - 1) / 2:
            lo_, hi_ = _low_ranks(a, e, (i0, i1))
        else:  # from the top: rank i is rank N − 1 − i of the negated sums
            lo_, hi_ = (-x for x in _low_ranks(-a, -e[:, ::-1], (N - 1 - i0, N - 1 - i1)))
        d, t = hi_ - lo_, v - i0
        out.append(hi_ - d * (1 - t) if t >= 0.5 else lo_ + d * t)
    return out


def _low_ranks(a: np.ndarray, e: np.ndarray, ranks: tuple) -> tuple:
    """Per row, the sums ``a[r, b] + e[r, i]`` of the given (small) ranks from the bottom; ``e`` sorted along rows."""
    B, n = a.shape[1], e.shape[1]
    K = min(n, -(-(max(ranks) + 1) // B))
    first = (a[:, :, None] + e[:, None, :K]).reshape(a.shape[0], -1)  # B·K ≥ max(ranks) + 1 sums
    tau = np.partition(first, max(ranks), axis=1)[:, max(ranks)]  # so at least max(ranks) + 1 sums are <= tau
    # the run of row b: the pool entries up to τ − a_b, widened by a few rounding units (a longer run is harmless)
    reach = (tau[:, None] - a) + 4 * np.finfo(float).eps * (np.abs(tau)[:, None] + np.abs(a))
    run = max(K, max(int(np.searchsorted(e[r], reach[r].max(), side="right")) for r in range(a.shape[0])))
    head = (a[:, :, None] + e[:, None, :min(run, n)]).reshape(a.shape[0], -1)
    part = np.partition(head, sorted(set(ranks)), axis=1)
    return tuple(part[:, r] for r in ranks)


def interval_coverage(ensemble, session, *, horizon_steps: int, level: float = 0.95, max_windows: int = 300):
    """Share of held-out samples inside the ensemble's prediction intervals, per output, over 1…H steps ahead.

    Parameters
    ----------
    ensemble : BootstrapEnsemble
    session : Session
        Held-out trials.
    horizon_steps : int
    level : float, default 0.95
    max_windows : int, default 300
        Windows evenly strided over the valid segments.

    Returns
    -------
    ndarray, shape (n_outputs,)
        Empirical coverage in [0, 1]; NaN when no segment is long enough.
    """
    P, H = int(ensemble.past_steps_), int(horizon_steps)
    starts = [(a, t) for a, b in session.segments(min_length=P + H) for t in range(a + P, b - H + 1)]
    if not starts:
        return np.full(ensemble.n_outputs_, np.nan)
    pick = np.linspace(0, len(starts) - 1, min(len(starts), int(max_windows))).astype(int)
    inside, total = np.zeros(ensemble.n_outputs_), 0
    for batch in np.array_split(pick, -(-pick.size // _COVERAGE_BATCH)):  # the members predict a batch at once
        reads = [session.read(starts[k][1] - P, starts[k][1] + H)[:2] for k in batch]
        u, y = np.stack([r[0] for r in reads]), np.stack([r[1] for r in reads])
        preds = ensemble.member_predictions(u[:, :P], y[:, :P], u[:, P:])
        for w in range(len(batch)):
            lo, hi = ensemble._bounds(preds[:, w], float(level))
            inside += np.sum((y[w, P:] >= lo) & (y[w, P:] <= hi), axis=0)
            total += H
    return inside / total
