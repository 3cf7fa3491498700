"""The regularised (DeePC-style) Hankel predictor (:class:`HankelPredictor`); its Hankel blocks
(:class:`HankelBlocks`) live beside the KKT solves on them (:mod:`.kkt`)."""

from __future__ import annotations

import functools
import warnings

import numpy as np
import scipy.linalg as sla

from ..excitation import rank_tolerance
from .._base import check_fitted
from ..protocols import DataBlocks, PredictionMaps
from ..exceptions import ConditioningWarning, InvalidParameterError, SessionError, SolverError
from .._blas_threads import _one_blas_thread
from .consistency import consistent_choice, plan_gaps, plan_gaps_coordinate
from .l1 import _L1Solver
from .base import _DirectPredictor, _Fold, _check_strengths, _data_scale, _merge, _validation_error, regressor_rows
from ._hankel_folds import errors_by_fold, first_fold_hook, known_first
from ._early_theta import clear_early, taken, theta_task
from .gram import GRAM_CONDITION_LIMIT, release_freed_memory, unregularised_fold_error
from .kkt import (HankelBlocks, c_order_in_place, _coordinate_projector, _is_coordinate_projector, _kkt_map,
                  _projection_closed_form, _kkt_predictor, _projection_g, _projection_map)

__all__ = ["HankelBlocks", "HankelPredictor", "REGULARIZERS"]

REGULARIZERS = ("projection", "l2", "l1")
_DEFAULT_LAMBDAS_G = tuple(float(a) for a in np.logspace(-4, 2, 7))
#: Validation windows per fold for the ℓ1 regulariser (each costs one convex solve).
_L1_VALIDATION_WINDOWS = 16


# ------------------------------------------------------------------------------------------------ Hankel
def _projection_complement(D: np.ndarray, n_columns: int) -> np.ndarray:
    """``I − Π`` with ``Π`` the orthogonal projector onto the row space of ``D`` (numerical rank, see excitation);
    exactly zero where that rank is ``D``'s column count (its rows span every direction of ``g``)."""
    _, sv, Vt = np.linalg.svd(D, full_matrices=False)
    tol = rank_tolerance(sv, (D.shape[0], n_columns))
    V = Vt[sv > tol].T
    if V.shape[1] == D.shape[1]:
        return np.zeros((V.shape[0], V.shape[0]))
    M = -(V @ V.T)
    M[np.diag_indices_from(M)] += 1.0
    return M


