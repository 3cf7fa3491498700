"""What the direct-route predictors share: settings checks, the streamed data pass over folds of whole trials,
the data scale of the strengths, and their common base class.
"""

from __future__ import annotations

import contextlib
import functools
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .._offsets import ShiftedOutputs, output_mean
from .._views import SourceView
from ..excitation import excitation_order, warn_low_excitation
from .._base import BasePredictor, check_fitted
from .._blas_threads import fit_blas_threads
from ..protocols import PredictionMaps
from ..exceptions import InvalidParameterError, SessionError
from ..hankel import block_hankel, combine_factors, row_space_factor
from ..output_mask import blanking_note, output_valid_segments
from .._progress import progress
from ._fold_pieces import _pieces
from .gram import (GRAM_CONDITION_LIMIT, _GramFold, collect_gram, gram_condition_of, release_freed_memory,
                   total_fold)


# ------------------------------------------------------------------------------------------------ validation
def _check_int(name, value, lowest):
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)) or value < lowest:
        raise InvalidParameterError(f"{name} must be an integer >= {lowest}; got {value!r}.")
    return int(value)


def _check_strengths(name, values) -> np.ndarray:
    a = np.atleast_1d(np.asarray(values, dtype=np.float64))
    if a.ndim != 1 or a.size == 0:
        raise InvalidParameterError(f"{name} must be a non-empty 1-D grid of strengths; got shape {a.shape}.")
    if not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise InvalidParameterError(
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


def regressor_rows(m: int, p: int, past: int, horizon: int) -> int:
    """Rows of the regressor block ``[Up; Yp; Uf]``: ``(m + p)·past + m·horizon`` (the ``n_b`` of the folds)."""
    return (int(m) + int(p)) * int(past) + int(m) * int(horizon)


def _row_order(m: int, p: int, past: int, horizon: int) -> np.ndarray:
    """Permutation from the rows of [H_L(u); H_L(y)] to [Up; Yp; Uf; Yf] (time-major blocks)."""
    L = past + horizon
    return np.concatenate([np.arange(m * past), m * L + np.arange(p * past),
                           np.arange(m * past, m * L), m * L + np.arange(p * past, p * L)])


# ------------------------------------------------------------------------------------------------ channel scales
def _channel_rms(source, chunk_rows: int = 65536) -> np.ndarray:
    """Root mean square of every input then output channel over the valid in-trial samples (ones where zero)."""
    m, p = int(source.n_inputs), int(source.n_outputs)
    n, s2 = 0, np.zeros(m + p)
    for a, b in source.segments():
        for k0 in range(a, b, chunk_rows):
            u, y, _mask = source.read(k0, min(b, k0 + chunk_rows))
            z = np.hstack([np.asarray(u, dtype=np.float64), np.asarray(y, dtype=np.float64)])
            n += z.shape[0]
            s2 += np.einsum("ij,ij->j", z, z)
    rms = np.sqrt(s2 / max(n, 1))
    rms[~(rms > 0) | ~np.isfinite(rms)] = 1.0
    return rms


class _ScaledChannels(SourceView):
    """A view whose inputs and outputs are divided, channel by channel, by ``scale = [s_u; s_y]`` on every read."""

    def __init__(self, source, scale: np.ndarray):
        super().__init__(source)
        self._su, self._sy = scale[:int(source.n_inputs)], scale[int(source.n_inputs):]

    def read(self, start: int, stop: int):
        u, y, mask = self._src.read(start, stop)
        return np.asarray(u, dtype=np.float64) / self._su, np.asarray(y, dtype=np.float64) / self._sy, mask


# ------------------------------------------------------------------------------------------------ data pass
@dataclass
class _Fold:
    factor: np.ndarray
    n_columns: int
    full: list

    @property
    def n_rows(self) -> int:
        return int(self.factor.shape[0])

    def release(self) -> None:
        """Nothing to drop (the QR route's factor is the fold's data)."""


def _check_columns(session, past: int, horizon: int) -> None:
    """Refuse a session none of whose windows may be fitted (every one predicts a blanked output): the fit would
    otherwise be made on no data at all."""
    L = past + horizon
    segs = session.segments(L)
    if segs and not output_valid_segments(session, segs, L, past):
        raise SessionError(f"no window of past_steps + horizon_steps = {L} samples can be fitted: each predicts a "
                           "blanked output." + blanking_note(session, segs, L, past))


def _collect(session, past, horizon, n_folds_wanted, seed, keep_full, route="auto", keep_gram=False, early=None):
    """One pass over the valid segments: per-fold data (Gram route where it is accurate, else QR), the scheme,
    the outputs' standard deviations, the fold of each trial and ``(route, condition)``. ``keep_gram``: the total
    keeps the condition check's array with the Gram's upper triangle (``gram.gram_condition_of``). ``early(folds)``,
    if given, is called before the condition check's assembly (work started beside it); its result is
    ``folds.first_fold`` (None, or an object whose ``stop()`` ends that work, and whose ``run(task)``, if it has
    one, runs the condition check's Cholesky factor among that work: ``gram.gram_condition_of``).

    ``route``: "auto" (the Gram route unless raw columns are needed or the Gram is too ill-conditioned), "qr"
    (always the QR route: :func:`_collect_qr`) or "gram" (the Gram route whatever the conditioning; tests).
    """
    m, p, L = int(session.n_inputs), int(session.n_outputs), past + horizon
    if keep_full or route == "qr":
        return _collect_qr(session, past, horizon, n_folds_wanted, seed, keep_full) + (("qr", float("nan")),)
    pieces, n_folds, scheme = _pieces(session, L, n_folds_wanted, seed, past)
    folds, y_sum, y_sq, n_y = collect_gram(session, pieces, n_folds, m, p, past, horizon)
    folds = _Folds(folds)
    folds.total = total_fold(folds) if folds else None
    def start():
        if early is not None:
            release_freed_memory()  # the stream's freed blocks, before a fold's array is made beside the Gram
        folds.first_fold = early(folds) if early is not None else None
        return getattr(folds.first_fold, "run", None)  # the total's factor among the work begun, where it takes it
    cond = gram_condition_of(folds.total, keep=True, keep_gram=keep_gram, begin=start) if folds else float("nan")
    if route == "auto" and not cond <= GRAM_CONDITION_LIMIT:
        if folds.first_fold is not None:
            folds.first_fold.stop()  # its threads end before the fit goes on
        del folds  # memory: the total's factor
        return _collect_qr(session, past, horizon, n_folds_wanted, seed, keep_full) + (("qr", cond),)
    std, trial_fold = _std_and_trial_folds(session, pieces, scheme, y_sum, y_sq, n_y)
    return folds, scheme, std, trial_fold, ("gram", cond)


def _checked_beside(early, check, found: dict):
    """``early`` with the excitation check run right after the work it begins (the Hankel predictor's first fold),
    beside that work instead of before the data pass: ``found["order"] = check()``; an error of the check stops
    the work (its threads end) and is raised as it would have been before the pass. Measured at past 100 /
    horizon 50: 0.09 s of one core that the first fold no longer waits for (0.06 s less per fit, 6 runs each)."""
    def begun(folds):
        work = early(folds)
        try:
            found["order"] = check()
        except BaseException:
            if work is not None:
                work.stop()
            raise
        return work
    return begun


class _Folds(list):
    """The Gram route's folds and ``total``, their sum, which keeps the Cholesky factor of the condition check
    (the Hankel predictor's row-space factor, and the held-out terms of large folds: ``gram._total_factor``)."""

    total = None
    #: Work begun before the condition check (``_collect``'s ``early``), or None.
    first_fold = None


def _std_and_trial_folds(session, pieces, scheme, y_sum, y_sq, n_y):
    starts = np.asarray(session.trials)[:, 0]
    trial_fold = np.full(starts.size, -1, dtype=np.int64)
    if scheme == "trials":
        for a, _b, f in pieces:
            trial_fold[np.searchsorted(starts, a, side="right") - 1] = f
    n_y = max(n_y, 1)
    std = np.sqrt(np.maximum(y_sq / n_y - (y_sum / n_y) ** 2, 0.0))
    std[std <= 1e-12 * max(std.max(), 1e-300)] = 1.0
    return std, tuple(int(f) for f in trial_fold)


def _collect_qr(session, past, horizon, n_folds_wanted, seed, keep_full):
    """One pass over the valid segments: per-fold row-space factors by QR (and raw Hankel blocks when asked); the
    QR route's algebra on the BLAS threads of before the fit (``_DirectPredictor._qr_algebra``)."""
    with fit_blas_threads():
        return _collect_qr_pass(session, past, horizon, n_folds_wanted, seed, keep_full)


def _collect_qr_pass(session, past, horizon, n_folds_wanted, seed, keep_full):
    m, p, L = int(session.n_inputs), int(session.n_outputs), past + horizon
    order = _row_order(m, p, past, horizon)
    pieces, n_folds, scheme = _pieces(session, L, n_folds_wanted, seed, past)
    n_rows = (m + p) * L
    parts = [[] for _ in range(n_folds)]
    folds = [_Fold(np.zeros((n_rows, 0)), 0, []) for _ in range(n_folds)]
    y_sum, y_sq, n_y = np.zeros(p), np.zeros(p), 0
    for a, b, f in pieces:
        u, y, _ = session.read(a, b)
        u, y = np.asarray(u, dtype=np.float64), np.asarray(y, dtype=np.float64)
        F, k = row_space_factor([u, y], L, row_order=order)  # lower triangular in the Hankel order: merged by tpqrt
        parts[f].append(F)
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
    std, trial_fold = _std_and_trial_folds(session, pieces, scheme, y_sum, y_sq, n_y)
    return folds, scheme, std, trial_fold


def _merge(folds, n_rows, onto=None):
    """Every fold's data; on the QR route with ``onto`` (the last fold's training data, overwritten) one merge."""
    if isinstance(folds[0], _GramFold):
        return folds.total if getattr(folds, "total", None) is not None else total_fold(folds)
    parts = [f.factor for f in folds] if onto is None else [onto.factor, folds[-1].factor]
    factor = combine_factors(parts, n_rows, own_first=onto is not None)
    return _Fold(factor, sum(f.n_columns for f in folds), [blk for f in folds for blk in f.full])


def _data_scale(F: np.ndarray) -> float:
    """``||H||_F² / n_rows`` (equal for ``H`` and its factor)."""
    return float(np.einsum("ij,ij->", F, F) / F.shape[0])  # no F-sized temporary


def _training(folds, i, total):
    """The training data of fold ``i``: the total minus the fold (Gram route), or the other folds combined (QR)."""
    if total is not None:
        return total.plus(folds[i], -1.0)
    return _merge([f for j, f in enumerate(folds) if j != i], folds[0].n_rows)


def _validation_error(G: np.ndarray, F_val: np.ndarray, weights: np.ndarray) -> float:
    """``Σ_columns ||W (Yf_col − G D_col)||²`` over a held-out fold, from its row-space factor alone."""
    n_b = G.shape[1]
    E = F_val[n_b:] - G @ F_val[:n_b]
    return float(np.sum((weights[:, None] * E) ** 2))


# ------------------------------------------------------------------------------------------------ base class
class _DirectPredictor(BasePredictor):
    """Shared validation, data pass, selection, prediction and state for the direct predictors."""

    _strength_param: str = ""
    #: The condition check's array keeps the Gram's upper triangle beside the factor (the final map's Gram).
    _keeps_total_gram: bool = False
    #: ``fit`` reads a lazily opened session file segment by segment (``read``/``segments``).
    supports_streaming = True
    #: The prediction is affine in the window (see :mod:`stimsteer.sysid.protocols`).
    has_linear_maps = True

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
                f"of every trial (the longest is {longest}). Shorten the past window or "
                "the horizon (--past/--horizon; past_steps/horizon_steps in the API), or record longer trials "
                "with fewer gaps."
            )
        return past, horizon

    def _gather(self, session, n_candidates, keep_full, early=None):
        past, horizon = self._validate_common(session)
        if not isinstance(self.centre_outputs, (bool, np.bool_)):
            raise InvalidParameterError(f"centre_outputs must be True or False; got {self.centre_outputs!r}.")
        self.output_offset_ = output_mean(session) if self.centre_outputs else np.zeros(int(session.n_outputs))
        if self.centre_outputs:
            session = ShiftedOutputs(session, self.output_offset_)
        check = functools.partial(excitation_order, session, past_steps=past, horizon_steps=horizon,
                                  n_states=self.n_states)
        found = {}
        beside = early is not None and not keep_full and getattr(self, "_route", "auto") != "qr"
        if not beside:
            found["order"] = check()
        # Per-channel scaling to unit root mean square makes every strength, the slack weight and the fit itself
        # independent of the channels' units (issue 13: µV and mV gave predictions 25 % apart at a fixed alpha).
        self.channel_scale_ = _channel_rms(session)
        _check_columns(session, past, horizon)
        folds, scheme, std, trial_fold, (route, cond) = _collect(
            _ScaledChannels(session, self.channel_scale_), past, horizon, self.n_splits if n_candidates > 1 else 1,
            self.seed, keep_full, getattr(self, "_route", "auto"), self._keeps_total_gram,
            _checked_beside(early, check, found) if beside else early)
        if "order" not in found:  # no work was begun (no windows in any fold): checked now
            found["order"] = check()
        order = found["order"]
        warn_low_excitation(order, past_steps=past, horizon_steps=horizon, n_states=self.n_states, stacklevel=5)
        self.factor_route_, self.gram_condition_ = route, cond
        if n_candidates > 1 and len(folds) < 2:
            raise SessionError(
                f"choosing among {n_candidates} strengths needs held-out data, but the session's windows of "
                f"{past + horizon} samples fit in {len(folds)} fold(s), fewer than two. Record more or longer "
                "trials, or give a single strength." + blanking_note(session, session.segments(past + horizon),
                                                                     past + horizon, past)
            )
        m, p = int(session.n_inputs), int(session.n_outputs)
        self.past_steps_, self.max_horizon_steps_ = past, horizon
        self.n_inputs_, self.n_outputs_ = m, p
        self.excitation_order_ = int(order)
        self.cv_scheme_ = scheme
        self.cv_folds_ = trial_fold
        self.input_names_ = tuple(getattr(session, "input_names", None) or (f"u{i}" for i in range(m)))
        self.output_names_ = tuple(getattr(session, "output_names", None) or (f"y{i}" for i in range(p)))
        self.input_units_ = tuple(getattr(session, "input_units", None) or ("",) * m)
        self.output_units_ = tuple(getattr(session, "output_units", None) or ("",) * p)
        self.sample_rate_hz_ = float(session.sample_rate_hz)
        return folds, np.tile(1.0 / std, horizon)

    def _select(self, folds, candidates, weights, score_fold):
        """Validation error per candidate summed over folds; ``score_fold(train, val) -> errors``."""
        self._kept_training = None  # none from an earlier fit (_total)
        if len(candidates) == 1:
            return float(candidates[0]), pd.DataFrame({"candidate": candidates, "validation_error": [np.nan]})
        errors, counts = np.zeros(len(candidates)), 0
        cols = {}
        total = _merge(folds, folds[0].n_rows) if isinstance(folds[0], _GramFold) else None
        with self._qr_algebra(), progress(len(folds), f"cross-validation of {type(self).__name__}", unit="fold") as bar:
            scores = [self._score_one(folds, i, total, weights, score_fold, bar) for i in range(len(folds))]
        for i, (val, e) in enumerate(zip(folds, scores)):
            if e is None:
                continue
            errors += e
            counts += val.n_columns
            cols[f"fold_{i}"] = e / max(val.n_columns * weights.size, 1)  # same normalisation as the mean
        mean = errors / max(counts * weights.size, 1)
        mean = np.where(np.isfinite(mean), mean, np.inf)
        best = int(np.flatnonzero(mean <= mean.min() * (1 + 1e-12))[-1])
        table = pd.DataFrame({"candidate": candidates, "validation_error": mean, **cols})
        return float(candidates[best]), table

    def _qr_algebra(self):
        """Context for the QR route's algebra (merges, SVDs, triangular solves, one after another): BLAS on the
        threads it had before the fit's one-thread limit (for the Gram route's own workers)."""
        return fit_blas_threads() if self.factor_route_ == "qr" else contextlib.nullcontext()

    def _score_one(self, folds, i, total, weights, score_fold, bar):
        """Held-out errors of fold ``i`` (None when it or its training data has no window)."""
        val = folds[i]
        train = _training(folds, i, total)
        bar.update()
        if total is None and i == len(folds) - 1 and len(folds) > 2:  # QR route: for _total (a factor of its own)
            self._kept_training = train
        if val.n_columns == 0 or train.n_columns == 0:
            return None
        e = np.asarray(score_fold(train, val, weights))
        val.release()
        return e

    def _total(self, folds):
        """Every fold's data (:func:`_merge`), onto the training factor :meth:`_score_one` kept (each merge saved:
        ``(2/3) n³`` flops, 0.7 s of one core at past 100 / horizon 50, issue 14)."""
        train, self._kept_training = getattr(self, "_kept_training", None), None
        return _merge(folds, folds[0].n_rows, onto=train)

    # ---------------------------------------------------------------------------------------- prediction
    def _batch_windows(self, u_past, y_past, u_future):
        """Stacked ``b`` vectors of a batch of windows, shape (n_windows, len(b)), and the common future length."""
        m, past, N = self.n_inputs_, self.past_steps_, self.max_horizon_steps_
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        W, n_future = up.shape[0], uf.shape[1]
        full = np.zeros((W, N, m))
        full[:, :n_future] = uf
        y_rel = yp[:, -past:] - self._offset()
        b = np.concatenate([up[:, -past:].reshape(W, -1), y_rel.reshape(W, -1), full.reshape(W, -1)], axis=1)
        return b, n_future

    def _row_scales(self):
        """Scales of the entries of ``b`` (inputs past, outputs past, inputs future) and of ``vec(y_future)``."""
        sc = getattr(self, "channel_scale_", None)
        m, p, T, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        sc = np.ones(m + p) if sc is None else np.asarray(sc, dtype=np.float64)
        su, sy = sc[:m], sc[m:]
        return np.concatenate([np.tile(su, T), np.tile(sy, T), np.tile(su, N)]), np.tile(sy, N)

    def _unscaled(self, G_scaled: np.ndarray) -> np.ndarray:
        """A map on scaled rows (``b / s_b -> y / s_y``) as a map in the channels' units."""
        s_b, s_y = self._row_scales()
        out = s_y[:, None] * G_scaled
        out /= s_b[None, :]  # in place: the same numbers as a second product, without its temporary
        return out

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

    @property
    def chain_spectral_radius_(self) -> float | None:
        """Spectral radius of the zero-input map from one chained block's past window to the next.

        Predictions longer than ``max_horizon_steps_`` chain blocks; they stay bounded only when it is below 1
        (:func:`stimsteer.sysid.chaining.chain_radius`). None for a predictor without linear maps (ℓ1).
        """
        check_fitted(self, "past_steps_")
        if getattr(self, "_chain_radius", None) is None:
            from ..chaining import chain_radius

            self._chain_radius = chain_radius(self)
        return self._chain_radius

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]:
        """A past window at rest: zero input and the output offset, shapes (past_steps_, m) and (past_steps_, p)."""
        check_fitted(self, "past_steps_")
        return np.zeros((self.past_steps_, self.n_inputs_)), np.tile(self._offset(), (self.past_steps_, 1))

    # ---------------------------------------------------------------------------------------- storage
    _fitted_arrays: tuple = ("channel_scale_",)
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
        fitted["input_units_"] = "\n".join(self.input_units_)
        fitted["output_units_"] = "\n".join(self.output_units_)
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
        for k, n in (("input_units_", obj.n_inputs_), ("output_units_", obj.n_outputs_)):
            units = tuple(str(fitted.pop(k)).split("\n")) if k in fitted else ("",) * n
            setattr(obj, k, units if len(units) == n else ("",) * n)  # files written before units were stored
        obj.cv_table_ = pd.DataFrame({k: np.asarray(v) for k, v in fitted.pop("cv_table_").items()})
        obj.output_offset_ = np.asarray(fitted.pop("output_offset_", np.zeros(obj.n_outputs_)), dtype=np.float64)
        # files written before per-channel scaling: unit scales (their maps are already in the channels' units)
        obj.channel_scale_ = np.asarray(fitted.pop("channel_scale_", np.ones(obj.n_inputs_ + obj.n_outputs_)),
                                        dtype=np.float64)
        obj._mark_fitted()
        return obj, fitted
