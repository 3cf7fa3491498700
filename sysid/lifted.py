"""The lifted route: a predictor linear in a lifted state of the past window (Korda & Mezić 2018).

The past window is lifted to ``z_t = [r_t; φ(s_t); 1]`` (raw window, a dictionary of nonlinear features of the
past outputs and strictly past inputs, a constant; see :mod:`stimsteer.sysid._lift_features`). The lifted state
evolves linearly, with the current input entering linearly::

    z_t = A z_{t−1} + B u_t,      y_t = C z_t

``C`` reads the newest output out of ``r_t``; the rows of ``A`` and ``B`` that move the raw window along are fixed
shifts, the rows of the newest output and of the features are fitted by ridge regression on every transition
inside a valid segment. The dictionary size, its bandwidth and the ridge strength are chosen by cross-validation
over trials on ``cv_horizon_steps``-step predictions.

Because the prediction is affine in the future inputs with a map ``F`` that does not depend on the past
(``y = C A^{j+1} z_{−1} + Σ_i C A^{j−i} B u_i``), the predictor declares
:class:`~stimsteer.sysid.protocols.InputAffineForm` and plans by the same convex condensed problem as the linear
predictors, with the free response computed from the lifted past (Korda & Mezić 2018, section 4).

References
----------
Korda M., Mezić I. (2018), Linear predictors for nonlinear dynamical systems: Koopman operator meets model
predictive control, Automatica 93:149–160.
Rahimi A., Recht B. (2007), Random features for large-scale kernel machines, NeurIPS.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import scipy.linalg as sla

from ._base import BasePredictor, check_fitted
from ._progress import progress
from ._lift_features import DICTIONARIES, Dictionary, draw_dictionary, source_dim, windows
from .exceptions import InvalidParameterError, SessionError
from .statespace import markov_toeplitz

__all__ = ["LiftedPredictor"]

_MAX_CV_WINDOWS = 200  # validation windows per fold (evenly strided beyond that)


def _trial_segments(session, T: int, H: int = 0):
    """Per trial, the lifted arrays of each valid segment long enough for one transition (and ``H`` steps)."""
    out = []
    for a, b in session.trials:
        segs = []
        for s, e in session.segments(min_length=T + 1 + H):
            if a <= s and e <= b:
                u, y, _ = session.read(s, e)
                raw, src = windows(u, y, T)
                segs.append((u, y, raw, src))
        out.append(segs)
    return out


def _transitions(segs, T: int):
    """Stacked regression rows of segments: previous raw window and source, current input, output, next source."""
    parts = [(raw[:-1], src[:-1], u[T:], y[T:], src[1:]) for u, y, raw, src in segs]
    if not parts:
        return None
    return tuple(np.concatenate(col) for col in zip(*parts))


def _ridge(X, Y, alpha):
    """Ridge on standardised, centred columns (the intercept unpenalised); returns (coef (k, q), intercept (q,))."""
    mx, my = X.mean(0), Y.mean(0)
    sx = X.std(0)
    sx = np.where(sx > 1e-12, sx, 1.0)
    Xs = (X - mx) / sx
    k = Xs.shape[1]
    if alpha > 0:  # stacked least squares keeps the accuracy of the data (no squared condition number)
        Xs = np.vstack([Xs, np.sqrt(alpha * Xs.shape[0]) * np.eye(k)])
        Yc = np.vstack([Y - my, np.zeros((k, Y.shape[1]))])
    else:
        Yc = Y - my
    theta = sla.lstsq(Xs, Yc, lapack_driver="gelsd")[0] / sx[:, None]
    return theta, my - mx @ theta


def _ridge_path(X, Y, alphas):
    """Ridge solutions for several strengths from one eigendecomposition of the standardised Gram matrix."""
    mx, my = X.mean(0), Y.mean(0)
    sx = X.std(0)
    sx = np.where(sx > 1e-12, sx, 1.0)
    Xs = (X - mx) / sx
    lam, V = np.linalg.eigh(Xs.T @ Xs)
    VtXY = V.T @ (Xs.T @ (Y - my))
    out = []
    for a in alphas:
        d = lam + a * Xs.shape[0]
        d = np.where(d > 1e-12 * max(lam[-1], 1e-300), d, np.inf)  # a null direction of an unregularised fit: drop it
        theta = (V @ (VtXY / d[:, None])) / sx[:, None]
        out.append((theta, my - mx @ theta))
    return out


def _lifted_matrices(theta, b, T, m, p, D):
    """``A``, ``B``, ``C`` of the lifted dynamics from the fitted rows (coefficients over ``[z_prev; u_t]``)."""
    nr = T * (m + p)
    nz = nr + D + 1
    Th = np.vstack([theta, b[None]]).T  # (p + D, nr + D + m + 1): [raw, features, u, intercept]
    A, B = np.zeros((nz, nz)), np.zeros((nz, m))
    for i in range(T - 1):
        A[i * m:(i + 1) * m, (i + 1) * m:(i + 2) * m] = np.eye(m)
        A[T * m + i * p:T * m + (i + 1) * p, T * m + (i + 1) * p:T * m + (i + 2) * p] = np.eye(p)
    B[(T - 1) * m:T * m] = np.eye(m)
    rows = np.r_[T * m + (T - 1) * p:T * m + T * p, nr:nr + D]
    A[rows, :nr + D] = Th[:, :nr + D]
    B[rows] = Th[:, nr + D:nr + D + m]
    A[rows, -1] = Th[:, -1]
    A[-1, -1] = 1.0
    C = np.zeros((p, nz))
    C[:, T * m + (T - 1) * p:nr] = np.eye(p)
    return A, B, C


def _simulate(A, B, C, z0, uf):
    """Outputs of the lifted dynamics from lifted states ``z0`` (w, nz) under inputs ``uf`` (w, H, m)."""
    z, out = z0, np.empty((uf.shape[0], uf.shape[1], C.shape[0]))
    for k in range(uf.shape[1]):
        z = z @ A.T + uf[:, k] @ B.T
        out[:, k] = z @ C.T
    return out


class LiftedPredictor(BasePredictor):
    """Predictor linear in a lifted state of the past window (random Fourier, radial or quadratic features).

    Parameters
    ----------
    past_steps : int, default 2
        ``T``: samples of the raw window and of the feature source.
    dictionary : {"rff", "rbf", "poly2"}, default "rff"
        Random Fourier features (Rahimi & Recht 2007), radial features at centres drawn from the training windows,
        or every product of two entries of the standardised source (then ``n_features`` is set by the window).
    n_features : int, optional
        Dictionary size; default chosen from ``feature_grid`` by cross-validation (``0`` is the linear model).
    feature_grid : tuple of int, default (0, 25, 50, 100)
    bandwidths : tuple of float, default (0.5, 1.0, 2.0)
        Kernel widths relative to ``√d`` standardised units (``rff``, ``rbf``), chosen by cross-validation.
    alphas : tuple of float, default (1e-8, 1e-6, 1e-4, 1e-2, 1.0)
        Ridge strengths (per row of data, on standardised columns), chosen by cross-validation.
    n_folds : int, default 3
        Folds over whole trials (at most the number of trials).
    cv_horizon_steps : int, default 20
        Horizon of the predictions scored in cross-validation, samples.
    seed : int, default 0
        Seed of the dictionary's random draws.

    Attributes
    ----------
    A_, B_, C_ : ndarray
        Lifted dynamics, shapes (n_z, n_z), (n_z, m), (p, n_z).
    dictionary_ : Dictionary
    n_features_, bandwidth_, alpha_ : selected dictionary size, relative bandwidth, ridge strength
    cv_table_ : pandas.DataFrame
        One row per candidate: ``n_features``, ``bandwidth``, ``alpha``, ``cv_nmse`` (mean normalised squared
        error of the held-out folds' predictions), ``selected``.
    spectral_radius_ : float
        Of the lifted ``A`` without its constant; above 1 the lifted model diverges over long horizons.
    selection_notes_ : tuple of str
    past_steps_, max_horizon_steps_ (None), n_inputs_, n_outputs_, input_names_, output_names_, input_units_,
    output_units_, sample_rate_hz_

    Raises
    ------
    InvalidParameterError
        Unknown dictionary, or a dictionary with more regressors than the training transitions can support.
    SessionError
        Fewer than two trials for cross-validation, or no segment longer than the window.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import Session
    >>> rng = np.random.default_rng(0); u = rng.normal(size=(400, 1)); y = np.zeros((400, 1))
    >>> for k in range(1, 400): y[k] = 0.5 * y[k - 1] + np.tanh(u[k])
    >>> s = Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, 200), (200, 400)])
    >>> LiftedPredictor(past_steps=1, n_features=0, alphas=(1e-8,)).fit(s).predict(u[:1], y[:1], u[1:4]).shape
    (3, 1)
    """

    storage_kind = "lifted_predictor"
    #: Not in the benchmark's default method set (opt in with a MethodSpec): 2.4x the quick bench's time, and it would
    #: take over the indirect route's closed loops (measured in benchmarks/README.md, bench_accuracy.py bench-set).
    in_default_bench = False
    #: The lifted state / the linear part carries a constant, so an output offset needs no centring.
    fit_intercept = True
    has_linear_maps = False

    def __init__(self, *, past_steps=2, dictionary="rff", n_features=None, feature_grid=(0, 25, 50, 100),
                 bandwidths=(0.5, 1.0, 2.0), alphas=(1e-8, 1e-6, 1e-4, 1e-2, 1.0), n_folds=3, cv_horizon_steps=20,
                 seed=0):
        self.past_steps = past_steps
        self.dictionary = dictionary
        self.n_features = n_features
        self.feature_grid = feature_grid
        self.bandwidths = bandwidths
        self.alphas = alphas
        self.n_folds = n_folds
        self.cv_horizon_steps = cv_horizon_steps
        self.seed = seed

    # -------------------------------------------------------------------------------------------- fit
    def _check(self, session):
        T = self.past_steps
        if isinstance(T, bool) or not isinstance(T, (int, np.integer)) or T < 1:
            raise InvalidParameterError(f"past_steps must be a whole number of samples >= 1; got {T!r}.")
        if self.dictionary not in DICTIONARIES:
            raise InvalidParameterError(f"dictionary must be one of {DICTIONARIES}; got {self.dictionary!r}.")
        alphas = tuple(float(a) for a in np.atleast_1d(self.alphas))
        if not alphas or any(not np.isfinite(a) or a < 0 for a in alphas):
            raise InvalidParameterError(f"alphas must be finite numbers >= 0; got {self.alphas!r}.")
        d = source_dim(int(T), session.n_inputs, session.n_outputs)
        if self.dictionary == "poly2":
            sizes = (d * (d + 1) // 2,)
        else:
            sizes = tuple(int(n) for n in np.atleast_1d(self.feature_grid if self.n_features is None
                                                         else self.n_features))
        if any(n < 0 for n in sizes):
            raise InvalidParameterError(f"n_features and feature_grid must be >= 0; got {sizes}.")
        widths = tuple(float(b) for b in np.atleast_1d(self.bandwidths))
        if self.dictionary == "poly2" or not widths:
            widths = (1.0,)
        return int(T), sizes, widths, alphas

    def _candidates(self, sizes, widths, alphas, n_rows, n_reg0):
        """The grid of (n_features, bandwidth, alpha) that the training rows can support."""
        kept = [n for n in sizes if n_reg0 + n < n_rows]
        if not kept:
            most = max(n_rows - n_reg0 - 1, 0)
            raise InvalidParameterError(
                f"a dictionary of {min(sizes)} features needs more than {n_reg0 + min(sizes)} training transitions "
                f"(one regressor per feature, window entry and input); the training trials give {n_rows}. Use "
                f"n_features <= {most}, a shorter past window, or more or longer trials.")
        combos = []
        for n in kept:
            for w in (widths if n > 0 and self.dictionary != "poly2" else widths[:1]):
                combos.append((n, w))
        return combos, [n for n in sizes if n not in kept]

    def fit(self, session):
        """Choose the dictionary and ridge strength by cross-validation over trials, then fit on every trial."""
        T, sizes, widths, alphas = self._check(session)
        m, p = session.n_inputs, session.n_outputs
        H = int(self.cv_horizon_steps)
        per_trial = _trial_segments(session, T)
        rows = _transitions([s for segs in per_trial for s in segs], T)
        if rows is None:
            raise SessionError(f"no valid segment holds more than past_steps = {T} samples; the lifted predictor "
                               "needs at least one transition. Use a shorter past window or longer trials.")
        n_reg0 = T * (m + p) + m + 1
        n_folds = min(int(self.n_folds), len(per_trial))
        folds = self._folds(per_trial, n_folds)
        counts = [sum(len(seg[2]) - 1 for seg in segs) for segs in per_trial]
        min_train = min((sum(c for i, c in enumerate(counts) if i not in f) for f in folds if len(f) < len(counts)),
                        default=sum(counts))
        combos, dropped = self._candidates(sizes, widths, alphas, min(min_train, len(rows[0])), n_reg0)
        grid = [(n, w, a) for (n, w), a in itertools.product(combos, alphas)]
        if len(grid) > 1 and n_folds < 2:
            raise SessionError(f"choosing among {len(grid)} candidates by cross-validation needs at least 2 trials; "
                               f"the session has {len(per_trial)}. Give n_features, one bandwidth and one alpha, "
                               "or record more trials.")
        table = self._cross_validate(per_trial, folds, combos, alphas, T, H, m, p) if len(grid) > 1 else \
            pd.DataFrame({"n_features": [grid[0][0]], "bandwidth": [grid[0][1]], "alpha": [grid[0][2]],
                          "cv_nmse": [np.nan]})
        best = int(np.nanargmin(table["cv_nmse"].to_numpy())) if table["cv_nmse"].notna().any() else 0
        table["selected"] = np.arange(len(table)) == best
        n, w, a = (table.iloc[best][c] for c in ("n_features", "bandwidth", "alpha"))
        self._fit_final(rows, int(n), float(w), float(a), T, m, p)
        self.cv_table_ = table
        self._describe(session, T)
        self.selection_notes_ = self._notes(table, best, dropped, sizes)
        return self

    def _folds(self, per_trial, n_folds):
        order = np.random.default_rng(self.seed).permutation(len(per_trial))
        return [set(int(i) for i in order[k::n_folds]) for k in range(max(n_folds, 1))]

    def _cross_validate(self, per_trial, folds, combos, alphas, T, H, m, p):
        records = []
        with progress(len(combos) * len(folds), "cross-validation of the lifted predictor", unit="fit") as bar:
            for n, w in combos:
                records += self._cross_validate_one(per_trial, folds, n, w, alphas, T, H, m, p, bar)
        return pd.DataFrame(records)

    def _cross_validate_one(self, per_trial, folds, n, w, alphas, T, H, m, p, bar):
        """The held-out errors of one dictionary (size ``n``, bandwidth ``w``) at every strength, fold by fold."""
        scores = np.zeros((len(folds), len(alphas)))
        counted = np.zeros(len(folds), bool)
        for k, fold in enumerate(folds):
            train = _transitions([s for i, segs in enumerate(per_trial) if i not in fold for s in segs], T)
            valid = [s for i, segs in enumerate(per_trial) if i in fold for s in segs if len(s[0]) >= T + H]
            bar.update()
            if train is None or not valid:
                continue
            dic = draw_dictionary(self.dictionary, train[1], n, w, self.seed)
            X = np.hstack([train[0], dic(train[1]), train[2]])
            Y = np.hstack([train[3], dic(train[4])])
            counted[k] = True
            windows_ = _validation_windows(dic, valid, T, H)
            for j, (theta, b) in enumerate(_ridge_path(X, Y, alphas)):
                A, B, C = _lifted_matrices(theta, b, T, m, p, dic.n_features)
                scores[k, j] = _validation_nmse(A, B, C, *windows_)
        return [{"n_features": n, "bandwidth": w, "alpha": a,
                 "cv_nmse": float(np.mean(scores[counted, j])) if counted.any() else np.nan}
                for j, a in enumerate(alphas)]

    def _fit_final(self, rows, n, w, a, T, m, p):
        dic = draw_dictionary(self.dictionary, rows[1], n, w, self.seed)
        X = np.hstack([rows[0], dic(rows[1]), rows[2]])
        Y = np.hstack([rows[3], dic(rows[4])])
        theta, b = _ridge(X, Y, a)
        self.A_, self.B_, self.C_ = _lifted_matrices(theta, b, T, m, p, dic.n_features)
        self.dictionary_ = dic
        self.n_features_, self.bandwidth_, self.alpha_ = dic.n_features, w, a
        inner = self.A_[:-1, :-1]
        self.spectral_radius_ = float(np.max(np.abs(np.linalg.eigvals(inner)), initial=0.0)) if inner.size else 0.0

    def _describe(self, session, T):
        self.past_steps_, self.max_horizon_steps_ = T, None
        self.n_inputs_, self.n_outputs_ = int(session.n_inputs), int(session.n_outputs)
        self.input_names_, self.output_names_ = tuple(session.input_names), tuple(session.output_names)
        self.input_units_, self.output_units_ = tuple(session.input_units), tuple(session.output_units)
        self.sample_rate_hz_ = float(session.sample_rate_hz)

    def _notes(self, table, best, dropped, sizes):
        notes = []
        if dropped:
            notes.append(f"dictionary sizes {dropped} were skipped: they need more regressors than the training "
                         "transitions support.")
        if len(table) > 1 and self.n_features is None and self.dictionary != "poly2" \
                and int(table.iloc[best]["n_features"]) == max(sizes):
            notes.append("the largest dictionary of the grid was selected; a larger feature_grid may do better.")
        if self.spectral_radius_ >= 1.0:
            notes.append(f"the lifted dynamics have spectral radius {self.spectral_radius_:.4f} >= 1: long "
                         "free-run predictions may diverge; prefer short horizons or a larger alpha.")
        return tuple(notes)

    # -------------------------------------------------------------------------------------------- predict
    def lift(self, u_past, y_past) -> np.ndarray:
        """Lifted states of a batch of past windows (n_windows, n_past, channels), shape (n_windows, n_z)."""
        check_fitted(self, "A_")
        T = self.past_steps_
        up, yp = np.asarray(u_past, float)[:, -T:], np.asarray(y_past, float)[:, -T:]
        w = up.shape[0]
        raw = np.concatenate([up.reshape(w, -1), yp.reshape(w, -1)], axis=1)
        src = np.concatenate([yp.reshape(w, -1), up[:, :T - 1].reshape(w, -1)], axis=1)
        return np.hstack([raw, self.dictionary_(src), np.ones((w, 1))])

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Predictions of a batch of windows by the lifted linear dynamics, shape (n_windows, n_future, p)."""
        check_fitted(self, "A_")
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        return _simulate(self.A_, self.B_, self.C_, self.lift(up, yp), uf)

    def input_map(self, horizon_steps: int) -> np.ndarray:
        """``F`` of ``vec(y) = free response + F vec(u_future)``, shape (N·p, N·m); independent of the past."""
        check_fitted(self, "A_")
        N = int(horizon_steps)
        if N < 1:
            raise InvalidParameterError(f"horizon_steps must be >= 1; got {horizon_steps!r}.")
        blocks, AB = [], self.B_
        for _ in range(N):
            blocks.append(self.C_ @ AB)
            AB = self.A_ @ AB
        return markov_toeplitz(np.stack(blocks))

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]:
        """Zero inputs and the output the lifted model settles to without input (zero when it does not settle)."""
        check_fitted(self, "A_")
        T, m, p = self.past_steps_, self.n_inputs_, self.n_outputs_
        inner = np.eye(self.A_.shape[0] - 1) - self.A_[:-1, :-1]
        y = np.zeros(p)
        if self.spectral_radius_ < 1.0:  # the lifted fixed point z* = A z* + a (its constant column), read out
            y = self.C_[:, :-1] @ np.linalg.solve(inner, self.A_[:-1, -1])
        return np.zeros((T, m)), np.tile(y, (T, 1))

    # -------------------------------------------------------------------------------------------- storage
    def to_state(self) -> dict:
        """Everything needed to rebuild the fitted predictor."""
        check_fitted(self, "A_")
        params = {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.get_params().items()}
        return {"params": params, "A": self.A_, "B": self.B_, "C": self.C_, "dictionary": self.dictionary_.to_state(),
                "selected": [int(self.n_features_), float(self.bandwidth_), float(self.alpha_)],
                "cv_table": {c: self.cv_table_[c].to_numpy(dtype=float) for c in self.cv_table_.columns},
                "names": [list(self.input_names_), list(self.output_names_), list(self.input_units_),
                          list(self.output_units_)], "sample_rate_hz": self.sample_rate_hz_,
                "past_steps": int(self.past_steps_), "selection_notes": list(self.selection_notes_)}

    @classmethod
    def from_state(cls, state: dict) -> "LiftedPredictor":
        """Rebuild a fitted predictor from :meth:`to_state` output."""
        params = {k: (tuple(v) if isinstance(v, list) else v) for k, v in dict(state["params"]).items()}
        obj = cls(**params)
        obj.A_, obj.B_, obj.C_ = (np.asarray(state[k], float) for k in ("A", "B", "C"))
        obj.dictionary_ = Dictionary.from_state(state["dictionary"])
        n, w, a = state["selected"]
        obj.n_features_, obj.bandwidth_, obj.alpha_ = int(n), float(w), float(a)
        table = pd.DataFrame({c: np.asarray(v) for c, v in state["cv_table"].items()})
        obj.cv_table_ = table.assign(selected=table["selected"].astype(bool)) if "selected" in table else table
        ins, outs, iu, ou = state["names"]
        obj.past_steps_, obj.max_horizon_steps_ = int(state["past_steps"]), None
        obj.n_inputs_, obj.n_outputs_ = len(ins), len(outs)
        obj.input_names_, obj.output_names_, obj.input_units_, obj.output_units_ = (tuple(x) for x in
                                                                                   (ins, outs, iu, ou))
        obj.sample_rate_hz_ = float(state["sample_rate_hz"])
        obj.selection_notes_ = tuple(state.get("selection_notes", ()))
        inner = obj.A_[:-1, :-1]
        obj.spectral_radius_ = float(np.max(np.abs(np.linalg.eigvals(inner)), initial=0.0)) if inner.size else 0.0
        obj._mark_fitted()
        return obj


