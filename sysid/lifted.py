"""The lifted route: a predictor linear in a lifted state of the past window (Korda & Mezić 2018).

The past window is lifted to ``z_t = [r_t; φ(s_t); 1]`` (raw window, a dictionary of nonlinear features of the
past outputs and strictly past inputs, a constant; see :mod:`stimsteer.sysid._lift_features`). The lifted state
evolves linearly, with the current input entering linearly::

    z_t = A z_{t−1} + B u_t,      y_t = C z_t

``C`` reads the newest output out of ``r_t``; the rows of ``A`` and ``B`` that move the raw window along are fixed
shifts, the rows of the newest output and of the features are fitted by ridge regression on every transition
inside a valid segment. The dictionary size, its bandwidth and the ridge strength are chosen by cross-validation
over trials on ``cv_horizon_steps``-step predictions. The regressions are solved from their moments, accumulated
over blocks of transitions (:mod:`stimsteer.sysid._lift_moments`): memory bounded by the Gram of the lifted
regressors, not by transitions × window.

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
from ._lift_features import DICTIONARIES, Dictionary, source_dim, windows
from ._lift_moments import (Candidate, FoldSystem, LiftMoments, by_cholesky, eigen_path, fitted_rows, simulate_rows,
                            solve_blocks, solve_shared, source_columns, stacked_qr_ridge, window_rows)
from .exceptions import InvalidParameterError, SessionError
from .statespace import markov_toeplitz

__all__ = ["LiftedPredictor"]

_MAX_CV_WINDOWS = 200  # validation windows per fold (evenly strided beyond that)
#: The final fit solves its normal equations where the strength bounds their condition number, ``(k + α) / α`` on
#: standardised columns, to this (an error of about 1e-8 relative from rounding); else least squares on the stacked
#: design (the accuracy of the data).
_GRAM_COND_MAX = 1e8


def _trial_segments(session, T: int, with_positions: bool = False):
    """Per trial, the samples ``(u, y)`` of each valid segment long enough for one transition (and, with
    ``with_positions``, per trial their ``(start, stop)`` as a second list)."""
    segments = session.segments(min_length=T + 1)
    where = [[(s, e) for s, e in segments if a <= s and e <= b] for a, b in session.trials]
    samples = [[session.read(s, e)[:2] for s, e in segs] for segs in where]
    return (samples, where) if with_positions else samples


def _transitions(segs, T: int):
    """Stacked regression rows of segments ``(u, y)``: previous raw window and source, current input, output, next
    source (materialised: the final fit's least-squares route only)."""
    parts = []
    for u, y in segs:
        raw, src = windows(u, y, T)
        parts.append((raw[:-1], src[:-1], u[T:], y[T:], src[1:]))
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


def _lifted_matrices(theta, b, T, m, p, D):
    """``A``, ``B``, ``C`` of the lifted dynamics from the fitted rows (coefficients over ``[z_prev; u_t]``)."""
    nr = T * (m + p)
    nz = nr + D + 1
    A, B = np.zeros((nz, nz)), np.zeros((nz, m))
    for i in range(T - 1):
        A[i * m:(i + 1) * m, (i + 1) * m:(i + 2) * m] = np.eye(m)
        A[T * m + i * p:T * m + (i + 1) * p, T * m + (i + 1) * p:T * m + (i + 2) * p] = np.eye(p)
    B[(T - 1) * m:T * m] = np.eye(m)
    rows = np.r_[T * m + (T - 1) * p:T * m + T * p, nr:nr + D]
    A[rows], B[rows] = fitted_rows(theta, b, T, m, p, D)
    A[-1, -1] = 1.0
    C = np.zeros((p, nz))
    C[:, T * m + (T - 1) * p:nr] = np.eye(p)
    return A, B, C


def _fitted_rows_of(A, B, T, m, p):
    """The fitted rows of a lifted ``A`` and ``B`` (newest output, then features)."""
    nr = T * (m + p)
    rows = np.r_[T * m + (T - 1) * p:T * m + T * p, nr:A.shape[0] - 1]
    return A[rows], B[rows]


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
        per_trial, positions = _trial_segments(session, T, with_positions=True)
        counts = [sum(len(u) - T for u, _y in segs) for segs in per_trial]
        if not sum(counts):
            raise SessionError(f"no valid segment holds more than past_steps = {T} samples; the lifted predictor "
                               "needs at least one transition. Use a shorter past window or longer trials.")
        n_reg0 = T * (m + p) + m + 1
        n_folds = min(int(self.n_folds), len(per_trial))
        folds = self._folds(per_trial, n_folds)
        min_train = min((sum(c for i, c in enumerate(counts) if i not in f) for f in folds if len(f) < len(counts)),
                        default=sum(counts))
        combos, dropped = self._candidates(sizes, widths, alphas, min(min_train, sum(counts)), n_reg0)
        grid = [(n, w, a) for (n, w), a in itertools.product(combos, alphas)]
        if len(grid) > 1 and n_folds < 2:
            raise SessionError(f"choosing among {len(grid)} candidates by cross-validation needs at least 2 trials; "
                               f"the session has {len(per_trial)}. Give n_features, one bandwidth and one alpha, "
                               "or record more trials.")
        part_of = np.zeros(len(per_trial), int)
        for k, fold in enumerate(folds):
            part_of[sorted(fold)] = k
        moments = LiftMoments(session, positions, per_trial, part_of, T, m, p)  # one pass: every fold's lag sums
        table = self._cross_validate(moments, folds, combos, alphas, H) if len(grid) > 1 else \
            pd.DataFrame({"n_features": [grid[0][0]], "bandwidth": [grid[0][1]], "alpha": [grid[0][2]],
                          "cv_nmse": [np.nan]})
        best = int(np.nanargmin(table["cv_nmse"].to_numpy())) if table["cv_nmse"].notna().any() else 0
        table["selected"] = np.arange(len(table)) == best
        n, w, a = (table.iloc[best][c] for c in ("n_features", "bandwidth", "alpha"))
        self._fit_final(moments, int(n), float(w), float(a))
        self.cv_table_ = table
        self._describe(session, T)
        self.selection_notes_ = self._notes(table, best, dropped, sizes)
        return self

    def _folds(self, per_trial, n_folds):
        order = np.random.default_rng(self.seed).permutation(len(per_trial))
        return [set(int(i) for i in order[k::n_folds]) for k in range(max(n_folds, 1))]

    def _cross_validate(self, moments, folds, combos, alphas, H):
        """The held-out errors of every dictionary (size, bandwidth) at every strength, fold by fold."""
        scores = np.zeros((len(combos), len(folds), len(alphas)))
        counted = np.zeros((len(combos), len(folds)), bool)
        with progress(len(combos) * len(folds), "cross-validation of the lifted predictor", unit="fit") as bar:
            for k, fold in enumerate(folds):
                if self._score_fold(moments, k, fold, combos, alphas, H, scores[:, k]):
                    counted[:, k] = True
                bar.update(len(combos))
        return pd.DataFrame([{"n_features": n, "bandwidth": w, "alpha": a,
                              "cv_nmse": float(np.mean(scores[j, counted[j], i])) if counted[j].any() else np.nan}
                             for j, (n, w) in enumerate(combos) for i, a in enumerate(alphas)])

    def _score_fold(self, moments, k, fold, combos, alphas, H, scores) -> bool:
        """Fill ``scores[combo, alpha]`` with the validation errors of fold ``k``; False where it cannot be scored
        (no training transition or no validation window)."""
        T, m, p = moments.T, moments.m, moments.p
        sums, trials = moments.shared(k), moments.trials_except(k)
        valid = [seg for i in sorted(fold) for seg in moments.per_trial[i] if len(seg[0]) >= T + H]
        if sums.n == 0 or not valid:
            return False
        dics = [moments.dictionary(self.dictionary, sums, trials, n, w, self.seed) for n, w in combos]
        feats = moments.feature_sums(trials, dics)
        system = FoldSystem(sums, moments.nr, moments.shift_b, moments.shift_y)
        del sums
        edges = np.cumsum([0] + [d.n_features for d in dics])
        cands = [Candidate(system, feats, slice(edges[j], edges[j + 1])) for j in range(len(combos))]
        raw0, src0, uf, yt = _validation_windows(valid, T, H)
        features0, ones = [dic(src0) for dic in dics], np.ones((raw0.shape[0], 1))

        def score(j, i, beta):  # the lifted starts made per score: one candidate's at a time in memory
            theta, b = cands[j].coefficients(beta)
            z0 = np.hstack([raw0, features0[j], ones])
            scores[j, i] = _validation_nmse(*fitted_rows(theta, b, T, m, p, dics[j].n_features), T, m, p, z0, uf, yt)

        missing = []
        for i, a in enumerate(alphas):  # one factor of the raw window's block per strength, for every dictionary
            here = [j for j, c in enumerate(cands) if by_cholesky(a, c.k)]
            L = system.factor(a) if here else None
            betas = solve_shared([cands[j] for j in here], a, L) if L is not None else [None] * len(here)
            missing += [(j, i) for j in range(len(cands)) if j not in here]
            for j, beta in zip(here, betas):
                if beta is None:
                    missing.append((j, i))
                else:
                    score(j, i, beta)
        for j in sorted({j for j, _i in missing}):  # the eigendecomposition route (see _lift_moments)
            strengths = [i for jj, i in missing if jj == j]
            for i, beta in zip(strengths, eigen_path(cands[j], [alphas[i] for i in strengths])):
                score(j, i, beta)
        return True

    def _fit_final(self, moments, n, w, a):
        """The chosen dictionary and strength on every trial: from the moments where the strength bounds the
        condition number of the normal equations to ``_GRAM_COND_MAX``, else by least squares on the stacked
        design, its QR factor updated block by block (the accuracy of the data); unregularised (``α = 0``), the
        least-norm solution of the materialised design."""
        T, m, p = moments.T, moments.m, moments.p
        sums, trials = moments.shared(None), moments.trials_except(None)
        dic = moments.dictionary(self.dictionary, sums, trials, n, w, self.seed)
        k = moments.nr + dic.n_features + m
        beta = cand = None
        if a > 0 and (k + a) / a <= _GRAM_COND_MAX:
            system = FoldSystem(sums, moments.nr, moments.shift_b, moments.shift_y)
            cand = Candidate(system, moments.feature_sums(trials, [dic]), slice(0, dic.n_features))
            L = system.factor(a)
            beta = solve_blocks(cand, a, L) if L is not None else None
        if beta is None and a > 0:
            if cand is None:  # the standardisation (means, scales) from the moments
                cand = Candidate(FoldSystem(sums, moments.nr, moments.shift_b, moments.shift_y),
                                 moments.feature_sums(trials, [dic]), slice(0, dic.n_features))
            beta = stacked_qr_ridge(moments, trials, dic, a, cand.mx, cand.sx, cand.my)
        if beta is not None:
            theta, b = cand.coefficients(beta)
        else:  # unregularised: the least-norm solution of the materialised design (rank deficiency allowed)
            rows = _transitions([seg for segs in moments.per_trial for seg in segs], T)
            X = np.hstack([rows[0], dic(rows[1]), rows[2]])
            Y = np.hstack([rows[3], dic(rows[4])])
            theta, b = _ridge(X, Y, a)
        self.A_, self.B_, self.C_ = _lifted_matrices(theta, b, T, m, p, dic.n_features)
        self.dictionary_ = dic
        self.n_features_, self.bandwidth_, self.alpha_ = dic.n_features, w, a
        self.spectral_radius_ = _spectral_radius(self.A_, T * m)

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
        Ar, Br = _fitted_rows_of(self.A_, self.B_, self.past_steps_, self.n_inputs_, self.n_outputs_)
        return simulate_rows(Ar, Br, self.past_steps_, self.n_inputs_, self.n_outputs_, self.lift(up, yp), uf)

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
                "past_steps": int(self.past_steps_), "selection_notes": list(self.selection_notes_),
                "spectral_radius": float(self.spectral_radius_)}

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
        obj.spectral_radius_ = float(state["spectral_radius"]) if "spectral_radius" in state else \
            _spectral_radius(obj.A_, obj.past_steps_ * obj.n_inputs_)  # files written before it was stored
        obj._mark_fitted()
        return obj