def _compact(M: np.ndarray) -> np.ndarray:
    """A loaded regulariser as the fit made it: a coordinate projector ``diag(0, I)`` with its zero pages untouched
    (:func:`~stimsteer.sysid.datadriven.kkt._coordinate_projector`; the dense copy read from the file, 95 MB at past
    100 / horizon 50, is dropped), any other matrix as it is."""
    zeros = int(np.argmax(np.diagonal(M) != 0)) if M.size else 0
    return _coordinate_projector(M.shape[0], zeros) if 0 < zeros < M.shape[0] and \
        _is_coordinate_projector(M, zeros) else M


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
        Weight of the squared slack ``||Yp g − vec(y_past)||²``, > 0, relative to the data: the slack is taken on
        the unit-RMS channels the predictor is fitted on (``channel_scale_``).
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
        Chosen candidate from ``lambdas_g``: the lowest held-out error; candidates tied with it (relative 1e-6,
        as on full-row-rank data, where every strength predicts alike) are ranked by the plan gap, the smallest
        winning (:mod:`stimsteer.sysid.datadriven.consistency`), as ``selection_notes_`` then says.
    selection_notes_ : tuple of str
    channel_scale_ : ndarray, shape (n_inputs + n_outputs,)
        Root mean square of each input then output channel; the blocks hold the rows of the channels divided by
        it, so predictions do not depend on the channels' units.
    lambda_y_ : float
    data_scale_ : float
    cv_table_ : pandas.DataFrame
        As :class:`LsqPredictor`, plus ``plan_gap`` (ℓ2 and projection, several candidates).
    past_steps_, max_horizon_steps_, n_inputs_, n_outputs_, n_columns_, excitation_order_ : int
    cv_scheme_ : str
        ``"trials"`` (folds of whole trials), ``"contiguous blocks (one trial)"`` or ``"none"`` (one candidate).
    cv_folds_ : tuple of int
        Fold of each trial of the training session (-1: no windows, or folds not made of whole trials).
    input_names_, output_names_ : tuple of str
    sample_rate_hz_ : float
    output_offset_ : ndarray, shape (n_outputs,)
        The training mean removed with ``centre_outputs`` (zeros otherwise).
    factor_route_ : str
        ``"gram"``: the data came from streamed lag products as per-fold Grams of the Hankel matrix (factor: their
        Cholesky factor); ``"qr"``: from QR factors of the data, taken when the Gram is too ill-conditioned
        (estimated condition number above ``datadriven.gram.GRAM_CONDITION_LIMIT``) or raw columns are needed (ℓ1).
    gram_condition_ : float
        Estimated 1-norm condition number of the whole Gram ``H Hᵀ`` (NaN when the QR route was chosen without it).

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
    the least-squares one with ``alpha → 0`` (Dörfler, Coulson, Markovsky 2023); on full-row-rank data every
    ``λ_g`` predicts alike and the strength matters only inside a controller (the rule above).

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
    _strength_param = "lambdas_g"
    _fitted_scalars = _DirectPredictor._fitted_scalars + ("regularizer_", "lambda_g_", "lambda_g_relative_",
                                                          "lambda_y_")
    _fitted_arrays = _DirectPredictor._fitted_arrays + ("reg_matrix_",)

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
            raise InvalidParameterError(f"regularizer must be one of {list(REGULARIZERS)}; got {self.regularizer!r}.")
        lam_y = float(self.lambda_y) if np.isscalar(self.lambda_y) else np.nan
        if not np.isfinite(lam_y) or lam_y <= 0:
            raise InvalidParameterError(f"lambda_y must be a finite number > 0; got {self.lambda_y!r}. Try 1e3.")
        if self.solver_options is not None and not isinstance(self.solver_options, dict):
            raise InvalidParameterError(f"solver_options must be a dict or None; got "
                                        f"{type(self.solver_options).__name__}.")
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
        InvalidParameterError
            Bad settings (strengths <= 0, unknown regulariser, non-integer windows).
        SessionError
            Past window + horizon longer than every trial.
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
        clear_early(self)
        early = first_fold_hook(self, session) if compress and lambdas.size > 1 else None
        folds, weights = self._gather(session, lambdas.size, keep_full=not compress, early=early)
        score = self._score_l1 if l1 else self._score_quadratic
        if self.factor_route_ == "gram" and self.regularizer == "projection":  # total: the folds' sum, factored
            score = functools.partial(self._score_projection_gram, total=getattr(folds, "total", None))
            extra = theta_task(self, getattr(folds, "total", None), self._n_b(), GRAM_CONDITION_LIMIT,
                               functools.partial(self._gaps_from_factor, lambdas=lambdas, lam_y=lam_y),
                               self._unscaled)
            score = known_first(errors_by_fold(folds, self._n_b(), weights, lambdas.size, extra), score)
        rel, table = self._select(folds, lambdas, weights, lambda tr, va, w: score(tr, va, w, lambdas, lam_y))
        with self._qr_algebra():
            total = self._total(folds)
            scale = taken(self, "_scale_early")  # computed beside the folds (_gaps_from_factor), from the same factor
            self.data_scale_ = _data_scale(total.factor) if scale is None else scale
            self._l1_cache = self._map_cache = None
            early_map = taken(self, "_map_early")  # (theta, its map in the channels' units), beside the folds
            self.blocks_, self.reg_matrix_, theta = self._blocks(total, compress)
        if theta is not None:  # the projection predictor in closed form, for every strength
            self._map_cache = early_map[1] if early_map and early_map[0] is theta else self._unscaled(theta)
        del early_map
        self.selection_notes_ = ()
        if not l1 and lambdas.size > 1:  # held-out errors tie on full-rank data: plan/predictor consistency decides
            gaps = taken(self, "_gaps_early")  # computed beside the folds
            table["plan_gap"] = gaps if gaps is not None and theta is not None else \
                self._plan_gaps(lambdas * self.data_scale_, lam_y, theta)
            rel, self.selection_notes_ = consistent_choice(table, table["plan_gap"].to_numpy(), lambdas)
        if isinstance(self.reg_matrix_, int):  # made after the plan gaps (memory: one Gram-sized array fewer)
            del theta
            release_freed_memory()
            self.reg_matrix_ = _coordinate_projector(self.blocks_.Up.shape[1], self.reg_matrix_)
        self.regularizer_, self.lambda_y_, self.lambda_g_relative_ = self.regularizer, lam_y, rel
        self.n_columns_ = total.n_columns
        self.lambda_g_ = self._abs_strength(rel, self.data_scale_, total.n_columns, total.n_rows)
        self.cv_table_ = table
        return self

    def _blocks(self, data: _Fold, compress: bool):
        m, p, past, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        H = data.factor if compress else np.concatenate(data.full, axis=1)
        if compress and self.factor_route_ == "gram":  # the row blocks as views (the factor is dropped below)
            H = c_order_in_place(H)
        blocks, r = HankelBlocks.from_matrix(H, m, p, past, N, compress), H.shape[1]
        del H
        data.release()  # memory: the blocks hold the factor's rows
        if self.regularizer == "projection":
            M = theta = None
            theta = taken(self, "_theta_early")  # computed beside the folds
            if theta is not None and self.factor_route_ == "gram":  # (the same numbers as the closed form here)
                M = blocks.Up.shape[0] + blocks.Yp.shape[0] + blocks.Uf.shape[0]
            else:  # a triangular factor (Cholesky; the QR route's merged QR): projector, predictor in closed form
                M, theta = _projection_closed_form(blocks, GRAM_CONDITION_LIMIT, make_projector=False)
            return blocks, (_projection_complement(blocks.D, data.n_columns) if M is None else M), theta
        if self.regularizer == "l2":
            return blocks, np.eye(r), None
        return blocks, None, None

    def _score_quadratic(self, train, val, weights, lambdas, lam_y):
        m, p, past, N = self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_
        blocks = HankelBlocks.from_matrix(train.factor, m, p, past, N, True)
        if self.regularizer == "projection":  # full row rank, triangular factor: one predictor for every strength
            theta = _projection_closed_form(blocks, GRAM_CONDITION_LIMIT, make_projector=False)[1]
            if theta is not None:
                return [_validation_error(theta, val.factor, weights)] * len(lambdas)
        M = _projection_complement(blocks.D, train.n_columns) if self.regularizer == "projection" else None
        scale = _data_scale(train.factor)
        out = []
        # M = 0 (fewer columns than regressor rows, D of full column rank): neither strength enters the minimiser
        alike = M is not None and not M.any()
        for rel in lambdas[:1] if alike else lambdas:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ConditioningWarning)
                try:
                    G = _kkt_predictor(blocks, M, rel * scale, lam_y)
                except np.linalg.LinAlgError:
                    out.append(np.inf)
                    continue
            out.append(_validation_error(G, val.factor, weights))
        return out * len(lambdas) if alike else out

    def _n_b(self) -> int:
        return regressor_rows(self.n_inputs_, self.n_outputs_, self.past_steps_, self.max_horizon_steps_)

    def _score_projection_gram(self, train, val, weights, lambdas, lam_y, total=None):
        """Held-out errors of the projection predictor on the Gram route: with the training factor ``F`` the
        Cholesky factor of a positive definite, well-conditioned Gram, ``D = [L11 0]`` and the predictor is
        ``G21 G11⁻¹`` for every strength (:func:`~stimsteer.sysid.datadriven.kkt._projection_map`): one error,
        from the Grams, for the whole grid. Elsewhere the KKT route of :meth:`_score_quadratic`."""
        n_b = self._n_b()
        err = unregularised_fold_error(train, val, n_b, weights, total)
        if err is None:
            return self._score_quadratic(train, val, weights, lambdas, lam_y)
        return [err] * len(lambdas)

    def _gaps_from_factor(self, theta, F, lambdas, lam_y):
        """:meth:`_plan_gaps` of ``theta`` from the total's factor ``F`` (``F[n_b:, n_b:]``: ``blocks_.Yf[:, n_b:]``)."""
        self._scale_early = _data_scale(F)  # the fit's data_scale_ (the same factor), not computed again
        return self._plan_gaps(lambdas * self._scale_early, lam_y, theta, F[theta.shape[1]:, theta.shape[1]:])

    def _plan_gaps(self, lambdas_abs, lam_y, theta, yf2=None):
        """Plan gaps per strength; ``theta`` the closed-form projection predictor (scaled rows) or None; ``yf2``:
        ``blocks_.Yf[:, n_b:]`` (None) or the same numbers (:meth:`_gaps_from_factor`, before ``blocks_`` is made)."""
        if theta is None:
            return plan_gaps(self.blocks_, None if self.regularizer == "l2" else self.reg_matrix_, lambdas_abs, lam_y)
        m, p, past, n_b = self.n_inputs_, self.n_outputs_, self.past_steps_, theta.shape[1]
        yf2 = self.blocks_.Yf[:, n_b:] if yf2 is None else yf2
        return plan_gaps_coordinate(theta[:, m * past:(m + p) * past], yf2, lambdas_abs, lam_y)

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
    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Predictions of a batch of windows, shapes (n_windows, n_samples, channels).

        Each window's last ``past_steps_`` samples and at most ``max_horizon_steps_`` future inputs are used (a
        shorter horizon uses the first blocks, with the later future inputs set to zero).

        Raises
        ------
        NotFittedError, SessionError
        SolverError
            "l1": the convex solver did not reach an optimal solution.

        Notes
        -----
        For "l2" and "projection" the prediction is linear in the window, ``vec(y_future) = G b``; ``G`` is
        computed from one KKT solve with ``len(b)`` right-hand sides on the first call and kept, so a batch costs
        one matrix product. "l1" solves one convex problem per window. :meth:`solve_g` re-solves the problem for
        one window.
        """
        check_fitted(self, "blocks_")
        if self.regularizer_ != "l1":
            return self._linear_many(self._prediction_map(), u_past, y_past, u_future)
        b, n_future = self._batch_windows(u_past, y_past, u_future)
        s_b, s_y = self._row_scales()
        y = np.stack([s_y * (self.blocks_.Yf @ self._solve(row / s_b)) for row in b]) if b.shape[0] else \
            np.zeros((0, self.blocks_.Yf.shape[0]))
        return y.reshape(b.shape[0], self.max_horizon_steps_, self.n_outputs_)[:, :n_future] + self._offset()

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
        """The (compressed) Hankel blocks in the channels' units, regulariser and strengths, for DeePC.

        The blocks are fitted on unit-RMS channels; here their rows are multiplied back by the channel scales (the
        row space, hence the projection regulariser, is unchanged). The slack weight becomes
        ``lambda_y_ / mean(s_y²)``, which reproduces the fitted problem exactly for one output or outputs of equal
        scale (the DeePC formulation has one slack weight for all outputs).
        """
        check_fitted(self, "blocks_")
        b = self.blocks_
        M = getattr(self, "reg_matrix_", None)
        m, p = self.n_inputs_, self.n_outputs_
        sc = np.asarray(getattr(self, "channel_scale_", np.ones(m + p)), dtype=np.float64)
        su, sy = sc[:m], sc[m:]
        T, N = self.past_steps_, self.max_horizon_steps_
        return DataBlocks(Up=np.tile(su, T)[:, None] * b.Up, Yp=np.tile(sy, T)[:, None] * b.Yp,
                          Uf=np.tile(su, N)[:, None] * b.Uf, Yf=np.tile(sy, N)[:, None] * b.Yf,
                          regularizer=str(self.regularizer_),
                          lambda_g=float(self.lambda_g_), lambda_y=float(self.lambda_y_) / float(np.mean(sy ** 2)),
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
        b, _ = self._batch_windows(*self._window(u_past, y_past, u_future))
        return self._solve(b[0] / self._row_scales()[0])

    @_one_blas_thread
    def _prediction_map(self) -> np.ndarray:
        if getattr(self, "_map_cache", None) is None:
            M = None if self.regularizer_ == "l2" else self.reg_matrix_
            theta = _projection_map(self.blocks_, M) if M is not None else None
            if theta is None:
                theta = _kkt_predictor(self.blocks_, M, self.lambda_g_, self.lambda_y_)
            self._map_cache = self._unscaled(theta)
        return self._map_cache

    def _solve(self, b: np.ndarray) -> np.ndarray:
        if self.regularizer_ == "l1":
            if getattr(self, "_l1_cache", None) is None:
                self._l1_cache = _L1Solver(self.blocks_, self.lambda_y_, self.solver_options)
            return self._l1_cache.solve(b, self.lambda_g_)
        M = None if self.regularizer_ == "l2" else self.reg_matrix_
        g = _projection_g(self.blocks_, M, b[:, None]) if M is not None else None
        if g is None:
            g = _kkt_map(self.blocks_, M, self.lambda_g_, self.lambda_y_, b[:, None])
        return g[:, 0]

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
        obj.reg_matrix_ = (np.eye(r) if obj.regularizer_ == "l2" else None if obj.regularizer_ == "l1" else
                           _compact(np.asarray(fitted["reg_matrix_"], np.float64)))
        obj._l1_cache = obj._map_cache = None
        return obj
