"""The direct route: multi-step predictors built straight from Hankel matrices of the recorded trials.

Both predictors use windows of ``L = Tini + N`` samples (past window ``Tini = past_steps``, horizon
``N = horizon_steps``), stacked time-major (see :mod:`stimsteer.sysid.hankel`) into the data matrix

    H = [Up; Yp; Uf; Yf]        Up (m·Tini, K), Yp (p·Tini, K), Uf (m·N, K), Yf (p·N, K),

whose ``K`` columns are every window inside a valid segment (never across a trial boundary or a masked sample).
``D = [Up; Yp; Uf]`` is the part a prediction conditions on, ``b = [vec(u_past); vec(y_past); vec(u_future)]``.

* :class:`LsqPredictor` — subspace predictive control's predictor: ``vec(y_future) = Θ b`` with ``Θ = [Kp Kf]``
  the ridge least-squares fit of ``Yf`` on ``D``.
* :class:`HankelPredictor` — the regularised DeePC-style predictor: find ``g`` with ``Up g = u_past``,
  ``Uf g = u_future``, a penalised slack on ``Yp g − y_past``, and predict ``Yf g``.

Exact compression: ``H = F Qᵀ`` with ``F`` the (n_rows × r) row-space factor (``r ≤ n_rows``) and ``Q`` orthonormal.
Every cost of the least-squares and of the ℓ2 / projection Hankel problems depends on ``g`` only through ``Qᵀ g``
and ``||g||²`` or ``||(I − Π) g||²``, both minimised with ``g ⊥ range(Q)`` set to zero, so replacing ``H`` by ``F``
(and ``g`` by ``h = Qᵀ g``) gives the same prediction with an unknown of the dimension of the rows. ``F`` is
streamed segment by segment (:func:`~stimsteer.sysid.hankel.row_space_factor`): memory does not grow with the
number of samples.

Strengths are relative to the data, so one grid fits sessions of any length and units: with
``s = ||H||_F² / n_rows`` (the mean squared singular value per row of ``H``), the absolute ridge strength is
``alpha · s`` and the absolute ``λ_g`` is ``lambda_g · s`` (``lambda_g · s / sqrt(K / n_rows)`` for ℓ1, which
makes ``λ_g ||g||_1`` of the size of ``λ_g ||g||²`` for a dense ``g``). Strengths are chosen on held-out trials
inside the training session (folds of whole trials, seeded).

No intercept is fitted: remove offsets first (``stimsteer.sysid.prep``) when the outputs rest away from zero.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.linalg as sla

from ._offsets import ShiftedOutputs, output_mean
from .excitation import check_excitation, rank_tolerance
from ._windows import window_batch
from ._base import check_fitted
from .protocols import DataBlocks, PredictionMaps
from .exceptions import ConditioningWarning, SessionError, SolverError
from .hankel import _one_blas_thread, block_hankel, combine_factors, row_space_factor

__all__ = ["HankelBlocks", "LsqPredictor", "HankelPredictor", "REGULARIZERS"]

REGULARIZERS = ("projection", "l2", "l1")

_DEFAULT_ALPHAS = tuple(float(a) for a in np.logspace(-8, 0, 9))
_DEFAULT_LAMBDAS_G = tuple(float(a) for a in np.logspace(-4, 2, 7))
#: Validation windows per fold for the ℓ1 regulariser (each costs one convex solve).
_L1_VALIDATION_WINDOWS = 16


@dataclass(frozen=True)
class HankelBlocks:
    """The four row blocks of a (possibly compressed) data matrix; ``r`` columns each.

    Attributes
    ----------
    Up : ndarray, shape (n_inputs·past_steps, r)
    Yp : ndarray, shape (n_outputs·past_steps, r)
    Uf : ndarray, shape (n_inputs·horizon_steps, r)
    Yf : ndarray, shape (n_outputs·horizon_steps, r)
    compressed : bool
        True when the blocks are the row-space factor (``r ≤ n_rows``), False for the raw Hankel columns.
    """

    Up: np.ndarray
    Yp: np.ndarray
    Uf: np.ndarray
    Yf: np.ndarray
    compressed: bool

    @property
    def D(self) -> np.ndarray:
        """``[Up; Yp; Uf]``, shape ((m+p)·past + m·horizon, r)."""
        return np.vstack([self.Up, self.Yp, self.Uf])

    @classmethod
    def from_matrix(cls, H: np.ndarray, m: int, p: int, past: int, horizon: int, compressed: bool):
        """Split the rows of ``[Up; Yp; Uf; Yf]`` (``(m + p)(past + horizon)`` of them)."""
        if H.ndim != 2 or H.shape[0] != (m + p) * (past + horizon):
            raise SessionError(
                f"a data matrix for {m} input(s), {p} output(s), past {past} and horizon {horizon} needs "
                f"{(m + p) * (past + horizon)} rows; got shape {H.shape}."
            )
        cuts = np.cumsum([m * past, p * past, m * horizon])
        Up, Yp, Uf, Yf = (np.ascontiguousarray(b) for b in np.split(H, cuts, axis=0))
        return cls(Up, Yp, Uf, Yf, bool(compressed))


# ------------------------------------------------------------------------------------------------ validation
def _check_int(name, value, lowest):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < lowest:
        raise SessionError(f"{name} must be an integer >= {lowest}; got {value!r}.")
    return int(value)


def _check_strengths(name, values) -> np.ndarray:
    a = np.atleast_1d(np.asarray(values, dtype=np.float64))
    if a.ndim != 1 or a.size == 0:
        raise SessionError(f"{name} must be a non-empty 1-D grid of strengths; got shape {a.shape}.")
    if not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise SessionError(
            f"{name} must be finite and > 0; got {a.tolist()}. Regularisation strengths are relative to the "
            "data scale; remove zero or negative values (try 1e-6 ... 1)."
        )
    return np.unique(a)


def _check_source(session):
    needed = ("read", "segments", "n_inputs", "n_outputs", "trials", "sample_rate_hz")
    missing = [a for a in needed if not hasattr(session, a)]
    if missing:
        raise SessionError(
            f"expected a stimsteer Session or an opened session file; got {type(session).__name__}, which lacks "
            f"{missing}. Load the recording with stimsteer.sysid.io.load_session first."
        )


def _row_order(m: int, p: int, past: int, horizon: int) -> np.ndarray:
    """Permutation from the rows of [H_L(u); H_L(y)] to [Up; Yp; Uf; Yf] (time-major blocks)."""
    L = past + horizon
    return np.concatenate([np.arange(m * past), m * L + np.arange(p * past),
                           np.arange(m * past, m * L), m * L + np.arange(p * past, p * L)])


# ------------------------------------------------------------------------------------------------ data pass
@dataclass
class _Fold:
    factor: np.ndarray
    n_columns: int
    full: list


def _fold_of_segments(session, segs, n_splits: int, seed: int, L: int):
    """Fold id per (piece of) segment: whole trials, seeded; contiguous blocks when one trial has windows."""
    starts = np.asarray(session.trials)[:, 0]
    trial_of = [int(np.searchsorted(starts, a, side="right") - 1) for a, _ in segs]
    used = sorted(set(trial_of))
    if len(used) >= 2:
        k = min(n_splits, len(used))
        perm = np.random.default_rng(seed).permutation(len(used))
        fold_of_trial = {used[j]: int(i % k) for i, j in enumerate(perm)}
        return [(a, b, fold_of_trial[t]) for (a, b), t in zip(segs, trial_of)], k, "trials"
    pieces = []
    for a, b in segs:
        edges = np.linspace(a, b, n_splits + 1).round().astype(np.int64)
        pieces += [(int(lo), int(hi), f) for f, (lo, hi) in enumerate(zip(edges[:-1], edges[1:])) if hi - lo >= L]
    k = len({f for *_, f in pieces})
    return pieces, k, "contiguous blocks (one trial)"


def _collect(session, past, horizon, n_folds_wanted, seed, keep_full):
    """One pass over the valid segments: per-fold row-space factors (and raw Hankel blocks when asked)."""
    m, p, L = int(session.n_inputs), int(session.n_outputs), past + horizon
    order = _row_order(m, p, past, horizon)
    segs = session.segments(L)
    if n_folds_wanted > 1:
        pieces, n_folds, scheme = _fold_of_segments(session, segs, n_folds_wanted, seed, L)
    else:
        pieces, n_folds, scheme = [(a, b, 0) for a, b in segs], 1, "none"
    n_rows = (m + p) * L
    parts = [[] for _ in range(n_folds)]
    folds = [_Fold(np.zeros((n_rows, 0)), 0, []) for _ in range(n_folds)]
    y_sum, y_sq, n_y = np.zeros(p), np.zeros(p), 0
    for a, b, f in pieces:
        u, y, _ = session.read(a, b)
        u, y = np.asarray(u, dtype=np.float64), np.asarray(y, dtype=np.float64)
        F, k = row_space_factor([u, y], L)
        parts[f].append(F[order])
        if len(parts[f]) > 8:  # keep the working memory independent of the number of segments
            parts[f] = [combine_factors(parts[f], n_rows)]
        folds[f].n_columns += k
        if keep_full:
            folds[f].full.append(np.vstack([block_hankel(u, L), block_hankel(y, L)])[order])
        y_sum += y.sum(axis=0)
        y_sq += (y * y).sum(axis=0)
        n_y += y.shape[0]
    for f in range(n_folds):
        folds[f].factor = combine_factors(parts[f], n_rows)
    starts = np.asarray(session.trials)[:, 0]
    trial_fold = np.full(starts.size, -1, dtype=np.int64)
    if scheme == "trials":
        for a, _b, f in pieces:
            trial_fold[np.searchsorted(starts, a, side="right") - 1] = f
    n_y = max(n_y, 1)
    std = np.sqrt(np.maximum(y_sq / n_y - (y_sum / n_y) ** 2, 0.0))
    std[std <= 1e-12 * max(std.max(), 1e-300)] = 1.0
    return folds, scheme, std, tuple(int(f) for f in trial_fold)


def _merge(folds, n_rows):
    factor = combine_factors([f.factor for f in folds], n_rows)
    full = [blk for f in folds for blk in f.full]
    return _Fold(factor, sum(f.n_columns for f in folds), full)


def _data_scale(F: np.ndarray) -> float:
    """``||H||_F² / n_rows`` (equal for ``H`` and its factor)."""
    return float(np.sum(F * F) / F.shape[0])


def _validation_error(G: np.ndarray, F_val: np.ndarray, weights: np.ndarray) -> float:
    """``Σ_columns ||W (Yf_col − G D_col)||²`` over a held-out fold, from its row-space factor alone."""
    n_b = G.shape[1]
    E = F_val[n_b:] - G @ F_val[:n_b]
    return float(np.sum((weights[:, None] * E) ** 2))


# ------------------------------------------------------------------------------------------------ base class
class _DirectPredictor:
    """Shared validation, data pass, selection, prediction checks and state for the direct predictors."""

    _param_names: tuple = ()
    _strength_param: str = ""
    #: ``fit`` reads a lazily opened session file segment by segment (``read``/``segments``).
    supports_streaming = True
    #: The prediction is affine in the window (see :mod:`stimsteer.sysid.protocols`).
    has_linear_maps = True

    def get_params(self, deep: bool = True) -> dict:
        """Constructor arguments, unchanged (scikit-learn convention)."""
        return {k: getattr(self, k) for k in self._param_names}

    def set_params(self, **params):
        for k, v in params.items():
            if k not in self._param_names:
                raise SessionError(f"{type(self).__name__} has no parameter {k!r}; valid: {list(self._param_names)}.")
            setattr(self, k, v)
        return self

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items() if k != self._strength_param)
        n = np.size(getattr(self, self._strength_param))
        return f"{type(self).__name__}({args}, {self._strength_param}=<{n} values>)"

    def _validate_common(self, session):
        _check_source(session)
        past = _check_int("past_steps", self.past_steps, 1)
        horizon = _check_int("horizon_steps", self.horizon_steps, 1)
        if self.n_states is not None:
            _check_int("n_states", self.n_states, 0)
        _check_int("n_splits", self.n_splits, 2)
        _check_int("seed", self.seed, 0)
        L = past + horizon
        longest = max((b - a for a, b in session.segments(1)), default=0)
        if longest < L:
            raise SessionError(
                f"the past window + horizon ({past} + {horizon} = {L} samples) is longer than every valid segment "
                f"of every trial (the longest is {longest}). Shorten past_steps or horizon_steps, or record longer "
                "trials with fewer gaps."
            )
        return past, horizon

    def _gather(self, session, n_candidates, keep_full):
        past, horizon = self._validate_common(session)
        if not isinstance(self.centre_outputs, (bool, np.bool_)):
            raise SessionError(f"centre_outputs must be True or False; got {self.centre_outputs!r}.")
        self.output_offset_ = output_mean(session) if self.centre_outputs else np.zeros(int(session.n_outputs))
        if self.centre_outputs:
            session = ShiftedOutputs(session, self.output_offset_)
        order = check_excitation(session, past_steps=past, horizon_steps=horizon, n_states=self.n_states,
                                 stacklevel=5)
        folds, scheme, std, trial_fold = _collect(session, past, horizon, self.n_splits if n_candidates > 1 else 1,
                                      self.seed, keep_full)
        if n_candidates > 1 and len(folds) < 2:
            raise SessionError(
                f"choosing among {n_candidates} strengths needs held-out data, but the session's windows of "
                f"{past + horizon} samples fit in {len(folds)} fold(s), fewer than two. Record more or longer "
                "trials, or give a single strength."
            )
        m, p = int(session.n_inputs), int(session.n_outputs)
        self.past_steps_, self.max_horizon_steps_ = past, horizon
        self.n_inputs_, self.n_outputs_ = m, p
        self.excitation_order_ = int(order)
        self.cv_scheme_ = scheme
        self.cv_folds_ = trial_fold
        self.input_names_ = tuple(getattr(session, "input_names", None) or (f"u{i}" for i in range(m)))
        self.output_names_ = tuple(getattr(session, "output_names", None) or (f"y{i}" for i in range(p)))
        self.sample_rate_hz_ = float(session.sample_rate_hz)
        return folds, np.tile(1.0 / std, horizon)

    def _select(self, folds, candidates, weights, score_fold):
        """Validation error per candidate summed over folds; ``score_fold(train, val) -> errors``."""
        n_rows = folds[0].factor.shape[0]
        if len(candidates) == 1:
            return float(candidates[0]), pd.DataFrame({"candidate": candidates, "validation_error": [np.nan]})
        errors, counts = np.zeros(len(candidates)), 0
        cols = {}
        for i, val in enumerate(folds):
            train = _merge([f for j, f in enumerate(folds) if j != i], n_rows)
            if val.n_columns == 0 or train.n_columns == 0:
                continue
            e = np.asarray(score_fold(train, val, weights))
            errors += e
            counts += val.n_columns
            cols[f"fold_{i}"] = e / max(val.n_columns * weights.size, 1)  # same normalisation as the mean
        mean = errors / max(counts * weights.size, 1)
        mean = np.where(np.isfinite(mean), mean, np.inf)
        best = int(np.flatnonzero(mean <= mean.min() * (1 + 1e-12))[-1])
        table = pd.DataFrame({"candidate": candidates, "validation_error": mean, **cols})
        return float(candidates[best]), table

    # ---------------------------------------------------------------------------------------- prediction
    def _check_windows(self, u_past, y_past, u_future):
        check_fitted(self, "past_steps_")
        m, p, past, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        arrays = []
        for name, a, c in (("u_past", u_past, m), ("y_past", y_past, p), ("u_future", u_future, m)):
            a = np.asarray(a, dtype=np.float64)
            a = a[:, None] if a.ndim == 1 and c == 1 else a
            if a.ndim != 2 or a.shape[1] != c:
                raise SessionError(f"{name} must have shape (n_samples, {c}); got {a.shape}.")
            if not np.all(np.isfinite(a)):
                raise SessionError(f"{name} holds NaN or infinite values; give a finite window.")
            arrays.append(a)
        u_past, y_past, u_future = arrays
        if u_past.shape[0] != y_past.shape[0] or u_past.shape[0] < past:
            raise SessionError(
                f"u_past and y_past must hold the same number of samples, at least past_steps_ = {past}; got "
                f"{u_past.shape[0]} and {y_past.shape[0]}. Pass the last {past} samples before the prediction."
            )
        n_future = u_future.shape[0]
        if not 1 <= n_future <= N:
            raise SessionError(
                f"u_future must hold 1 to max_horizon_steps_ = {N} samples; got {n_future}. Refit with a longer "
                "horizon_steps or predict in pieces."
            )
        uf = np.zeros((N, m))
        uf[:n_future] = u_future
        y_rel = y_past[-past:] - self._offset()
        b = np.concatenate([u_past[-past:].reshape(-1), y_rel.reshape(-1), uf.reshape(-1)])
        return b, n_future

    def _batch_windows(self, u_past, y_past, u_future):
        """Stacked ``b`` vectors of a batch of windows, shape (n_windows, len(b)), and the common future length."""
        check_fitted(self, "past_steps_")
        m, past, N = self.n_inputs_, self.past_steps_, self.max_horizon_steps_
        up, yp, uf = window_batch(u_past, y_past, u_future, n_inputs=m, n_outputs=self.n_outputs_, min_past=past)
        if not 1 <= uf.shape[1] <= N:
            raise SessionError(f"u_future must hold 1 to max_horizon_steps_ = {N} samples per window; got "
                               f"{uf.shape[1]}. Refit with a longer horizon_steps or predict in pieces.")
        W, n_future = up.shape[0], uf.shape[1]
        full = np.zeros((W, N, m))
        full[:, :n_future] = uf
        y_rel = yp[:, -past:] - self._offset()
        b = np.concatenate([up[:, -past:].reshape(W, -1), y_rel.reshape(W, -1), full.reshape(W, -1)], axis=1)
        return b, n_future

    def _linear_many(self, G, u_past, y_past, u_future):
        b, n_future = self._batch_windows(u_past, y_past, u_future)
        y = b @ G.T
        return y.reshape(b.shape[0], self.max_horizon_steps_, self.n_outputs_)[:, :n_future] + self._offset()

    def _maps_from(self, G: np.ndarray, past_steps: int, horizon_steps: int):
        """:class:`PredictionMaps` of ``vec(y) = G [u_past; y_past − off; u_future] + off`` over a window."""
        check_fitted(self, "past_steps_")
        m, p, T, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        past, horizon = int(past_steps), int(horizon_steps)
        if past < T or not 1 <= horizon <= N:
            raise SessionError(f"the {type(self).__name__} needs a past window of at least past_steps_ = {T} samples "
                               f"and a horizon of 1 to {N} steps; got past {past_steps} and horizon {horizon_steps}.")
        n_u, n_y = m * T, p * T
        Gu, Gy, Gf = G[:p * horizon, :n_u], G[:p * horizon, n_u:n_u + n_y], G[:p * horizon, n_u + n_y:]
        P = np.zeros((p * horizon, (m + p) * past))
        P[:, m * (past - T):m * past] = Gu  # only the last T samples of the window count
        P[:, m * past + p * (past - T):] = Gy
        off = self._offset()
        c = np.tile(off, horizon) - Gy @ np.tile(off, T)
        return PredictionMaps(P=P, F=np.ascontiguousarray(Gf[:, :m * horizon]), c=c, past_steps=past,
                              horizon_steps=horizon)

    def _offset(self) -> np.ndarray:
        """The outputs' training mean removed before fitting (``centre_outputs``), zeros otherwise."""
        off = getattr(self, "output_offset_", None)
        return np.zeros(self.n_outputs_) if off is None else off

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]:
        """A past window at rest: zero input and the output offset, shapes (past_steps_, m) and (past_steps_, p)."""
        check_fitted(self, "past_steps_")
        return np.zeros((self.past_steps_, self.n_inputs_)), np.tile(self._offset(), (self.past_steps_, 1))

    # ---------------------------------------------------------------------------------------- storage
    _fitted_arrays: tuple = ()
    _fitted_scalars: tuple = ("past_steps_", "max_horizon_steps_", "n_inputs_", "n_outputs_", "excitation_order_",
                              "cv_scheme_", "sample_rate_hz_", "n_columns_", "data_scale_")

    def to_state(self) -> dict:
        """Parameters and fitted values as plain arrays, numbers, strings and nested dicts (for storage)."""
        check_fitted(self, "past_steps_")
        params = {k: (np.asarray(v, dtype=np.float64) if k == self._strength_param else
                      int(v) if isinstance(v, (bool, np.bool_, np.integer)) else v)
                  for k, v in self.get_params().items() if v is not None}
        fitted = {k: getattr(self, k) for k in self._fitted_scalars + self._fitted_arrays
                  if getattr(self, k) is not None}
        fitted["output_offset_"] = np.asarray(self._offset(), dtype=np.float64)
        fitted["input_names_"] = "\n".join(self.input_names_)
        fitted["output_names_"] = "\n".join(self.output_names_)
        fitted["cv_folds_"] = np.asarray(self.cv_folds_, dtype=np.int64)
        fitted["cv_table_"] = {c: self.cv_table_[c].to_numpy(dtype=np.float64) for c in self.cv_table_.columns}
        return {"params": params, "fitted": fitted}

    @classmethod
    def _from_state_common(cls, state):
        params = dict(state["params"])
        for k in ("past_steps", "horizon_steps", "n_states", "n_splits", "seed"):
            if k in params:
                params[k] = int(params[k])
        if cls._strength_param in params:
            params[cls._strength_param] = tuple(float(v) for v in np.atleast_1d(params[cls._strength_param]))
        if "centre_outputs" in params:
            params["centre_outputs"] = bool(int(params["centre_outputs"]))
        obj = cls(**params)
        fitted = dict(state["fitted"])
        for k in ("past_steps_", "max_horizon_steps_", "n_inputs_", "n_outputs_", "excitation_order_",
                  "n_columns_"):
            setattr(obj, k, int(fitted.pop(k)))
        for k in ("sample_rate_hz_", "data_scale_"):
            setattr(obj, k, float(fitted.pop(k)))
        obj.cv_scheme_ = str(fitted.pop("cv_scheme_"))
        obj.cv_folds_ = tuple(int(f) for f in np.atleast_1d(fitted.pop("cv_folds_")))
        obj.input_names_ = tuple(str(fitted.pop("input_names_")).split("\n"))
        obj.output_names_ = tuple(str(fitted.pop("output_names_")).split("\n"))
        obj.cv_table_ = pd.DataFrame({k: np.asarray(v) for k, v in fitted.pop("cv_table_").items()})
        obj.output_offset_ = np.asarray(fitted.pop("output_offset_", np.zeros(obj.n_outputs_)), dtype=np.float64)
        return obj, fitted