def _validation_windows(dic, valid, T, H):
    """Lifted starts, future inputs and true outputs of the (strided) ``H``-step windows of validation segments."""
    z0, uf, yt = [], [], []
    for u, y, raw, src in valid:
        starts = np.arange(0, len(u) - T - H + 1)
        z0.append(np.hstack([raw[starts], dic(src[starts]), np.ones((starts.size, 1))]))
        idx = starts[:, None] + T + np.arange(H)[None]
        uf.append(u[idx])
        yt.append(y[idx])
    z0, uf, yt = np.concatenate(z0), np.concatenate(uf), np.concatenate(yt)
    if z0.shape[0] > _MAX_CV_WINDOWS:
        pick = np.linspace(0, z0.shape[0] - 1, _MAX_CV_WINDOWS).astype(int)
        z0, uf, yt = z0[pick], uf[pick], yt[pick]
    return z0, uf, yt


def _validation_nmse(A, B, C, z0, uf, yt) -> float:
    """Mean over outputs of the squared prediction error over the outputs' variance, on validation windows."""
    with np.errstate(over="ignore", invalid="ignore"):
        err = _simulate(A, B, C, z0, uf) - yt
        mse = np.mean(err ** 2, axis=(0, 1))
    var = np.var(yt.reshape(-1, yt.shape[2]), axis=0)
    value = float(np.mean(mse / np.where(var > 0, var, 1.0)))
    return value if np.isfinite(value) else np.inf
