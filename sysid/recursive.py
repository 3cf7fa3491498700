"""Recursive ridge ARX with a forgetting factor: a model that follows slow changes, and its sequence over trials.

The regression of ridge ARX, ``y_t = Σ_{i=1..na} A_i y_{t−i} + Σ_{j=0..nb−1} B_j u_{t−j} + c``, is solved by
recursive least squares with exponential forgetting ``λ`` (Ljung 1999, System Identification, 2nd ed., ch. 11,
eqs. 11.13–11.15 with the weights ``λ^{N−t}``)::

    k_t = P_{t−1} φ_t / (λ + φ_tᵀ P_{t−1} φ_t)
    θ_t = θ_{t−1} + k_t (y_t − φ_tᵀ θ_{t−1})
    P_t = (P_{t−1} − k_t φ_tᵀ P_{t−1}) / λ

started from ``θ_0 = 0`` and ``P_0 = I/α``. After ``N`` rows this is exactly the minimiser of
``Σ_t λ^{N−t} ‖y_t − θᵀφ_t‖² + λ^N α ‖θ‖²``; with ``λ = 1`` it is the batch ridge solution with strength ``α``
(the intercept penalised like every coefficient). The fit runs the recursion in its information form
(``R_t = λ R_{t−1} + φ_t φ_tᵀ``, ``r_t = λ r_{t−1} + φ_t y_tᵀ``, ``θ_t = R_t⁻¹ r_t``, :func:`_weigh_in`), rows by
blocks and ``θ`` solved where it is kept: the same numbers where the row-by-row form keeps its accuracy, and the
criterion's minimiser where it does not (strong forgetting). Rows are taken in time order over the valid segments,
never across a trial boundary or a masked sample. The model after each trial is kept (``coef_path_``): the sequence
shows how the dynamics drift over the session.

References
----------
Ljung L. (1999), System Identification: Theory for the User, 2nd ed., Prentice Hall, ch. 11.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from ._base import BasePredictor, check_fitted
from .arx_statespace import arx_maps
from .exceptions import InvalidParameterError, SessionError
from .protocols import PredictionMaps

__all__ = ["RecursiveRidgeArx", "arx_rows", "maps_by_probing"]

#: Regression rows weighed in at a time (a product of their ``rows × k`` design; 4,096 rows of 2,301 regressors:
#: 75 MB).
_BLOCK_ROWS = 4096


def arx_rows(u: np.ndarray, y: np.ndarray, na: int, nb: int, intercept: bool = True):
    """Regressors ``φ_t = [y_{t−1}..y_{t−na}, u_t..u_{t−nb+1}, 1]`` and targets ``y_t`` of one segment.

    Returns
    -------
    X : ndarray, shape (n − L, na·p + nb·m [+ 1])
    Y : ndarray, shape (n − L, p)
        With ``L = max(na, nb − 1)`` samples of start-up dropped.
    """
    n = len(u)
    L = max(na, nb - 1)
    cols = [y[L - i:n - i] for i in range(1, na + 1)] + [u[L - j:n - j] for j in range(nb)]
    if intercept:
        cols.append(np.ones((n - L, 1)))
    return np.hstack(cols), y[L:]


def maps_by_probing(predict_many, m, p, L, T, N) -> PredictionMaps:
    """The prediction maps of an affine predictor of window ``L``, from its responses to unit windows and inputs."""
    if T < L or N < 1:
        raise SessionError(f"prediction maps need a past window of at least {L} samples and a horizon of at least 1; "
                           f"got {T} and {N}.")
    c = predict_many(np.zeros((1, L, m)), np.zeros((1, L, p)), np.zeros((1, N, m))).reshape(-1)
    E = np.eye(L * (m + p))
    resp = predict_many(E[:, :L * m].reshape(-1, L, m), E[:, L * m:].reshape(-1, L, p), np.zeros((E.shape[0], N, m)))
    P_last = resp.reshape(E.shape[0], N * p).T - c[:, None]
    P = np.zeros((N * p, T * (m + p)))
    P[:, m * (T - L):m * T] = P_last[:, :L * m]
    P[:, m * T + p * (T - L):] = P_last[:, L * m:]
    Ef = np.eye(N * m).reshape(N * m, N, m)
    F = predict_many(np.zeros((N * m, L, m)), np.zeros((N * m, L, p)), Ef).reshape(N * m, N * p).T - c[:, None]
    return PredictionMaps(P=P, F=np.ascontiguousarray(F), c=c, past_steps=T, horizon_steps=N)


class RecursiveRidgeArx(BasePredictor):
    """Ridge ARX fitted by recursive least squares with a forgetting factor (a model that tracks drift).

    Parameters
    ----------
    output_lags, input_lags : int, default 2
        ``na >= 1`` and ``nb >= 1`` (input lags include the current input: direct feed-through).
    alpha : float, default 1e-3
        Ridge strength ``α > 0`` (``P_0 = I/α``).
    forgetting : float, default 1.0
        ``λ`` in (0, 1]; 1 weighs every row equally (the batch ridge solution), smaller values forget old rows
        with a memory of about ``1/(1 − λ)`` rows.
    fit_intercept : bool, default True

    Attributes
    ----------
    coef_ : ndarray, shape (n_regressors, p)
        ``θ`` after the last row; columns of ``y_t``.
    coef_path_ : ndarray, shape (n_trials_used, n_regressors, p)
        ``θ`` after each trial (the model sequence).
    path_trials_ : ndarray of int
        The trial indices of ``coef_path_``.
    n_rows_ : int
    past_steps_, max_horizon_steps_ (None), n_inputs_, n_outputs_, input_names_, output_names_, input_units_,
    output_units_

    Raises
    ------
    InvalidParameterError
        A forgetting factor outside (0, 1], ``α <= 0``, or lags below 1.
    SessionError
        No segment long enough for one row.
    """

    storage_kind = "recursive_ridge_arx"
    #: Not in the benchmark's default method set (opt in with a MethodSpec): with forgetting 1 it is the batch ridge
    #: ARX solution, a second copy of arx (measured in benchmarks/README.md, bench_accuracy.py bench-set).
    in_default_bench = False

    def __init__(self, *, output_lags=2, input_lags=2, alpha=1e-3, forgetting=1.0, fit_intercept=True):
        self.output_lags = output_lags
        self.input_lags = input_lags
        self.alpha = alpha
        self.forgetting = forgetting
        self.fit_intercept = fit_intercept

    def _check(self):
        for name in ("output_lags", "input_lags"):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1:
                raise InvalidParameterError(f"{name} must be a whole number >= 1; got {v!r}.")
        lam = float(self.forgetting)
        if not 0.0 < lam <= 1.0:
            raise InvalidParameterError(f"forgetting must be in (0, 1] (1 = no forgetting; 0.99 remembers about 100 "
                                        f"rows); got {self.forgetting!r}.")
        if not float(self.alpha) > 0:
            raise InvalidParameterError(f"alpha must be > 0 (it starts the recursion at P0 = I/alpha); got "
                                        f"{self.alpha!r}.")
        return int(self.output_lags), int(self.input_lags), lam

    def fit(self, session):
        """Run the recursion over every valid segment in time order; keep the model after each trial."""
        na, nb, lam = self._check()
        m, p = session.n_inputs, session.n_outputs
        L = max(na, nb - 1)
        k = na * p + nb * m + int(bool(self.fit_intercept))
        R, r = float(self.alpha) * np.eye(k), np.zeros((k, p))
        path, trials, n_rows = [], [], 0
        for t, (a, b) in enumerate(session.trials):
            segs = [(s, e) for s, e in session.segments(min_length=L + 1) if a <= s and e <= b]
            for s, e in segs:
                u, y, _ = session.read(s, e)
                for i in range(L, e - s, _BLOCK_ROWS):  # rows i … of the segment, L samples before each
                    X, Y = arx_rows(u[i - L:i + _BLOCK_ROWS], y[i - L:i + _BLOCK_ROWS], na, nb,
                                    bool(self.fit_intercept))
                    _weigh_in(R, r, X, Y, lam)
                    n_rows += len(X)
            if segs:
                path.append(_solve_information(R, r))
                trials.append(t)
        if not n_rows:
            raise SessionError(f"no valid segment holds more than {L} samples; the recursion needs at least one row. "
                               "Use fewer lags or longer trials.")
        self.coef_, self.coef_path_, self.path_trials_ = path[-1], np.stack(path), np.asarray(trials)
        self.n_rows_ = n_rows
        self.past_steps_, self.max_horizon_steps_ = max(na, nb - 1, 1), None
        self.n_inputs_, self.n_outputs_ = m, p
        self.input_names_, self.output_names_ = tuple(session.input_names), tuple(session.output_names)
        self.input_units_, self.output_units_ = tuple(session.input_units), tuple(session.output_units)
        return self

    def coefficients(self, theta=None):
        """``(A, B, c)`` of a coefficient vector (default ``coef_``): ``A`` (na, p, p), ``B`` (nb, p, m), ``c`` (p,)."""
        check_fitted(self, "coef_")
        th = self.coef_ if theta is None else np.asarray(theta)
        na, nb, m, p = int(self.output_lags), int(self.input_lags), self.n_inputs_, self.n_outputs_
        A = th[:na * p].T.reshape(p, na, p).transpose(1, 0, 2)
        B = th[na * p:na * p + nb * m].T.reshape(p, nb, m).transpose(1, 0, 2)
        c = th[-1] if self.fit_intercept else np.zeros(p)
        return A, B, c

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """Multi-step predictions of a batch of windows, feeding back their own predictions."""
        check_fitted(self, "coef_")
        up, yp, uf = self._check_batch(u_past, y_past, u_future)
        return self._recursion(up, yp, uf)

    def _recursion(self, up, yp, uf):
        A, B, c = self.coefficients()
        L, H = self.past_steps_, uf.shape[1]
        U = np.concatenate([up[:, up.shape[1] - L:], uf], axis=1)
        Y = np.concatenate([yp[:, yp.shape[1] - L:], np.zeros((yp.shape[0], H, self.n_outputs_))], axis=1)
        for h in range(H):
            k = L + h
            acc = np.broadcast_to(c, (Y.shape[0], self.n_outputs_)).copy()
            for i in range(A.shape[0]):
                acc += Y[:, k - 1 - i] @ A[i].T
            for j in range(B.shape[0]):
                acc += U[:, k - j] @ B[j].T
            Y[:, k] = acc
        return Y[:, L:]

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The affine map of :meth:`predict`: the ARX recursion's maps built as it runs (delay 0, the current input
        included; :func:`~stimsteer.sysid.arx_statespace.arx_maps`, as the batch ridge ARX's), ``c`` the
        intercept's response."""
        check_fitted(self, "coef_")
        T, N, L = int(past_steps), int(horizon_steps), self.past_steps_
        if T < L or N < 1:
            raise SessionError(f"prediction maps need a past window of at least {L} samples and a horizon of at least "
                               f"1; got {T} and {N}.")
        A, B, c = self.coefficients()
        P, F, c_map = arx_maps(A, B, 0, T, N, c)
        return PredictionMaps(P=P, F=F, c=c_map, past_steps=T, horizon_steps=N)

    def rest_window(self):
        """Zero inputs and the resting output ``(I − Σ A_i)⁻¹ c`` (zero when that matrix is singular)."""
        check_fitted(self, "coef_")
        A, _, c = self.coefficients()
        try:
            y = np.linalg.solve(np.eye(self.n_outputs_) - A.sum(axis=0), c)
        except np.linalg.LinAlgError:
            y = np.zeros(self.n_outputs_)
        return np.zeros((self.past_steps_, self.n_inputs_)), np.tile(y, (self.past_steps_, 1))

    def to_state(self) -> dict:
        """Everything needed to rebuild the fitted predictor."""
        check_fitted(self, "coef_")
        return {"params": self.get_params(), "coef": self.coef_, "coef_path": self.coef_path_,
                "path_trials": self.path_trials_, "n_rows": int(self.n_rows_),
                "names": [list(self.input_names_), list(self.output_names_), list(self.input_units_),
                          list(self.output_units_)]}

    @classmethod
    def from_state(cls, state: dict) -> "RecursiveRidgeArx":
        """Rebuild a fitted predictor from :meth:`to_state` output."""
        obj = cls(**dict(state["params"]))
        obj.coef_, obj.coef_path_ = np.asarray(state["coef"], float), np.asarray(state["coef_path"], float)
        obj.path_trials_, obj.n_rows_ = np.asarray(state["path_trials"]), int(state["n_rows"])
        ins, outs, iu, ou = state["names"]
        obj.n_inputs_, obj.n_outputs_ = len(ins), len(outs)
        obj.input_names_, obj.output_names_, obj.input_units_, obj.output_units_ = (tuple(x) for x in
                                                                                   (ins, outs, iu, ou))
        obj.past_steps_ = max(int(obj.output_lags), int(obj.input_lags) - 1, 1)
        obj.max_horizon_steps_ = None
        obj._mark_fitted()
        return obj