# ------------------------------------------------------------------------------------------------ LSQ
def _lsq_map(F: np.ndarray, n_b: int, strength: float) -> np.ndarray:
    """``Θ = argmin ||F2 − Θ F1||_F² + strength ||Θ||_F²`` with ``F = [F1; F2]`` (stacked least squares)."""
    F1, F2 = F[:n_b], F[n_b:]
    A = np.vstack([F1.T, np.sqrt(strength) * np.eye(n_b)])
    B = np.vstack([F2.T, np.zeros((n_b, F2.shape[0]))])
    return sla.lstsq(A, B, lapack_driver="gelsd", check_finite=False)[0].T


class LsqPredictor(_DirectPredictor):
    """Least-squares multi-step predictor from a past window and future inputs (subspace predictive control).

    Parameters
    ----------
    past_steps : int
        ``Tini``, samples of past inputs and outputs the prediction conditions on (at least the system's lag).
    horizon_steps : int
        ``N``, samples predicted.
    alphas : sequence of float, default ``10**-8 … 10**0`` (9 values)
        Candidate ridge strengths, relative to the data (module docstring), each > 0.
    n_states : int, optional
        State dimension, used only for the excitation check (default: ``past_steps``).
    n_splits : int, default 3
        Folds of whole trials used to choose the strength (fewer when fewer trials have windows).
    seed : int, default 0
        Seeds the assignment of trials to folds.
    centre_outputs : bool, default False
        Build the predictor from the outputs minus their training mean (``output_offset_``), for recordings with a
        baseline offset; predictions take and give recorded units (the offset is removed from ``y_past`` and added
        to the prediction), and the data controller plans in recorded units.

    Attributes
    ----------
    Kp_ : ndarray, shape (n_outputs·N, (n_inputs + n_outputs)·Tini)
        Acts on ``[vec(u_past); vec(y_past)]``.
    Kf_ : ndarray, shape (n_outputs·N, n_inputs·N)
        Acts on ``vec(u_future)``; on noise-free data the block-Toeplitz matrix of Markov parameters.
    alpha_ : float
        Chosen candidate from ``alphas``; ``ridge_strength_ = alpha_ · data_scale_`` is the absolute strength.
    ridge_strength_, data_scale_ : float
    cv_table_ : pandas.DataFrame
        ``candidate``, ``validation_error`` (mean squared error per predicted value on held-out folds, each output
        scaled by its standard deviation, pooled over folds), ``fold_i`` (the same error on fold ``i`` alone).
    past_steps_, max_horizon_steps_, n_inputs_, n_outputs_, n_columns_, excitation_order_ : int
    cv_scheme_ : str
        ``"trials"`` (folds of whole trials), ``"contiguous blocks (one trial)"`` or ``"none"`` (one candidate).
    cv_folds_ : tuple of int
        Fold of each trial of the training session (-1: no windows, or folds not made of whole trials).
    input_names_, output_names_ : tuple of str
    sample_rate_hz_ : float
    output_offset_ : ndarray, shape (n_outputs,)
        The training mean removed with ``centre_outputs`` (zeros otherwise).

    Notes
    -----
    ``Θ = [Kp_ Kf_] = argmin_Θ ||Yf − Θ D||_F² + alpha·s ||Θ||_F²`` over all Hankel windows, computed from the
    streamed row-space factor ``[F1; F2]`` of ``[D; Yf]`` as the stacked least-squares problem
    ``[F1ᵀ; √(alpha s) I] Θᵀ = [F2ᵀ; 0]`` (no normal equations). A held-out fold's squared error is likewise
    ``||F2,val − Θ F1,val||_F²``. A shorter horizon in :meth:`predict` uses the first blocks (zero future inputs
    beyond it do not change the first outputs, as ``Kf_`` is block lower triangular up to the fit error).

    References
    ----------
    Favoreel W., De Moor B., Gevers M. (1999), "SPC: Subspace predictive control", Proc. 14th IFAC World Congress.
    Hoerl A.E., Kennard R.W. (1970), Ridge regression, Technometrics 12:55.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import Session
    >>> rng = np.random.default_rng(0)
    >>> u = rng.standard_normal((300, 1)); y = np.zeros((300, 1))
    >>> for k in range(1, 300): y[k] = 0.5 * y[k - 1] + u[k - 1]
    >>> lsq = LsqPredictor(past_steps=2, horizon_steps=3, alphas=[1e-12]).fit(Session(u=u, y=y, sample_rate_hz=1.0))
    >>> (np.round(lsq.Kf_, 6) + 0.0).tolist()  # Markov parameters 0, 1, 0.5 on the block-Toeplitz pattern
    [[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.5, 1.0, 0.0]]
    """

    storage_kind = "lsq_predictor"
    _param_names = ("past_steps", "horizon_steps", "alphas", "n_states", "n_splits", "seed", "centre_outputs")
    _strength_param = "alphas"
    _fitted_arrays = ("Kp_", "Kf_")
    _fitted_scalars = _DirectPredictor._fitted_scalars + ("alpha_", "ridge_strength_")

    def __init__(self, *, past_steps, horizon_steps, alphas=_DEFAULT_ALPHAS, n_states=None, n_splits=3, seed=0,
                 centre_outputs=False):
        self.past_steps = past_steps
        self.horizon_steps = horizon_steps
        self.alphas = alphas
        self.n_states = n_states
        self.n_splits = n_splits
        self.seed = seed
        self.centre_outputs = centre_outputs

    @_one_blas_thread
    def fit(self, session) -> "LsqPredictor":
        """Fit from a :class:`Session` or an opened session file.

        Returns
        -------
        self

        Raises
        ------
        SessionError
            Bad settings (strengths <= 0, non-integer windows); past window + horizon longer than every trial.
        ExcitationError
            The input Hankel matrix of depth ``past_steps + horizon_steps`` is rank-deficient beyond tolerance.

        Warns
        -----
        ExcitationWarning
            The input excites less than ``past_steps + horizon_steps + n_states``.
        """
        alphas = _check_strengths("alphas", self.alphas)
        folds, weights = self._gather(session, alphas.size, keep_full=False)
        m, p, past = self.n_inputs_, self.n_outputs_, self.past_steps_
        n_b = (m + p) * past + m * self.max_horizon_steps_

        def score(train, val, w):
            s = _data_scale(train.factor)
            return [_validation_error(_lsq_map(train.factor, n_b, a * s), val.factor, w) for a in alphas]

        alpha, table = self._select(folds, alphas, weights, score)
        total = _merge(folds, folds[0].factor.shape[0])
        scale = _data_scale(total.factor)
        theta = _lsq_map(total.factor, n_b, alpha * scale)
        self.Kp_ = np.ascontiguousarray(theta[:, : (m + p) * past])
        self.Kf_ = np.ascontiguousarray(theta[:, (m + p) * past:])
        self.alpha_, self.data_scale_, self.ridge_strength_ = alpha, scale, alpha * scale
        self.n_columns_ = total.n_columns
        self.cv_table_ = table
        return self

    def predict(self, u_past, y_past, u_future) -> np.ndarray:
        """Predict the outputs over ``u_future`` from the last ``past_steps_`` samples of the past window.

        Parameters
        ----------
        u_past : ndarray, shape (n_past >= past_steps_, n_inputs)
        y_past : ndarray, shape (n_past, n_outputs)
        u_future : ndarray, shape (n_future <= max_horizon_steps_, n_inputs)

        Returns
        -------
        y_future : ndarray, shape (n_future, n_outputs)

        Raises
        ------
        NotFittedError, SessionError
        """
        b, n_future = self._check_windows(u_past, y_past, u_future)
        n_p = self.Kp_.shape[1]
        y = self.Kp_ @ b[:n_p] + self.Kf_ @ b[n_p:]
        return y.reshape(self.max_horizon_steps_, self.n_outputs_)[:n_future] + self._offset()

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """:meth:`predict` for a batch of windows, shapes (n_windows, n_samples, channels); one matrix product."""
        check_fitted(self, "Kp_")
        return self._linear_many(np.hstack([self.Kp_, self.Kf_]), u_past, y_past, u_future)

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The affine map of :meth:`predict` over a past window of ``past_steps`` and ``horizon_steps`` inputs.

        Samples of a longer past window before the last ``past_steps_`` get zero columns. See
        :class:`stimsteer.sysid.protocols.PredictionMaps`.
        """
        check_fitted(self, "Kp_")
        return self._maps_from(np.hstack([self.Kp_, self.Kf_]), past_steps, horizon_steps)

    @classmethod
    def from_state(cls, state) -> "LsqPredictor":
        """Rebuild a fitted predictor from :meth:`to_state`'s dict."""
        obj, fitted = cls._from_state_common(state)
        obj.Kp_ = np.asarray(fitted["Kp_"], dtype=np.float64)
        obj.Kf_ = np.asarray(fitted["Kf_"], dtype=np.float64)
        obj.alpha_ = float(fitted["alpha_"])
        obj.ridge_strength_ = float(fitted["ridge_strength_"])
        return obj


