"""Ridge ARX: a multi-input multi-output autoregressive model with exogenous inputs, fitted by streaming normal
equations and ridge strength chosen by cross-validation over whole trials.

The model, for outputs ``y_k`` (p channels) and inputs ``u_k`` (m channels)::

    y_k = c + sum_{i=1..na} A_i y_{k-i} + sum_{j=0..nb-1} B_j u_{k-d-j} + e_k

with ``na = output_lags``, ``nb = input_lags``, ``d = delay_samples`` and ``c`` the intercept (``fit_intercept``).

Why a structured Gram: every block of the regression Gram ``XᵀX`` is a sum of shifted products of the raw
``Z = [y u]`` samples, ``sum_k Z_{k-a} Z_{k-b}ᵀ``. Blocks that share a lag difference ``b - a`` share one product
``sum_t Z_t Z_{t-(b-a)}ᵀ`` and differ only by a few edge samples, so a chunk of ``n`` rows costs ``L + 1`` products
of an ``(n × (p+m))`` matrix (``L`` = longest lag) instead of one product of the ``(n × d)`` design, which is never
built. The edge samples are settled once per piece of rows (at its first and last chunk), not per chunk. Chunks are
read one at a time from a :class:`~stimsteer.sysid.session.Session` or a lazily opened session file into a few
re-used buffers, so memory does not grow with the length of the recording.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from ._base import BasePredictor, check_fitted
from .exceptions import ConditioningWarning, ExcitationError, InvalidParameterError, SessionError
from ._lagged import _Moments, _read_z, _stream_sums
from .protocols import PredictionMaps
from .statespace import StateSpaceModel
from .arx_cv import cv_errors, cv_table
from .arx_regression import _Problem, _check_alphas, _check_int, _check_source, _pieces, final_fit, fit_ahead, \
    own_moments
from .arx_statespace import arx_maps, arx_recursion, arx_to_state_space
from .arx_structure import AUTO, DEFAULT_DELAY_GRID, DEFAULT_LAG_GRID, best_alpha, edge_notes, \
    select_structure, structure_candidates, structure_table

__all__ = ["RidgeArx", "arx_to_state_space", "CONDITION_WARN_LIMIT"]


#: Condition number of the (standardised, regularised) normal equations above which a fit warns. At 1e10 about
#: ten of float64's sixteen significant digits are lost in the solve (common practice, no source).
CONDITION_WARN_LIMIT = 1e10
_DEFAULT_ALPHAS = tuple(float(a) for a in np.logspace(-8, 0, 9))
#: Lagged Grams up to this size are summed fold by fold (as before the compact folds; cheap at this size).
_SMALL_GRAM = 1024


class RidgeArx(BasePredictor):
    """Multi-input multi-output ridge ARX fitted from a recorded session by streaming normal equations.

    Parameters
    ----------
    output_lags : int or "auto", default "auto"
        ``na``, number of past outputs ``y_{k-1} … y_{k-na}`` (0 gives a finite-impulse-response model); "auto"
        chooses it from ``lag_grid`` by cross-validation (see :mod:`stimsteer.sysid.arx_structure`).
    input_lags : int or "auto", default "auto"
        ``nb``, number of inputs ``u_{k-d} … u_{k-d-nb+1}``; at least 1; "auto" chooses it from ``lag_grid``.
    delay_samples : int or "auto", default "auto"
        ``d``, the input delay in samples; 0 allows direct feed-through from ``u_k`` to ``y_k``; "auto" chooses
        it from ``delay_grid``.
    lag_grid : sequence of int, default (1, 2, 3, 4, 6, 8)
        Candidate lag counts for the lags set to "auto".
    delay_grid : sequence of int, default (0, 1, 2, 3)
        Candidate delays when ``delay_samples="auto"``.
    alphas : sequence of float, default ``10**-8 … 10**0`` (9 values)
        Ridge strengths to compare by cross-validation; each >= 0 (see Notes for the scale).
    n_folds : int, default 5
        Cross-validation folds of whole trials (fewer if fewer trials have usable rows).
    chunk_samples : int, default 16384
        Regression rows read and accumulated per chunk; bounds the memory used by the streaming pass.
    fit_intercept : bool, default True
        Fit the constant ``c`` (regressors and targets are centred with the running means).

    Attributes
    ----------
    coef_ : ndarray, shape (n_outputs, n_outputs·na + n_inputs·nb)
        ``[A_1 … A_na, B_0 … B_{nb-1}]``; column order: outputs at lag 1, …, lag na, then inputs at lag d, ….
    intercept_ : ndarray, shape (n_outputs,)
    alpha_ : float
        Ridge strength chosen by cross-validation (the largest alpha among equal best errors).
    cv_table_ : pandas.DataFrame
        One row per alpha: ``alpha``, ``mean_error``, ``std_error``, ``fold_0 … fold_{K-1}``; error = one-step
        validation ``SSE / SST`` averaged over output channels (``1 − R²``). After a structure search on a large
        lagged vector (``(p + m)(L + 1) > 1024``), the chosen structure's table from the search, scored on its rows
        (the grid's longest window: ``L_max − L`` rows fewer per valid run; held-out trials are never fitted); the
        coefficients are then fitted at its best strength ``alpha_`` on all the structure's own rows.
    scale_ : ndarray, shape (n_regressors,)
        Regressor standard deviations (root mean squares without intercept) used to standardise the penalty.
    condition_number_ : float
        Of the standardised normal equations at ``alpha_``.
    past_steps_ : int
        ``max(na, d + nb − 1)``: the past window ``predict`` needs.
    max_horizon_steps_ : None
        Unlimited: predictions recurse on their own outputs.
    model_ : StateSpaceModel
        The shift-register realisation (:func:`arx_to_state_space`) of the linear part; it acts on outputs in
        deviation from ``model_.info["output_offset"]`` (the resting output under zero input, see Notes).
    n_inputs_, n_outputs_, n_rows_, n_folds_ : int
    cv_scheme_ : str
        ``"trials"`` or ``"contiguous blocks (one trial)"``.
    output_lags_, input_lags_, delay_samples_ : int
        The lag structure the fitted coefficients have (the settings at ``fit``, or the chosen ones).
    structure_table_ : pandas.DataFrame
        One row per candidate structure, the selected one first, then the others best first: ``output_lags``, ``input_lags``, ``delay_samples``,
        ``n_coefficients``, ``alpha`` (its best strength), ``mean_error``, ``std_error``, ``selected``. All
        candidates are scored on the rows of the longest structure, so their errors compare like for like; the
        chosen structure is then refitted on all its own rows. One row when nothing is "auto".
    selection_notes_ : tuple of str
        Chosen values on an edge of their grid, with the advice to widen it.
    input_names_, output_names_, input_units_, output_units_ : tuple of str
    sample_rate_hz_ : float

    Notes
    -----
    Solved, with standardised regressors ``x̃ = (x − x̄) / s`` (``x̄ = 0`` without intercept) over the ``n`` rows::

        min_Θ  (1/n) Σ_k ||y_k − ȳ − Θ x̃_k||²  +  α ||Θ||_F²      ⇔    (R + α I) Θᵀ = r,
        R = X̃ᵀX̃ / n (unit diagonal),  r = X̃ᵀ(Y − ȳ) / n,

    i.e. scikit-learn's ``Ridge(alpha = α·n, fit_intercept=False)`` on ``x̃``; ``coef_ = Θ / s``. Rows exist only
    for samples ``k`` whose whole lag window lies inside one valid segment (:meth:`Session.segments`): no row
    crosses a trial boundary or touches a masked sample. Cross-validation forms each fold's training moments by
    subtracting the fold's moments from the total, so it needs no second pass over the data.

    With an intercept, the resting output is ``y_rest = (I − Σ A_i)⁻¹ c``; ``model_`` describes ``y − y_rest``
    driven by ``u`` in absolute units (zero input = no stimulation).

    The streaming pass reads and reduces chunks on worker threads (as many as BLAS would use, each with
    single-threaded BLAS, process-wide for the duration of the pass; a source other than Session or SessionFile is
    read in the calling thread only); the sums are taken in chunk order, so every run gives the same numbers. Chunks are read into ``workers + 2`` re-used
    buffers of ``chunk_samples × (p + m)`` values, which bound the peak memory (sources whose ``read`` takes
    ``out=``, as Session and SessionFile do, are read straight into them). The cross-validation factors the
    strengths of a fold on worker threads the same way, or, for large lagged vectors, runs the folds on them, each
    fold's strengths from one band reduction of its Gram (:mod:`stimsteer.sysid.arx_cv`,
    :mod:`stimsteer.sysid.arx_band`).

    References
    ----------
    Ljung L. (1999), System Identification: Theory for the User, 2nd ed., ch. 4 and 7 (ARX, least squares).
    Hoerl A.E., Kennard R.W. (1970), Ridge regression: biased estimation for nonorthogonal problems,
    Technometrics 12:55–67.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import Session
    >>> rng = np.random.default_rng(0)
    >>> u = rng.standard_normal((400, 1)); y = np.zeros((400, 1))
    >>> for k in range(1, 400): y[k] = 0.5 * y[k - 1] + 2.0 * u[k - 1]
    >>> arx = RidgeArx(output_lags=1, input_lags=1, delay_samples=1, alphas=[0.0]).fit(Session(u=u, y=y, sample_rate_hz=100.0))
    >>> np.round(arx.coef_, 8).tolist()
    [[0.5, 2.0]]
    """

    storage_kind = "ridge_arx"
    supports_streaming = True

    def __init__(self, *, output_lags=AUTO, input_lags=AUTO, delay_samples=AUTO, lag_grid=DEFAULT_LAG_GRID,
                 delay_grid=DEFAULT_DELAY_GRID, alphas=_DEFAULT_ALPHAS, n_folds=5, chunk_samples=16384,
                 fit_intercept=True):
        self.output_lags = output_lags
        self.input_lags = input_lags
        self.delay_samples = delay_samples
        self.lag_grid = lag_grid
        self.delay_grid = delay_grid
        self.alphas = alphas
        self.n_folds = n_folds
        self.chunk_samples = chunk_samples
        self.fit_intercept = fit_intercept

    # -------------------------------------------------------------------------------------------- fit
    def _validated(self, session, structure, n_lags=None) -> _Problem:
        _check_source(session)
        na, nb, d = structure
        _check_int("n_folds", self.n_folds, 2)
        _check_int("chunk_samples", self.chunk_samples, 1)
        _check_alphas(self.alphas)
        if not isinstance(self.fit_intercept, (bool, np.bool_)):
            raise InvalidParameterError(f"fit_intercept must be True or False; got {self.fit_intercept!r}.")
        prob = _Problem(int(session.n_outputs), int(session.n_inputs), na, nb, d, bool(self.fit_intercept), n_lags)
        longest = max((e - s for s, e in session.segments(min_length=1)), default=0)
        if longest <= prob.L:
            raise SessionError(
                f"ridge ARX with output_lags={na}, input_lags={nb}, delay_samples={d} needs valid runs of at "
                f"least {prob.L + 1} samples inside a trial; the longest valid run has {longest}. Use fewer lags "
                "or a shorter delay, or record longer trials with fewer masked samples."
            )
        return prob

    def fit(self, session) -> "RidgeArx":
        """Fit from a :class:`Session` or a lazily opened session file (one streaming pass).

        Parameters
        ----------
        session : Session or SessionFile
            Needs ``read(start, stop)``, ``segments(min_length)``, ``trials``, ``n_inputs``, ``n_outputs`` and
            ``sample_rate_hz``; channel names are taken when present.

        Returns
        -------
        self

        Raises
        ------
        InvalidParameterError
            Bad settings (lags, alphas, fit_intercept).
        SessionError
            Lags longer than every valid run; more coefficients than usable rows.
        ExcitationError
            An input channel never varies over the usable samples.

        Warns
        -----
        ConditioningWarning
            When the normal equations at the chosen alpha have a condition number above ``CONDITION_WARN_LIMIT``.
        """
        candidates, grids = structure_candidates(self)
        alphas = _check_alphas(self.alphas)
        search: dict = {}
        structure, structures = select_structure(self, session, candidates, alphas, search,
                                                 lambda *args: fit_ahead(self, session, *args, small=_SMALL_GRAM))
        prob = self._validated(session, structure)
        kept: dict = {}  # the total Gram the cross-validation assembled, for the final fit (large Grams)
        if prob.size > _SMALL_GRAM and structure in search.get("tables", {}):
            # large Grams: the structure is scored on the search's rows (its table from the search); the final fit
            # takes the structure's own rows (derived from the search's sums where it can: own_moments), its Gram
            # prepared on an idle worker while the last fold was scored when that fold did not change the choice
            table, k, scheme = search["tables"][structure], search["moments"][2], search["moments"][3]
            best = best_alpha(search["tables"].errors(structure), alphas)
            ahead = search.get("ahead")
            if ahead is not None and ahead[0] == structure and ahead[1] is not None:  # prepared on a worker
                (_folds, total, _k, _scheme, shift), prepared = ahead[1]
                kept["final"] = prepared.fit(best)
            else:
                _folds, total, _k, _scheme, shift = own_moments(self, session, prob, search)
            self._check_rows(prob, total.n)
        else:
            folds, total, k, scheme, shift = self._accumulate(session, prob)
            self._check_rows(prob, total.n)
            table = self._cross_validate(prob, folds, total, alphas, k, kept)
            best = float(table.loc[table["mean_error"] == table["mean_error"].min(), "alpha"].max()) \
                if table["mean_error"].notna().any() else float(alphas[0])
        del search
        self._finish(session, prob, total, best, table, k, scheme, shift, kept)
        if structures is None:
            structures = structure_table([(*structure, prob.x_idx.size, table)])
        self.structure_table_ = structures
        self.selection_notes_ = edge_notes(dict(zip(("output_lags", "input_lags", "delay_samples"), structure)),
                                           grids, self.alpha_, alphas)
        return self

    def _accumulate(self, session, prob: _Problem):
        pieces, k, scheme = _pieces(session, prob.L, int(self.n_folds))
        L = prob.L
        first = pieces[0]
        # A provisional offset (the first chunk's mean) keeps the later centring (W − n μ μᵀ) free of cancellation.
        shift = _read_z(session, first[0] - L, min(first[1], first[0] + int(self.chunk_samples)))[0].mean(axis=0) \
            if prob.fit_intercept else np.zeros(prob.c)
        sums, lo, hi = _stream_sums(session, pieces, k, L, int(self.chunk_samples), shift)
        self._check_inputs_vary(session, lo, hi)
        # folds keep their compact lag sums (a Gram each only while it is used); the total is assembled once from
        # the summed lag sums, or (small Grams) as the sum of the folds' Grams, bit for bit the moments of before
        if prob.size <= _SMALL_GRAM:  # each fold's Gram assembled once, kept (the total and the CV both use it)
            folds = [f.moments() for f in sums]
            total = _Moments(prob.size)
            for f in folds:
                total.add(f.n, f.s, f.W)
        else:
            folds = [f.lazy_moments() for f in sums]
            total = sums[0]
            for f in sums[1:]:
                total = total.plus(f)
            total = total.lazy_moments()  # its Gram assembled when needed, in the order the solve wants
        return folds, total, k, scheme, np.tile(shift, L + 1)

    def _check_inputs_vary(self, session, lo, hi):
        names = tuple(getattr(session, "input_names", None) or (f"u{i}" for i in range(len(lo))))
        flat = np.flatnonzero(hi - lo <= 0)
        if flat.size:
            i = int(flat[0])
            raise ExcitationError(
                f"input channel {names[i]!r} never varies over the usable samples (always {lo[i]:g}); its effect "
                "cannot be identified. Drop the channel, or record a session that stimulates it."
            )

    def _check_rows(self, prob: _Problem, n_rows: int):
        n_par = prob.x_idx.size + int(prob.fit_intercept)
        if n_rows < n_par:
            raise SessionError(
                f"ridge ARX has {n_par} coefficients per output (output_lags={prob.na}, input_lags={prob.nb}, "
                f"{prob.p} outputs, {prob.m} inputs) but the session offers only {n_rows} usable rows. Use fewer "
                "lags, or more (or longer) trials."
            )

    def _cross_validate(self, prob, folds, total, alphas, k, kept=None) -> pd.DataFrame:
        return cv_table(cv_errors([prob], folds, total, alphas, kept)[0], alphas, k)

    def _finish(self, session, prob, total, alpha, table, k, scheme, shift, kept=None):
        done = (kept or {}).pop("final", None)  # fitted ahead (the same function of the same moments)
        coef, scale, cond, mu, resid = final_fit(prob, total, alpha, kept) if done is None else done
        if not cond <= CONDITION_WARN_LIMIT:
            warnings.warn(
                f"the ridge ARX normal equations are ill-conditioned (condition number {cond:.3g} at alpha="
                f"{alpha:g}, limit {CONDITION_WARN_LIMIT:.0e}); coefficients may be inaccurate. Use a larger alpha, "
                "fewer lags, or a session with richer stimulation.", ConditioningWarning, stacklevel=4)
        mean = mu + shift
        intercept = mean[prob.y_idx] - coef @ mean[prob.x_idx] if prob.fit_intercept else np.zeros(prob.p)
        self._set_fitted(
            prob, coef=coef, intercept=intercept, alpha=alpha, table=table, scale=scale, cond=cond,
            n_rows=int(total.n), n_folds=k, scheme=scheme, innovation_cov=0.5 * (resid + resid.T) / total.n,
            input_names=tuple(getattr(session, "input_names", None) or (f"u{i}" for i in range(prob.m))),
            output_names=tuple(getattr(session, "output_names", None) or (f"y{i}" for i in range(prob.p))),
            input_units=tuple(getattr(session, "input_units", None) or ("",) * prob.m),
            output_units=tuple(getattr(session, "output_units", None) or ("",) * prob.p),
            sample_rate_hz=float(session.sample_rate_hz),
        )

    def _set_fitted(self, prob, *, coef, intercept, alpha, table, scale, cond, n_rows, n_folds, scheme,
                    innovation_cov, input_names, output_names, input_units, output_units, sample_rate_hz):
        self.n_outputs_, self.n_inputs_ = prob.p, prob.m
        self.output_lags_, self.input_lags_, self.delay_samples_ = int(prob.na), int(prob.nb), int(prob.d)
        self.coef_ = np.ascontiguousarray(coef, dtype=np.float64)
        self.intercept_ = np.asarray(intercept, dtype=np.float64)
        self.alpha_ = float(alpha)
        self.cv_table_ = table
        self.scale_ = np.asarray(scale, dtype=np.float64)
        self.condition_number_ = float(cond)
        self.n_rows_, self.n_folds_, self.cv_scheme_ = int(n_rows), int(n_folds), str(scheme)
        self.input_names_, self.output_names_ = tuple(input_names), tuple(output_names)
        self.input_units_, self.output_units_ = tuple(input_units), tuple(output_units)
        self.sample_rate_hz_ = float(sample_rate_hz)
        self.innovation_cov_ = np.asarray(innovation_cov, dtype=np.float64)
        self.past_steps_ = prob.L
        self.max_horizon_steps_ = None
        self.__dict__.pop("_model", None)  # model_ is realised from these coefficients at its first use

    @property
    def model_(self) -> StateSpaceModel:
        """The shift-register realisation, made at the first use and kept (it is ``(p·na + m·nb)²`` numbers: 42 MB at
        past 100 of 3 sites and 20 outputs, which predictions and prediction maps do not need; the bootstrap's
        members each held one)."""
        model = self.__dict__.get("_model")
        if model is None:
            if "coef_" not in self.__dict__:
                raise AttributeError("model_: this RidgeArx is not fitted")
            model = self.__dict__["_model"] = self._realise()
        return model

    # -------------------------------------------------------------------------------------------- structure
    @property
    def ar_coefs_(self) -> np.ndarray:
        """``A_1 … A_na``, shape (na, n_outputs, n_outputs)."""
        check_fitted(self, "coef_")
        p, na = self.n_outputs_, self.output_lags_
        return self.coef_[:, : p * na].reshape(p, na, p).transpose(1, 0, 2)

    @property
    def input_coefs_(self) -> np.ndarray:
        """``B_0 … B_{nb-1}``, shape (nb, n_outputs, n_inputs)."""
        check_fitted(self, "coef_")
        p, m, na, nb = self.n_outputs_, self.n_inputs_, self.output_lags_, self.input_lags_
        return self.coef_[:, p * na:].reshape(p, nb, m).transpose(1, 0, 2)

    def _resting_output(self) -> tuple[np.ndarray, bool]:
        """``(I − Σ A_i)⁻¹ c`` and whether it is well defined (False for an integrating model)."""
        G = np.eye(self.n_outputs_) - self.ar_coefs_.sum(axis=0)
        if np.linalg.cond(G) > 1e12:
            return np.linalg.lstsq(G, self.intercept_, rcond=None)[0], False
        return np.linalg.solve(G, self.intercept_), True

    def _realise(self) -> StateSpaceModel:
        y_rest, exact = self._resting_output()
        info = {"source": "RidgeArx", "output_offset": y_rest, "output_offset_exact": bool(exact),
                "alpha": self.alpha_}
        return arx_to_state_space(
            self.ar_coefs_, self.input_coefs_, self.delay_samples_, sample_rate_hz=self.sample_rate_hz_,
            innovation_cov=self.innovation_cov_, input_names=self.input_names_, output_names=self.output_names_,
            info=info,
        ).replace(input_units=self.input_units_, output_units=self.output_units_)

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]:
        """A past window at rest: zero input and the resting output, shapes (past_steps_, m) and (past_steps_, p)."""
        check_fitted(self, "coef_")
        y_rest, _ = self._resting_output()
        L = self.past_steps_
        return np.zeros((L, self.n_inputs_)), np.tile(y_rest, (L, 1))

    # -------------------------------------------------------------------------------------------- predict
    def state_space_model(self):
        """The fitted state-space realisation with this estimator's past window (``model_``, offset in ``info``)."""
        check_fitted(self, "model_")
        return self.model_.replace(past_steps=int(self.past_steps_))

    def _recursion(self, up, yp, uf, intercept) -> np.ndarray:
        """The ARX recursion over ``uf`` from past windows of exactly ``past_steps_`` samples, fed its predictions
        (:func:`~stimsteer.sysid.arx_statespace.arx_recursion`)."""
        return arx_recursion(self.ar_coefs_, self.input_coefs_, self.delay_samples_, self.past_steps_, up, yp, uf,
                             intercept)

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Multi-step predictions of a batch of windows, feeding back their own predictions.

        Parameters
        ----------
        u_past : ndarray, shape (n_windows, n_past, n_inputs)
            ``n_past >= past_steps_``; only the last ``past_steps_`` samples are used.
        y_past : ndarray, shape (n_windows, n_past, n_outputs)
        u_future : ndarray, shape (n_windows, n_future, n_inputs)

        Returns
        -------
        y_future : ndarray, shape (n_windows, n_future, n_outputs)

        Raises
        ------
        NotFittedError
            Not fitted, or a setting changed since ``fit``.
        SessionError
            Wrong shapes, non-finite values, or a past window shorter than ``past_steps_``.
        """
        check_fitted(self, "coef_")
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        L = self.past_steps_
        return self._recursion(up[:, up.shape[1] - L:], yp[:, yp.shape[1] - L:], uf, self.intercept_)

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The affine map of :meth:`predict` over a past window of ``past_steps`` and ``horizon_steps`` inputs.

        The recursion is linear in the window plus the intercept's response: the maps are built as it runs
        (:func:`~stimsteer.sysid.arx_statespace.arx_maps`), ``c`` the intercept's response alone. Samples of the
        past window before the last ``past_steps_`` get zero columns.
        """
        check_fitted(self, "coef_")
        L = self.past_steps_
        T, N = int(past_steps), int(horizon_steps)
        if T < L or N < 1:
            raise SessionError(f"the RidgeArx needs a past window of at least past_steps_ = {L} samples and a "
                               f"horizon of at least 1 step; got past {past_steps} and horizon {horizon_steps}.")
        P, F, c = arx_maps(self.ar_coefs_, self.input_coefs_, self.delay_samples_, T, N, self.intercept_)
        return PredictionMaps(P=P, F=F, c=c, past_steps=T, horizon_steps=N)

    # -------------------------------------------------------------------------------------------- storage
    def to_state(self) -> dict:
        """Everything needed to rebuild the fitted estimator (numpy arrays, numbers, strings, nested dicts)."""
        check_fitted(self, "coef_")
        params = self.get_params()
        params["alphas"] = np.asarray(self.alphas, dtype=np.float64)
        params["lag_grid"] = np.asarray(self.lag_grid, dtype=np.int64)
        params["delay_grid"] = np.asarray(self.delay_grid, dtype=np.int64)
        return {
            "params": params,
            "coef": self.coef_, "intercept": self.intercept_, "alpha": self.alpha_, "scale": self.scale_,
            "condition_number": self.condition_number_, "n_rows": self.n_rows_, "n_folds": self.n_folds_,
            "cv_scheme": self.cv_scheme_, "innovation_cov": self.innovation_cov_,
            "n_inputs": self.n_inputs_, "n_outputs": self.n_outputs_,
            "input_names": list(self.input_names_), "output_names": list(self.output_names_),
            "input_units": list(self.input_units_), "output_units": list(self.output_units_),
            "sample_rate_hz": self.sample_rate_hz_,
            "cv_table": {str(c): self.cv_table_[c].to_numpy() for c in self.cv_table_.columns},
            "cv_columns": [str(c) for c in self.cv_table_.columns],
            "structure": np.asarray([self.output_lags_, self.input_lags_, self.delay_samples_], dtype=np.int64),
            "structure_table": {str(c): self.structure_table_[c].to_numpy() for c in self.structure_table_.columns},
            "structure_columns": [str(c) for c in self.structure_table_.columns],
            "selection_notes": "\n".join(self.selection_notes_),
        }

    @classmethod
    def from_state(cls, state: dict) -> "RidgeArx":
        """Rebuild a fitted estimator from :meth:`to_state` output."""
        params = dict(state["params"])
        params["alphas"] = tuple(float(a) for a in np.atleast_1d(params["alphas"]))
        for k in ("lag_grid", "delay_grid"):
            if k in params:
                params[k] = tuple(int(v) for v in np.atleast_1d(params[k]))
        for k in ("output_lags", "input_lags", "delay_samples"):
            params[k] = params[k] if isinstance(params[k], str) else int(params[k])
        est = cls(**params)
        na, nb, d = (int(v) for v in np.atleast_1d(state.get("structure", [params[k] for k in (
            "output_lags", "input_lags", "delay_samples")])))
        prob = _Problem(int(state["n_outputs"]), int(state["n_inputs"]), na, nb, d, bool(params["fit_intercept"]))
        table = pd.DataFrame({c: np.asarray(state["cv_table"][c]) for c in state["cv_columns"]})
        est._set_fitted(
            prob, coef=state["coef"], intercept=state["intercept"], alpha=state["alpha"], table=table,
            scale=state["scale"], cond=state["condition_number"], n_rows=state["n_rows"],
            n_folds=state["n_folds"], scheme=state["cv_scheme"], innovation_cov=state["innovation_cov"],
            input_names=state["input_names"], output_names=state["output_names"],
            input_units=state.get("input_units", ("",) * int(state["n_inputs"])),
            output_units=state.get("output_units", ("",) * int(state["n_outputs"])),
            sample_rate_hz=state["sample_rate_hz"],
        )
        if "structure_table" in state:
            st = state["structure_table"]
            est.structure_table_ = pd.DataFrame({c: np.asarray(st[c]) for c in state["structure_columns"]})
        else:
            est.structure_table_ = structure_table([(na, nb, d, prob.x_idx.size + int(prob.fit_intercept), table)])
        notes = str(state.get("selection_notes", ""))
        est.selection_notes_ = tuple(n for n in notes.split("\n") if n)
        est._mark_fitted()
        return est