def _spectral_radius(A, n_window_inputs: int) -> float:
    """Of the lifted ``A`` without its constant. The window's input rows only shift the inputs along (nothing else
    enters them), so in the order ``[inputs, rest]`` that ``A`` is block lower triangular with a nilpotent leading
    block: its other eigenvalues are those of the trailing block (outputs and features; a smaller eigenproblem)."""
    inner = A[n_window_inputs:-1, n_window_inputs:-1]
    return float(np.max(np.abs(np.linalg.eigvals(inner)), initial=0.0)) if inner.size else 0.0


def _validation_windows(valid, T, H):
    """Raw windows, feature sources, future inputs and true outputs of the (strided) ``H``-step windows of
    validation segments ``(u, y)``."""
    starts = [(g, t) for g, (u, _y) in enumerate(valid) for t in range(len(u) - T - H + 1)]
    if len(starts) > _MAX_CV_WINDOWS:
        starts = [starts[i] for i in np.linspace(0, len(starts) - 1, _MAX_CV_WINDOWS).astype(int)]
    raw, uf, yt = [], [], []
    for g, t in starts:
        u, y = valid[g]
        raw.append(window_rows(u, y, T, [t])[0])
        uf.append(u[t + T:t + T + H])
        yt.append(y[t + T:t + T + H])
    raw = np.vstack(raw)
    return raw, raw[:, source_columns(T, valid[0][0].shape[1], valid[0][1].shape[1])], np.array(uf), np.array(yt)


def _validation_nmse(Ar, Br, T, m, p, z0, uf, yt) -> float:
    """Mean over outputs of the squared prediction error over the outputs' variance, on validation windows."""
    with np.errstate(over="ignore", invalid="ignore"):
        err = simulate_rows(Ar, Br, T, m, p, z0, uf) - yt
        mse = np.mean(err ** 2, axis=(0, 1))
    var = np.var(yt.reshape(-1, yt.shape[2]), axis=0)
    value = float(np.mean(mse / np.where(var > 0, var, 1.0)))
    return value if np.isfinite(value) else np.inf