# ------------------------------------------------------------------------------------------------ Hankel
def _projection_complement(D: np.ndarray, n_columns: int) -> np.ndarray:
    """``I − Π`` with ``Π`` the orthogonal projector onto the row space of ``D`` (numerical rank, see excitation)."""
    _, sv, Vt = np.linalg.svd(D, full_matrices=False)
    tol = rank_tolerance(sv, (D.shape[0], n_columns))
    V = Vt[sv > tol].T
    M = -(V @ V.T)
    M[np.diag_indices_from(M)] += 1.0
    return M


def _kkt_map(blocks: HankelBlocks, M, lam_g: float, lam_y: float, B: np.ndarray) -> np.ndarray:
    """Minimisers ``g`` (one column per column of ``B = [u_past; y_past; u_future]``) of the ℓ2 / projection problem.

    KKT system of ``min λ_y ||Yp g − y_p||² + λ_g gᵀ M g  s.t.  [Up; Uf] g = [u_p; u_f]``::

        [λ_y YpᵀYp + λ_g M   Aᵀ] [g]   [λ_y Ypᵀ y_p]
        [A                   0 ] [ν] = [u_p; u_f  ]

    (``M`` is an orthogonal projector, so ``MᵀM = M``; ``M = None`` is the identity.) An ill-conditioned system
    (scipy's LinAlgWarning) is reported as :class:`ConditioningWarning` and solved anyway.
    """
    Up, Yp, Uf = blocks.Up, blocks.Yp, blocks.Uf
    r, nu, npst = Up.shape[1], Up.shape[0], Yp.shape[0]
    A = np.vstack([Up, Uf])
    K = np.zeros((r + A.shape[0], r + A.shape[0]))
    K[:r, :r] = lam_y * (Yp.T @ Yp)
    if M is None:
        K[np.arange(r), np.arange(r)] += lam_g
    else:
        K[:r, :r] += lam_g * M
    # symmetric scaling of the constraint rows (multipliers ν/β): same solution, balanced blocks
    beta = np.abs(K[:r, :r]).max() / max(np.abs(A).max(), np.finfo(float).tiny)
    K[:r, r:] = beta * A.T
    K[r:, :r] = beta * A
    rhs = np.vstack([lam_y * (Yp.T @ B[nu:nu + npst]), beta * B[:nu], beta * B[nu + npst:]])
    with warnings.catch_warnings():
        warnings.simplefilter("error", sla.LinAlgWarning)
        try:
            return sla.solve(K, rhs, assume_a="sym", check_finite=False)[:r]
        except sla.LinAlgWarning:
            pass
    warnings.warn(ConditioningWarning(
        f"the Hankel predictor's KKT system ({K.shape[0]} unknowns) is ill-conditioned at lambda_g = {lam_g:.3g}, "
        f"lambda_y = {lam_y:.3g}; the prediction may be inaccurate. Use larger lambdas_g or noisier (richer) data."
    ), stacklevel=5)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", sla.LinAlgWarning)
        return sla.solve(K, rhs, assume_a="sym", check_finite=False)[:r]


