"""Subspace predictive control's least-squares predictor fitted from Hankel matrices (:class:`LsqPredictor`).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from .._base import check_fitted
from ..protocols import PredictionMaps
from .._lapack_nogil import tpqrt_inplace
from .._blas_threads import _one_blas_thread
from ..hankel import _is_lower
from .base import _DirectPredictor, _check_strengths, _data_scale, _merge, regressor_rows
from ._strength_folds import first_fold_hook
from .gram import _total_factor, fitted_ridge_map, release_freed_memory, ridge_grid_errors

__all__ = ["LsqPredictor"]


_DEFAULT_ALPHAS = tuple(float(a) for a in np.logspace(-8, 0, 9))


# ------------------------------------------------------------------------------------------------ LSQ
def _lsq_svd(F: np.ndarray, n_b: int):
    """``(σ, Vᵀ, Uᵀ F2ᵀ)`` of the SVD ``F1ᵀ = U Σ Vᵀ`` (``F = [F1; F2]``), for :func:`_lsq_path` and
    :func:`_lsq_errors`."""
    F1, F2 = F[:n_b], F[n_b:]
    if F.shape[1] > n_b and not np.any(F1[:, n_b:]):
        # a lower-triangular factor (every combined one): F1ᵀ is zero below its first n_b rows, whose part of F2ᵀ
        # only adds a constant to the residual; the SVD is of the square block (at 2,450 regressor rows 3.8 s
        # against 6.5 s on two threads)
        F1, F2 = F1[:, :n_b], F2[:, :n_b]
    U, sig, Vt = sla.svd(F1.T, full_matrices=False, lapack_driver="gesdd", check_finite=False)
    return sig, Vt, U.T @ F2.T


def _filter(sig: np.ndarray, strength: float) -> np.ndarray:
    """The ridge filter ``σ / (σ² + s)``, zero where the stacked matrix's singular value ``√(σ² + s)`` is at or
    below machine precision times the largest (dropped, as LAPACK's ``gelsd`` drops them with ``rcond < 0``)."""
    stacked = np.sqrt(sig ** 2 + strength)
    keep = stacked > np.finfo(float).eps * max(stacked.max(initial=0.0), np.sqrt(strength))
    return np.divide(sig, sig ** 2 + strength, out=np.zeros_like(sig), where=keep)


def _lsq_path(F: np.ndarray, n_b: int, strengths) -> list:
    """``Θ = argmin ||F2 − Θ F1||_F² + s ||Θ||_F²`` (``F = [F1; F2]``) for several strengths ``s`` from one SVD of
    ``F1ᵀ = U Σ Vᵀ``: ``Θᵀ = V diag(σ / (σ² + s)) Uᵀ F2ᵀ`` is the stacked least squares' minimiser (the ridge filter
    factors; Hansen P. C. (1998), Rank-Deficient and Discrete Ill-Posed Problems, SIAM, section 5.1), with the
    accuracy of an SVD of the data (not of its Gram). The QR route's cross-validation took one SVD-based least
    squares per strength and fold (nine per fold; at past 100 / horizon 50 each of 4,900 × 2,450)."""
    sig, Vt, UtB = _lsq_svd(F, n_b)
    return [(Vt.T @ (_filter(sig, s)[:, None] * UtB)).T for s in strengths]


def _lsq_one(F: np.ndarray, n_b: int, strength: float) -> np.ndarray:
    """``_lsq_path(F, n_b, [strength])[0]`` (the final map: one strength) by one QR of the stacked system: with
    ``F1`` the square block of a lower-triangular factor, ``[F1ᵀ F2ᵀ; √s I 0] = Q [R11 R12; 0 R22]`` by LAPACK's
    ``tpqrt`` (``[F1ᵀ F2ᵀ]`` upper trapezoidal, ``√s I`` diagonal) and ``Θᵀ = R11⁻¹ R12``, the stacked least
    squares' minimiser (Golub & Van Loan 2013, section 5.3) with the accuracy of a QR of the data. About
    ``(2/3) n_b³ + 4 n_b² pN`` flops where the SVD route costs about ``9 n_b³`` before its products. Elsewhere
    (another factor, ``s ≤ 0``) the SVD route."""
    F1, F2 = F[:n_b], F[n_b:]
    if not (strength > 0 and F.shape[1] >= n_b and not np.any(F1[:, n_b:]) and _is_lower(F1[:, :n_b])):
        return _lsq_path(F, n_b, [strength])[0]
    N = n_b + F2.shape[0]
    R = np.zeros((N, N), order="F")
    R[:n_b, :n_b], R[:n_b, n_b:] = F1[:, :n_b].T, F2[:, :n_b].T  # F2's other columns: a constant residual
    B = np.zeros((n_b, N), order="F")
    B[np.arange(n_b), np.arange(n_b)] = np.sqrt(strength)
    R = tpqrt_inplace(R, B, n_b, min(N, 64))
    del B
    return sla.solve_triangular(R[:n_b, :n_b], R[:n_b, n_b:], check_finite=False).T


#: Where a strength's held-out error by the expansion of :func:`_lsq_errors` is below this fraction of the sum of
#: the magnitudes it is the difference of, its residual is formed instead: the expansion's rounding error is about
#: machine precision times that sum (times a modest multiple of the dimensions), so at 1e-3 the errors kept are
#: accurate to about 1e-12 relative, and a fold predicted almost exactly (noise-free data) loses nothing.
EXPANSION_GUARD = 1e-3


def _lsq_errors(F: np.ndarray, n_b: int, strengths, F_val: np.ndarray, weights: np.ndarray) -> list:
    """``_validation_error`` of every map of :func:`_lsq_path` on the held-out factor ``F_val``, without the maps.

    With ``Θ F1v = Bᵀ diag(d) X`` (``B = Uᵀ F2ᵀ``, ``X = Vᵀ F1v``, ``d`` the ridge filter of the strength) and the
    weights ``Ω`` on the predicted rows, the error ``||Ω (T − Bᵀ diag(d) X)||²`` (``T = F2v``) expands to::

        ||Ω T||² − 2 dᵀ c + dᵀ ((B Ω² Bᵀ) ∘ (X Xᵀ)) d,   c = diag(X Tᵀ Ω² Bᵀ)

    so the products with the held-out columns are made once per fold (``n_b r_v (pN + n_b)`` multiply-adds, the
    ``n_b × n_b`` ones symmetric) and each strength costs ``O(n_b²)``: before, each strength took a product of
    ``pN × n_b × r_v`` (at past 100 / horizon 50, nine of 1.2e10 flops per fold, issue 14). A strength whose error
    is a small difference of large terms (below :data:`EXPANSION_GUARD` of their magnitudes) has its residual formed
    as before, so no cancellation is let through."""
    sig, Vt, UtB = _lsq_svd(F, n_b)
    weights = np.asarray(weights, dtype=np.float64)
    X, T = Vt @ F_val[:n_b], F_val[n_b:]
    Bw = UtB * weights[None, :]
    Tw = T * weights[:, None]
    cross = np.einsum("ik,ik->i", X @ Tw.T, Bw)
    H = Bw @ Bw.T  # each a symmetric product (syrk): half the multiply-adds of a general one
    H *= X @ X.T
    D = np.column_stack([_filter(sig, s) for s in strengths])
    t2 = float(np.einsum("ij,ij->", Tw, Tw))
    errors = t2 - 2.0 * (cross @ D) + np.einsum("is,is->s", D, H @ D)
    absD = np.abs(D)
    sizes = t2 + 2.0 * (np.abs(cross) @ absD) + np.einsum("is,is->s", absD, np.abs(H, out=H) @ absD)
    del H
    out = []
    for k, s in enumerate(strengths):
        if errors[k] > EXPANSION_GUARD * sizes[k]:
            out.append(float(errors[k]))
            continue
        E = T - (D[:, k, None] * UtB).T @ X  # the residual itself: no expansion that cancels
        E *= weights[:, None]
        out.append(float(np.einsum("ij,ij->", E, E)))
    return out


def _compact_kept_factor(total: "_GramFold | None", n_b: int) -> None:
    """Keep only the first ``n_b`` columns of the total's ``_factor_gram`` (from ``gram.TOTAL_FACTOR_ROWS``
    regressor rows): the factor's ``[Ct; L21]`` with ``G11`` above the diagonal, all the held-out terms read. The
    last columns (``G12`` above, ``L22``: 28 MB at past 100 / horizon 50, issue 14) are not held through the
    cross-validation; the final map assembles ``G12`` again (``gram._ridge_map_from_kept``: the same numbers, ``G``
    being exactly symmetric; one assembly of ``n_b`` rows, 0.09 s of CPU there).

    The factor is the transpose of a C-ordered array, so its first ``n_b`` columns are that array's first ``n_b``
    rows, the front of its memory: the array is cut there in place (``ndarray.resize``: a ``realloc``, which gives
    the tail back without copying; 0.1-0.18 s of one core for the copy it replaces, issue 14), else copied."""
    F = _total_factor(total, n_b)  # None below TOTAL_FACTOR_ROWS
    if F is None or F is not total._factor_gram or F.shape[1] <= n_b:
        return
    G = F.base if F.base is not None and F.base.flags.c_contiguous and F.base.flags.owndata else None
    if G is not None and G.shape == F.shape[::-1] and np.shares_memory(G, F):
        total._factor_gram = None
        del F
        try:
            G.resize((n_b, G.shape[1]))  # refuses (ValueError) where another reference to the array exists
            total._factor_gram = G.T
            return
        except ValueError:
            F = G.T
    total._factor_gram = np.array(F[:, :n_b], order="F")
    del F, G
    release_freed_memory()


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
    channel_scale_ : ndarray, shape (n_inputs + n_outputs,)
        Root mean square of each input then output channel: the fit is made on the channels divided by it (so the
        predictor does not depend on units); ``Kp_`` and ``Kf_`` are given back in the channels' units.
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
    factor_route_ : str
        ``"gram"``: the data came from streamed lag products as per-fold Grams of the Hankel matrix (factor: their
        Cholesky factor); ``"qr"``: from QR factors of the data, taken when the Gram is too ill-conditioned
        (estimated condition number above ``datadriven.gram.GRAM_CONDITION_LIMIT``) or raw columns are needed (ℓ1).
    gram_condition_ : float
        Estimated 1-norm condition number of the whole Gram ``H Hᵀ`` (NaN when the QR route was chosen without it).

    Notes
    -----
    ``Θ = [Kp_ Kf_] = argmin_Θ ||Yf − Θ D||_F² + alpha·s ||Θ||_F²`` over all Hankel windows. On the Gram route
    (``factor_route_ == "gram"``) it is ``G21 (G11 + alpha·s I)⁻¹`` from the Gram ``G`` of ``[D; Yf]``, made from
    streamed lag products of the raw samples (:mod:`stimsteer.sysid.datadriven.gram`), and every strength of a fold
    is scored from one eigendecomposition of the training ``G11`` (on large Grams, one Cholesky factor of
    ``G11 + alpha·s I`` per strength, two strengths side by side on two cores). Where the Gram is ill-conditioned (QR route) it
    is computed from the streamed row-space factor ``[F1; F2]`` of ``[D; Yf]`` as the stacked least-squares problem
    ``[F1ᵀ; √(alpha s) I] Θᵀ = [F2ᵀ; 0]`` (no normal equations). A held-out fold's squared error is
    ``||F2,val − Θ F1,val||_F²`` either way. A shorter horizon in :meth:`predict` uses the first blocks (zero future inputs
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
    _strength_param = "alphas"
    _keeps_total_gram = True  # the final map's Gram is the condition check's (gram.fitted_ridge_map)
    _fitted_arrays = _DirectPredictor._fitted_arrays + ("Kp_", "Kf_")
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
        InvalidParameterError
            Bad settings (strengths <= 0, non-integer windows).
        SessionError
            Past window + horizon longer than every trial.
        ExcitationError
            The input Hankel matrix of depth ``past_steps + horizon_steps`` is rank-deficient beyond tolerance.

        Warns
        -----
        ExcitationWarning
            The input excites less than ``past_steps + horizon_steps + n_states``.
        """
        alphas = _check_strengths("alphas", self.alphas)
        # large folds: every fold's grid by strength as tasks of one pool, the first fold's rows assembled beside
        # the condition check's (_strength_folds)
        folds, weights = self._gather(session, alphas.size, keep_full=False,
                                      early=first_fold_hook(self, session, alphas.size))
        plan = getattr(folds, "first_fold", None)
        m, p, past = self.n_inputs_, self.n_outputs_, self.past_steps_
        n_b = regressor_rows(m, p, past, self.max_horizon_steps_)

        gram_route = self.factor_route_ == "gram"
        total = getattr(folds, "total", None)  # Gram route: the folds' sum, with the condition check's factor
        if gram_route:
            _compact_kept_factor(total, n_b)  # memory: the factor's columns the held-out terms read (issue 14)

        def score(train, val, w):
            if gram_route:  # one eigendecomposition per fold for the whole grid
                errors = None if plan is None else plan.errors(val, alphas, w)
                return errors if errors is not None else ridge_grid_errors(train, val, n_b, alphas, w, total)
            return _lsq_errors(train.factor, n_b, alphas * _data_scale(train.factor), val.factor, w)

        rows = None  # the final map's rows, assembled by the plan where a worker would idle
        try:
            alpha, table = self._select(folds, alphas, weights, score)
        finally:
            if plan is not None:
                plan.stop()
                rows, folds.first_fold, plan = plan.final_rows, None, None
        with self._qr_algebra():
            total = self._total(folds)
            if gram_route:
                theta, scale = fitted_ridge_map(total, n_b, alpha, rows)
            else:
                scale = _data_scale(total.factor)
                theta = _lsq_one(total.factor, n_b, alpha * scale)  # the grid's minimiser, by one QR
        theta = self._unscaled(theta)  # fitted on unit-RMS channels
        self.Kp_ = np.ascontiguousarray(theta[:, : (m + p) * past])
        self.Kf_ = np.ascontiguousarray(theta[:, (m + p) * past:])
        self.alpha_, self.data_scale_, self.ridge_strength_ = alpha, scale, alpha * scale
        self.n_columns_ = total.n_columns
        self.cv_table_ = table
        return self

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Predictions of a batch of windows, shapes (n_windows, n_samples, channels); one matrix product.

        Each window's last ``past_steps_`` samples and at most ``max_horizon_steps_`` future inputs are used
        (a shorter horizon uses the first blocks, with the later future inputs set to zero).

        Raises
        ------
        NotFittedError, SessionError
        """
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