def _weigh_in(R, r, X, Y, lam):
    """Rows ``X``, ``Y`` (in time order) into the information form of the recursion, in place:
    ``R ← λⁿ R + Σ_j λ^{n−j} φ_j φ_jᵀ``, ``r ← λⁿ r + Σ_j λ^{n−j} φ_j y_jᵀ``.

    Recursive least squares (Ljung 1999, eqs. 11.13–11.15, module docstring) keeps ``P = R⁻¹`` and ``θ = P r``
    up to date row by row, each row a pass over the ``k × k`` matrix ``P`` (at past 100 of a 1 kHz session with 3
    sites and 20 outputs, ``k`` = 2,301 and 47,500 rows: not finished in 400 s). ``R`` and ``r`` are the same
    recursion in its information form, so a block of rows is one product, and ``θ`` is solved where it is kept
    (after each trial): the same numbers up to rounding (tests/reference/test_recursive_reference.py compares
    both with the batch solutions they equal)."""
    n = len(X)
    if n == 0:
        return
    w = np.sqrt(lam ** (n - 1 - np.arange(n))) if lam != 1.0 else None
    Xw, Yw = (X, Y) if w is None else (X * w[:, None], Y * w[:, None])
    if lam != 1.0:
        R *= lam ** n
        r *= lam ** n
    R += Xw.T @ Xw
    r += Xw.T @ Yw


def _solve_information(R, r):
    """``θ = R⁻¹ r``: by Cholesky (``R`` holds ``λ^N α I`` and is positive definite), else, where strong forgetting
    has let that term underflow and the rows leave a direction unexcited, the least-squares solution of least norm
    (the row-by-row recursion's ``P`` grows without bound there)."""
    try:
        return sla.cho_solve(sla.cho_factor(0.5 * (R + R.T)), r)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(R, r, rcond=None)[0]