class HankelPredictor(_DirectPredictor):
    """Regularised Hankel-matrix (DeePC-style) predictor with a slack on the past outputs.

    Parameters
    ----------
    past_steps : int
        ``Tini``, samples of past inputs and outputs the prediction conditions on.
    horizon_steps : int
        ``N``, samples predicted.
    regularizer : {"projection", "l2", "l1"}, default "projection"
        ``R(g)``: ``||(I − Π) g||²`` with ``Π`` the projector onto the row space of ``[Up; Yp; Uf]``;
        ``||g||²``; or ``||g||_1`` (solved with cvxpy, on the uncompressed data).
    lambdas_g : sequence of float, default ``10**-4 … 10**2`` (7 values)
        Candidate strengths of ``R(g)``, relative to the data (module docstring), each > 0.
    lambda_y : float, default 1e3
        Weight of the squared slack ``||Yp g − vec(y_past)||²``, > 0.
    compress : bool, default True
        Replace the data matrix by its row-space factor (exact for "projection" and "l2"; ignored for "l1").
    n_states : int, optional
        State dimension, used only for the excitation check (default: ``past_steps``).
    n_splits : int, default 3
        Folds of whole trials used to choose the strength.
    seed : int, default 0
        Seeds the assignment of trials to folds.
    solver_options : dict, optional
        Passed to ``cvxpy.Problem.solve`` for "l1"; default ``{"solver": "CLARABEL"}`` (an interior-point
        solver: the first-order default of cvxpy for QPs stops at its iteration limit on some of these problems).
        Not saved by :meth:`to_state`.
    centre_outputs : bool, default False
        Build the predictor from the outputs minus their training mean (``output_offset_``), for recordings with a
        baseline offset; predictions take and give recorded units (the offset is removed from ``y_past`` and added
        to the prediction), and the data controller plans in recorded units.

    Attributes
    ----------
    blocks_ : HankelBlocks
        ``Up, Yp, Uf, Yf`` with ``r`` columns: ``r ≤ n_rows`` when compressed, else ``n_columns_``.
    reg_matrix_ : ndarray, shape (r, r), or None
        ``M`` with ``R(g) = ||M g||²``: ``I − Π`` (in compressed coordinates when compressed) for "projection",
        the identity for "l2", None for "l1".
    regularizer_ : str
    lambda_g_ : float
        Absolute weight of ``R(g)`` in the problem solved (``lambda_g_relative_ · data_scale_``, see Notes).
    lambda_g_relative_ : float
        Chosen candidate from ``lambdas_g``.
    lambda_y_ : float
    data_scale_ : float
    cv_table_ : pandas.DataFrame
        As :class:`LsqPredictor`.
    past_steps_, max_horizon_steps_, n_inputs_, n_outputs_, n_columns_, excitation_order_ : int
    cv_scheme_ : str
        ``"trials"`` (folds of whole trials), ``"contiguous blocks (one trial)"`` or ``"none"`` (one candidate).
    cv_folds_ : tuple of int
        Fold of each trial of the training session (-1: no windows, or folds not made of whole trials).
    input_names_, output_names_ : tuple of str
    sample_rate_hz_ : float
    output_offset_ : ndarray, shape (n_outputs,)
        The training mean removed with ``centre_outputs`` (zeros otherwise).

    Notes
    -----
    :meth:`predict` solves

        min_g  λ_y ||Yp g − vec(y_past)||² + λ_g R(g)   s.t.  Up g = vec(u_past),  Uf g = vec(u_future)

    and returns ``Yf g``; ℓ2 and projection in closed form (KKT system), ℓ1 with cvxpy. Compressed, the blocks are
    the row-space factor ``F`` of ``H = F Qᵀ`` and ``I − Π`` becomes ``I − P`` with ``P`` the projector onto the
    row space of ``F``'s first rows, since ``Π = Q P Qᵀ``; the minimiser is ``g = Q h`` and the prediction is the
    same. For ℓ1, ``λ_g_ = lambda_g_relative_ · data_scale_ / sqrt(n_columns_ / n_rows)``.

    For the ℓ2 and projection regularisers the prediction is linear in ``b``; held-out errors are computed from
    the folds' row-space factors as for :class:`LsqPredictor`. For ℓ1 each fold scores
    ``_L1_VALIDATION_WINDOWS`` evenly spread held-out windows. As ``λ_g → ∞`` the projection predictor tends to
    the least-squares one with ``alpha → 0`` (Dörfler, Coulson, Markovsky 2023). When ``[Up; Yp; Uf]`` has full
    row rank (noisy data) the two coincide for every ``λ_g > 0``: ``g = D⁺ b`` meets the constraints with zero slack
    and zero penalty. The strength then matters only inside a controller, where the tracking cost competes with
    the penalty.

    References
    ----------
    Coulson J., Lygeros J., Dörfler F. (2019), "Data-enabled predictive control: in the shallows of the DeePC",
    European Control Conference.
    Dörfler F., Coulson J., Markovsky I. (2023), "Bridging direct and indirect data-driven control formulations via
    regularizations and relaxations", IEEE Transactions on Automatic Control 68:883.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import Session
    >>> rng = np.random.default_rng(0)
    >>> u = rng.standard_normal((300, 1)); y = np.zeros((300, 1))
    >>> for k in range(1, 300): y[k] = 0.5 * y[k - 1] + u[k - 1]
    >>> hp = HankelPredictor(past_steps=1, horizon_steps=3, lambdas_g=[1e-6], n_states=1)
    >>> hp = hp.fit(Session(u=u, y=y, sample_rate_hz=1.0))
    >>> np.round(hp.predict([[1.0]], [[2.0]], [[0.0], [0.0], [0.0]]).ravel(), 6).tolist()  # 0.5·2 + 1, then halving
    [2.0, 1.0, 0.5]
    """

    storage_kind = "hankel_predictor"
    _param_names = ("past_steps", "horizon_steps", "regularizer", "lambdas_g", "lambda_y", "compress", "n_states",
                    "n_splits", "seed", "solver_options", "centre_outputs")
    _strength_param = "lambdas_g"
    _fitted_scalars = _DirectPredictor._fitted_scalars + ("regularizer_", "lambda_g_", "lambda_g_relative_",
                                                          "lambda_y_")
    _fitted_arrays = ("reg_matrix_",)

    def __init__(self, *, past_steps, horizon_steps, regularizer="projection", lambdas_g=_DEFAULT_LAMBDAS_G,
                 lambda_y=1e3, compress=True, n_states=None, n_splits=3, seed=0, solver_options=None,
                 centre_outputs=False):
        self.past_steps = past_steps
        self.horizon_steps = horizon_steps
        self.regularizer = regularizer
        self.lambdas_g = lambdas_g
        self.lambda_y = lambda_y
        self.compress = compress
        self.n_states = n_states
        self.n_splits = n_splits
        self.seed = seed
        self.solver_options = solver_options
        self.centre_outputs = centre_outputs

    # ---------------------------------------------------------------------------------------- fit
    def _validate_settings(self):
        if self.regularizer not in REGULARIZERS:
            raise SessionError(f"regularizer must be one of {list(REGULARIZERS)}; got {self.regularizer!r}.")
        lam_y = float(self.lambda_y) if np.isscalar(self.lambda_y) else np.nan
        if not np.isfinite(lam_y) or lam_y <= 0:
            raise SessionError(f"lambda_y must be a finite number > 0; got {self.lambda_y!r}. Try 1e3.")
        if self.solver_options is not None and not isinstance(self.solver_options, dict):
            raise SessionError(f"solver_options must be a dict or None; got {type(self.solver_options).__name__}.")
        return _check_strengths("lambdas_g", self.lambdas_g), lam_y

    def _abs_strength(self, rel: float, scale: float, n_columns: int, n_rows: int) -> float:
        if self.regularizer == "l1":
            return rel * scale / np.sqrt(max(n_columns / n_rows, 1e-300))
        return rel * scale

    @_one_blas_thread
    def fit(self, session) -> "HankelPredictor":
        """Fit from a :class:`Session` or an opened session file.

        Returns
        -------
        self

        Raises
        ------
        SessionError
            Bad settings (strengths <= 0, unknown regulariser); past window + horizon longer than every trial.
        ExcitationError
            The input Hankel matrix of depth ``past_steps + horizon_steps`` is rank-deficient beyond tolerance.
        SolverError
            "l1": the convex solver did not reach an optimal solution.

        Warns
        -----
        ExcitationWarning
            The input excites less than ``past_steps + horizon_steps + n_states``.
        """
        lambdas, lam_y = self._validate_settings()
        l1 = self.regularizer == "l1"
        compress = bool(self.compress) and not l1
        folds, weights = self._gather(session, lambdas.size, keep_full=not compress)
        score = self._score_l1 if l1 else self._score_quadratic
        rel, table = self._select(folds, lambdas, weights, lambda tr, va, w: score(tr, va, w, lambdas, lam_y))
        total = _merge(folds, folds[0].factor.shape[0])
        self.regularizer_, self.lambda_y_, self.lambda_g_relative_ = self.regularizer, lam_y, rel
        self.data_scale_ = _data_scale(total.factor)
        self.n_columns_ = total.n_columns
        self.lambda_g_ = self._abs_strength(rel, self.data_scale_, total.n_columns, total.factor.shape[0])
        self.blocks_, self.reg_matrix_ = self._blocks(total, compress)
        self.cv_table_ = table
        self._l1_cache = self._map_cache = None
        return self

    def _blocks(self, data: _Fold, compress: bool):
        m, p, past, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        H = data.factor if compress else np.concatenate(data.full, axis=1)
        blocks = HankelBlocks.from_matrix(H, m, p, past, N, compress)
        if self.regularizer == "projection":
            return blocks, _projection_complement(blocks.D, data.n_columns)
        if self.regularizer == "l2":
            return blocks, np.eye(H.shape[1])
        return blocks, None

    def _score_quadratic(self, train, val, weights, lambdas, lam_y):
        m, p, past, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        blocks = HankelBlocks.from_matrix(train.factor, m, p, past, N, True)
        M = _projection_complement(blocks.D, train.n_columns) if self.regularizer == "projection" else None
        scale, n_b = _data_scale(train.factor), blocks.D.shape[0]
        out = []
        for rel in lambdas:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ConditioningWarning)
                try:
                    G = blocks.Yf @ _kkt_map(blocks, M, rel * scale, lam_y, np.eye(n_b))
                except np.linalg.LinAlgError:
                    out.append(np.inf)
                    continue
            out.append(_validation_error(G, val.factor, weights))
        return out

    def _score_l1(self, train, val, weights, lambdas, lam_y):
        m, p, past, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        H = np.concatenate(train.full, axis=1)
        blocks = HankelBlocks.from_matrix(H, m, p, past, N, False)
        V = np.concatenate(val.full, axis=1)
        pick = np.unique(np.linspace(0, V.shape[1] - 1, min(_L1_VALIDATION_WINDOWS, V.shape[1])).round().astype(int))
        scale = _data_scale(train.factor)
        solver = _L1Solver(blocks, lam_y, self.solver_options)
        n_b = blocks.D.shape[0]
        out = []
        for rel in lambdas:
            lam = self._abs_strength(rel, scale, train.n_columns, H.shape[0])
            err = sum(float(np.sum((weights * (V[n_b:, j] - blocks.Yf @ solver.solve(V[:n_b, j], lam))) ** 2))
                      for j in pick)
            out.append(err * val.n_columns / pick.size)
        return out

    # ---------------------------------------------------------------------------------------- predict
    def predict(self, u_past, y_past, u_future) -> np.ndarray:
        """Predict the outputs over ``u_future`` from the last ``past_steps_`` samples of the past window.

        Parameters
        ----------
        u_past : ndarray, shape (n_past >= past_steps_, n_inputs)
        y_past : ndarray, shape (n_past, n_outputs)
        u_future : ndarray, shape (n_future <= max_horizon_steps_, n_inputs)
            A shorter horizon uses the first blocks, with the later future inputs set to zero.

        Returns
        -------
        y_future : ndarray, shape (n_future, n_outputs)

        Raises
        ------
        NotFittedError, SessionError
        SolverError
            "l1": the convex solver did not reach an optimal solution.

        Notes
        -----
        For "l2" and "projection" the prediction is linear in the window, ``vec(y_future) = G b``; ``G`` is
        computed from one KKT solve with ``len(b)`` right-hand sides on the first call and kept, so later calls
        cost one matrix-vector product. :meth:`solve_g` re-solves the problem for one window.
        """
        b, n_future = self._check_windows(u_past, y_past, u_future)
        if self.regularizer_ == "l1":
            y = self.blocks_.Yf @ self._solve(b)
        else:
            y = self._prediction_map() @ b
        return y.reshape(self.max_horizon_steps_, self.n_outputs_)[:n_future] + self._offset()

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """:meth:`predict` for a batch of windows, shapes (n_windows, n_samples, channels).

        One matrix product with the kept prediction map for "l2" and "projection"; one solve per window for "l1".
        """
        check_fitted(self, "blocks_")
        if self.regularizer_ == "l1":
            return np.stack([self.predict(a, b, c) for a, b, c in zip(u_past, y_past, u_future)])
        return self._linear_many(self._prediction_map(), u_past, y_past, u_future)

    @property
    def has_linear_maps(self) -> bool:
        """False for the ℓ1 regulariser (its prediction is not affine in the window), True otherwise."""
        return getattr(self, "regularizer_", self.regularizer) != "l1"

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The affine map of :meth:`predict` ("l2" and "projection" only; see ``has_linear_maps``)."""
        check_fitted(self, "blocks_")
        if not self.has_linear_maps:
            raise SessionError("the l1-regularised Hankel predictor is not affine in its window and has no "
                               "prediction maps; use data_blocks() (the DeePC formulation) instead.")
        return self._maps_from(self._prediction_map(), past_steps, horizon_steps)

    def data_blocks(self) -> DataBlocks:
        """The (compressed) Hankel blocks, regulariser and strengths, as the DeePC formulation uses them."""
        check_fitted(self, "blocks_")
        b = self.blocks_
        M = getattr(self, "reg_matrix_", None)
        return DataBlocks(Up=b.Up, Yp=b.Yp, Uf=b.Uf, Yf=b.Yf, regularizer=str(self.regularizer_),
                          lambda_g=float(self.lambda_g_), lambda_y=float(self.lambda_y_),
                          reg_matrix=None if M is None else np.asarray(M, np.float64), output_offset=self._offset())

    @_one_blas_thread
    def solve_g(self, u_past, y_past, u_future) -> np.ndarray:
        """Solve the regularised problem for one window and return its minimiser.

        Parameters
        ----------
        u_past, y_past, u_future
            As :meth:`predict`.

        Returns
        -------
        g : ndarray, shape (r,)
            In the coordinates of ``blocks_`` (``h = Qᵀ g`` when compressed); ``blocks_.Yf @ g`` is the
            predicted ``vec(y_future)`` over the full horizon, less ``output_offset_`` with ``centre_outputs``.
        """
        b, _ = self._check_windows(u_past, y_past, u_future)
        return self._solve(b)

    @_one_blas_thread
    def _prediction_map(self) -> np.ndarray:
        if getattr(self, "_map_cache", None) is None:
            M = None if self.regularizer_ == "l2" else self.reg_matrix_
            n_b = self.blocks_.Up.shape[0] + self.blocks_.Yp.shape[0] + self.blocks_.Uf.shape[0]
            self._map_cache = self.blocks_.Yf @ _kkt_map(self.blocks_, M, self.lambda_g_, self.lambda_y_,
                                                         np.eye(n_b))
        return self._map_cache

    def _solve(self, b: np.ndarray) -> np.ndarray:
        if self.regularizer_ == "l1":
            if getattr(self, "_l1_cache", None) is None:
                self._l1_cache = _L1Solver(self.blocks_, self.lambda_y_, self.solver_options)
            return self._l1_cache.solve(b, self.lambda_g_)
        M = None if self.regularizer_ == "l2" else self.reg_matrix_
        return _kkt_map(self.blocks_, M, self.lambda_g_, self.lambda_y_, b[:, None])[:, 0]

    # ---------------------------------------------------------------------------------------- storage
    def to_state(self) -> dict:
        state = super().to_state()
        state["params"].pop("solver_options", None)
        b = self.blocks_
        state["fitted"]["blocks_"] = {"Up": b.Up, "Yp": b.Yp, "Uf": b.Uf, "Yf": b.Yf,
                                      "compressed": int(b.compressed)}
        if self.regularizer_ == "l2":
            state["fitted"].pop("reg_matrix_", None)
        return state

    @classmethod
    def from_state(cls, state) -> "HankelPredictor":
        """Rebuild a fitted predictor from :meth:`to_state`'s dict."""
        obj, fitted = cls._from_state_common(state)
        obj.compress = bool(int(obj.compress))
        obj.lambda_y = float(obj.lambda_y)
        obj.regularizer = str(obj.regularizer)
        bl = fitted["blocks_"]
        obj.blocks_ = HankelBlocks(*(np.asarray(bl[k], dtype=np.float64) for k in ("Up", "Yp", "Uf", "Yf")),
                                   compressed=bool(int(bl["compressed"])))
        obj.regularizer_ = str(fitted["regularizer_"])
        for k in ("lambda_g_", "lambda_g_relative_", "lambda_y_"):
            setattr(obj, k, float(fitted[k]))
        r = obj.blocks_.Up.shape[1]
        obj.reg_matrix_ = (np.eye(r) if obj.regularizer_ == "l2" else
                           None if obj.regularizer_ == "l1" else np.asarray(fitted["reg_matrix_"], dtype=np.float64))
        obj._l1_cache = obj._map_cache = None
        return obj


class _L1Solver:
    """The ℓ1 problem built once in cvxpy with Parameters (DPP); each solve only assigns values."""

    def __init__(self, blocks: HankelBlocks, lam_y: float, solver_options):
        import cvxpy as cp

        self._cp = cp
        Up, Yp, Uf = blocks.Up, blocks.Yp, blocks.Uf
        self.g = cp.Variable(Up.shape[1])
        self.up, self.yp, self.uf = (cp.Parameter(B.shape[0]) for B in (Up, Yp, Uf))
        self.lam = cp.Parameter(nonneg=True)
        cost = lam_y * cp.sum_squares(Yp @ self.g - self.yp) + self.lam * cp.norm1(self.g)
        self.problem = cp.Problem(cp.Minimize(cost), [Up @ self.g == self.up, Uf @ self.g == self.uf])
        self.sizes = (Up.shape[0], Yp.shape[0])
        self.options = {"solver": "CLARABEL", **(solver_options or {})}

    def solve(self, b: np.ndarray, lam: float) -> np.ndarray:
        nu, ny = self.sizes
        self.up.value, self.yp.value, self.uf.value = b[:nu], b[nu:nu + ny], b[nu + ny:]
        self.lam.value = float(lam)
        try:
            self.problem.solve(**self.options)
        except self._cp.error.SolverError as exc:
            raise SolverError(f"the l1 Hankel problem could not be solved ({exc}); try solver_options="
                              "{'solver': 'CLARABEL'} or the 'projection' regularizer.") from None
        if self.problem.status not in ("optimal", "optimal_inaccurate") or self.g.value is None:
            raise SolverError(
                f"the l1 Hankel problem ended with status {self.problem.status!r}; expected 'optimal'. Try another "
                "solver via solver_options or the 'projection' regularizer."
            )
        return np.asarray(self.g.value, dtype=np.float64)
