"""Online identification: models kept up to date as samples and trials arrive, equal to a batch refit on the same data.

* :class:`OnlineRidgeArx` — ridge ARX of a fixed structure and strength (e.g. chosen by a first batch
  :class:`~stimsteer.sysid.RidgeArx` fit): the normal equations are updated with every new regression row (shifted
  sums, so that centring loses no digits), and the coefficients solved on demand as in the batch fit.
* :class:`OnlineLsqPredictor` — the least-squares Hankel predictor of the direct route (SPC maps ``Kp_``, ``Kf_``):
  the row-space factor of the Hankel matrix is kept as the triangular factor ``R`` of its windows
  (``RᵀR = H Hᵀ``) and updated by a block QR of ``[R; new windows]`` (Golub & Van Loan 2013, Matrix Computations,
  4th ed., Sec. 6.5.3, updating a QR factorisation by a block of rows); the map is solved from the factor as
  the batch fit does (stacked least squares, no normal equations).
* :class:`ScheduledRefit` — any estimator (e.g. the subspace model) refitted on all trials so far, every
  ``every_trials`` new trials.

Each keeps the last samples of the current run, so rows and windows that span the samples of two updates inside
one trial are counted exactly once; a new trial (``new_trial=True``) or a sample with a missing value starts a new
run (no row or window crosses a trial boundary or a gap, as in the batch fits). The batch estimators' own
definitions are followed through their documented settings: the regressors' standardisation and the ridge scale of
:class:`~stimsteer.sysid.RidgeArx` (its Notes), the channel scaling and ridge scale of
:class:`~stimsteer.sysid.datadriven.LsqPredictor` (its Notes); tests compare with batch fits through their fitted
attributes.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from ._base import check_fitted
from ._lapack_nogil import tpqrt_inplace
from .arx_statespace import arx_to_state_space
from .exceptions import InvalidParameterError, NotFittedError, SessionError
from .session import Session

__all__ = ["OnlineRidgeArx", "OnlineLsqPredictor", "ScheduledRefit"]


def _whole(name, v, lowest):
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lowest:
        raise InvalidParameterError(f"{name} must be a whole number >= {lowest}; got {v!r}.")
    return int(v)


def _strength(name, v):
    try:
        a = float(v)
    except (TypeError, ValueError):
        a = np.nan
    if not (np.isfinite(a) and a >= 0):
        raise InvalidParameterError(f"{name} must be a finite number >= 0; got {v!r}.")
    return a


def _factor_update(R, W):
    """The upper triangular factor of ``[R; W]`` (``R`` the factor so far, or None; ``W`` the new windows as rows).

    A square ``R`` is updated by LAPACK's triangular-pentagonal QR (``tpqrt``, through
    :func:`~stimsteer.sysid._lapack_nogil.tpqrt_inplace`), which leaves the zeros below ``R``'s diagonal alone: about
    half the time of a QR of the stacked rows for a trial of a few hundred windows (measured, 154 columns and 387
    windows on one thread: 0.8-1.2 against 2.4 ms, block size 8). Otherwise the stacked rows are factorised.
    Either way ``RᵀR`` gains ``WᵀW`` (Golub & Van Loan 2013, Matrix Computations, 4th ed., section 6.5.4, updating
    a QR factorisation by a block of rows); the factors may differ by the signs of their rows.
    """
    d = W.shape[1]
    if R is not None and R.shape == (d, d) and W.shape[0] > 0:
        return np.triu(tpqrt_inplace(np.array(R, order="F"), np.asfortranarray(W), 0, min(8, d)))
    blocks = W if R is None else np.vstack([R, W])
    return sla.qr(blocks, mode="r", overwrite_a=True, check_finite=False)[0][:d]


def _ridge_rows_folded(R: np.ndarray, n_b: int, c: float) -> np.ndarray:
    """Θ of ``min ||R11 Θᵀ − R12||² + c² ||Θᵀ||²`` from the square upper-triangular ``R`` (Fortran order,
    overwritten): the ridge rows ``[c I 0]`` are folded into ``R`` by the triangular-pentagonal QR that updates the
    factor (``tpqrt`` with an upper-trapezoidal block, ``L = n_b``), which leaves ``R``'s rows below ``n_b`` alone in
    the first ``n_b`` columns; then ``Θᵀ = R̃11⁻¹ R̃12`` (the least-squares solution through the QR factor of the
    stacked problem, Golub & Van Loan 2013, Matrix Computations, 4th ed., sections 5.3 and 6.5.4). The same
    solution as a QR of ``[R11; c I]`` and ``Qᵀ [R12; 0]``, without forming either."""
    B = np.zeros((n_b, R.shape[1]), order="F")
    B[np.arange(n_b), np.arange(n_b)] = c
    R = tpqrt_inplace(R, B, n_b, min(8, R.shape[1]))
    return sla.solve_triangular(R[:n_b, :n_b], R[:n_b, n_b:], check_finite=False).T


class _SessionUpdates:
    """``update_session``: every valid segment of a session's trials taken in as a new run, through ``update``."""

    def update_session(self, session):
        """Take in every valid segment of a session's trials (each a new run)."""
        for a, b in session.segments():
            u, y, _ = session.read(a, b)
            self.update(u, y, new_trial=True)
        return self


class _Runs:
    """The samples of the current run (the last ``keep`` of them) and the channel counts; shared bookkeeping."""

    def __init__(self, keep):
        self.keep, self.m, self.p = keep, None, None
        self.tail = None

    def channels(self, u, y):
        u = np.asarray(u, dtype=np.float64)
        y = np.asarray(y, dtype=np.float64)
        if u.ndim != 2 or y.ndim != 2 or u.shape[0] != y.shape[0]:
            raise SessionError(f"u and y must be 2-D with one row per sample and as many rows; got {u.shape} and "
                               f"{y.shape}.")
        if self.m is None:
            self.m, self.p = u.shape[1], y.shape[1]
        if (u.shape[1], y.shape[1]) != (self.m, self.p):
            raise SessionError(f"the model has {self.m} inputs and {self.p} outputs; got samples with {u.shape[1]} "
                               f"and {y.shape[1]}.")
        return np.hstack([u, y])

    def pieces(self, z, new_trial):
        """The valid runs of ``z``; the kept tail is prepended to a run that starts with ``z`` and continues one."""
        if new_trial:
            self.tail = None
        ok = np.all(np.isfinite(z), axis=1)
        if ok.size == 0:
            return []
        edges = np.flatnonzero(np.diff(np.concatenate(([0], ok.astype(np.int8), [0]))))
        runs = []
        for a, b in zip(edges[::2], edges[1::2]):
            piece = z[a:b]
            if a == 0 and self.tail is not None:
                piece = np.vstack([self.tail, piece])
            runs.append(piece)
        # the next samples continue the last run only when z ended on a valid sample
        self.tail = runs[-1][max(0, runs[-1].shape[0] - self.keep):].copy() if ok[-1] else None
        return runs


class OnlineRidgeArx(_SessionUpdates):
    """Ridge ARX of a fixed structure, updated with every new sample; equal to a batch refit on the same data.

    Parameters
    ----------
    output_lags, input_lags, delay_samples : int
        ``na``, ``nb``, ``d`` as in :class:`~stimsteer.sysid.RidgeArx`.
    alpha : float
        Ridge strength on the standardised regressors (``RidgeArx.alpha_``).
    fit_intercept : bool, default True

    Attributes
    ----------
    coef_, intercept_ : ndarray
        As ``RidgeArx.coef_`` and ``intercept_``, solved from the sums so far (on first use after an update).
    n_rows_ : int
        Regression rows so far.
    n_inputs_, n_outputs_, past_steps_ : int

    Notes
    -----
    With rows ``x_k`` (outputs at lags 1…na, inputs at lags d…d+nb−1) and targets ``y_k``, the sums
    ``Σ (x−x₀)``, ``Σ (y−y₀)``, ``Σ (x−x₀)(x−x₀)ᵀ``, ``Σ (x−x₀)(y−y₀)ᵀ`` about the first row ``(x₀, y₀)`` give the
    centred moments exactly (a shift does not change them) without the cancellation of raw sums; then, as in the
    batch fit, ``s = √(diag C_xx / n)``, ``(C_xx/(n s sᵀ) + α I) Θ = C_xy/(n s)``, ``coef = (Θ/s)ᵀ``.
    An update costs ``O(rows · d²)``, a solve ``O(d³)``: neither grows with the data already seen.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> u = rng.standard_normal((400, 1)); y = np.zeros((400, 1))
    >>> for k in range(1, 400): y[k] = 0.5 * y[k - 1] + 2.0 * u[k - 1]
    >>> arx = OnlineRidgeArx(output_lags=1, input_lags=1, delay_samples=1, alpha=0.0)
    >>> _ = arx.update(u[:200], y[:200]).update(u[200:], y[200:], new_trial=False)
    >>> np.round(arx.coef_, 8).tolist()
    [[0.5, 2.0]]
    """

    def __init__(self, *, output_lags, input_lags, delay_samples, alpha, fit_intercept=True):
        self.output_lags = _whole("output_lags", output_lags, 0)
        self.input_lags = _whole("input_lags", input_lags, 1)
        self.delay_samples = _whole("delay_samples", delay_samples, 0)
        self.alpha = _strength("alpha", alpha)
        if not isinstance(fit_intercept, (bool, np.bool_)):
            raise InvalidParameterError(f"fit_intercept must be True or False; got {fit_intercept!r}.")
        self.fit_intercept = bool(fit_intercept)
        self.past_steps_ = max(self.output_lags, self.delay_samples + self.input_lags - 1)
        self._runs = _Runs(self.past_steps_)
        self.n_rows_, self._sums, self._solved = 0, None, None

    @classmethod
    def from_fitted(cls, arx):
        """An empty online model with the structure and strength of a fitted ``RidgeArx`` (its fitted attributes)."""
        check_fitted(arx, "coef_")
        return cls(output_lags=int(arx.output_lags_), input_lags=int(arx.input_lags_),
                   delay_samples=int(arx.delay_samples_), alpha=float(arx.alpha_),
                   fit_intercept=bool(arx.get_params()["fit_intercept"]))

    def _rows(self, z):
        """Regressors and targets of every sample of a run whose lag window lies in it."""
        m, p, L = self._runs.m, self._runs.p, self.past_steps_
        n = z.shape[0] - L
        if n <= 0:
            return None
        u, y = z[:, :m], z[:, m:]
        cols = [y[L - i:L - i + n] for i in range(1, self.output_lags + 1)]
        cols += [u[L - self.delay_samples - j:L - self.delay_samples - j + n] for j in range(self.input_lags)]
        return np.hstack(cols), y[L:]

    def update(self, u, y, *, new_trial=True):
        """Take new samples in (a whole trial, or the next samples of the current one with ``new_trial=False``).

        Parameters
        ----------
        u : ndarray, shape (n, n_inputs)
        y : ndarray, shape (n, n_outputs)
            A row with a NaN is a missing sample: no row uses it.
        new_trial : bool, default True

        Returns
        -------
        self

        Raises
        ------
        SessionError
            Shapes that do not match each other or the samples seen before.
        """
        for run in self._runs.pieces(self._runs.channels(u, y), new_trial):
            rows = self._rows(run)
            if rows is not None:
                self._accumulate(*rows)
        return self

    def _accumulate(self, X, Y):
        if self._sums is None:
            x0 = X[0].copy() if self.fit_intercept else np.zeros(X.shape[1])
            y0 = Y[0].copy() if self.fit_intercept else np.zeros(Y.shape[1])
            d, p = X.shape[1], Y.shape[1]
            self._sums = [x0, y0, np.zeros(d), np.zeros(p), np.zeros((d, d)), np.zeros((d, p))]
        x0, y0, sx, sy, sxx, sxy = self._sums
        Xc, Yc = X - x0, Y - y0
        sx += Xc.sum(axis=0)
        sy += Yc.sum(axis=0)
        sxx += Xc.T @ Xc
        sxy += Xc.T @ Yc
        self.n_rows_ += X.shape[0]
        self._solved = None

    def _solve(self):
        if self._solved is not None:
            return self._solved
        if self._sums is None:
            raise NotFittedError("the online ridge ARX has no regression rows yet; update it with samples first.")
        x0, y0, sx, sy, sxx, sxy = self._sums
        n = self.n_rows_
        if self.fit_intercept:
            Cxx, Cxy = sxx - np.outer(sx, sx) / n, sxy - np.outer(sx, sy) / n
            mx, my = x0 + sx / n, y0 + sy / n
        else:
            Cxx, Cxy, mx, my = sxx, sxy, np.zeros_like(sx), np.zeros_like(sy)
        s = np.sqrt(np.clip(np.diag(Cxx), 0.0, None) / n)
        s[s == 0] = 1.0
        R = Cxx / (n * np.outer(s, s)) + self.alpha * np.eye(s.size)
        theta = sla.solve(0.5 * (R + R.T), Cxy / (n * s[:, None]), assume_a="sym")
        coef = (theta / s[:, None]).T
        self._solved = (coef, my - coef @ mx)
        return self._solved

    @property
    def coef_(self):
        return self._solve()[0].copy()

    @property
    def intercept_(self):
        return self._solve()[1].copy()

    @property
    def n_inputs_(self):
        return self._runs.m

    @property
    def n_outputs_(self):
        return self._runs.p

    def state_space_model(self, sample_rate_hz=1.0):
        """The shift-register realisation (:func:`~stimsteer.sysid.arx_to_state_space`), about the resting output.

        As for ``RidgeArx.model_``: the model describes ``y − y_rest``, ``y_rest = (I − Σ A_i)⁻¹ c`` (in ``info``).
        """
        coef, c = self._solve()
        p, m, na, nb = self._runs.p, self._runs.m, self.output_lags, self.input_lags
        A = coef[:, :p * na].reshape(p, na, p).transpose(1, 0, 2)
        B = coef[:, p * na:].reshape(p, nb, m).transpose(1, 0, 2)
        rest = np.linalg.lstsq(np.eye(p) - A.sum(axis=0), c, rcond=None)[0]
        model = arx_to_state_space(A, B, self.delay_samples, sample_rate_hz=sample_rate_hz,
                                   info={"source": "OnlineRidgeArx", "output_offset": rest})
        return model.replace(past_steps=max(self.past_steps_, 1))


class OnlineLsqPredictor(_SessionUpdates):
    """The least-squares Hankel predictor (SPC maps), updated by block QR as windows arrive; equal to a batch refit.

    Parameters
    ----------
    past_steps, horizon_steps : int
        ``T`` and ``N`` as in :class:`~stimsteer.sysid.datadriven.LsqPredictor`.
    alpha : float
        Relative ridge strength (``LsqPredictor.alpha_``).

    Attributes
    ----------
    Kp_, Kf_ : ndarray
        As ``LsqPredictor.Kp_`` and ``Kf_`` (no output centring), solved from the factor (on first use after an
        update).
    channel_scale_ : ndarray (n_inputs + n_outputs,)
        Root mean square of each channel over the valid samples so far.
    n_columns_ : int
        Hankel windows so far.

    Notes
    -----
    The factor ``R`` (upper triangular, ``(m+p)(T+N)`` square) of the windows ``w`` in the channels' own units,
    rows ordered ``[u_past; y_past; u_future; y_future]``, satisfies ``RᵀR = Σ w wᵀ``. A new block of windows ``W``
    updates it by the QR factorisation of ``[R; W]`` (cost ``O((k + d) d²)`` for ``k`` windows, independent of
    the data seen). Scaling the channels by their RMS scales the columns of ``R``; the scaled factor ``F = R̃ᵀ``
    then gives the batch fit's ``[F1ᵀ; √(α s) I] Θᵀ = [F2ᵀ; 0]``, ``s = ‖F‖²_F / rows``.
    """

    def __init__(self, *, past_steps, horizon_steps, alpha):
        self.past_steps = _whole("past_steps", past_steps, 1)
        self.horizon_steps = _whole("horizon_steps", horizon_steps, 1)
        self.alpha = _strength("alpha", alpha)
        L = self.past_steps + self.horizon_steps
        self._runs = _Runs(L - 1)
        self._R, self._sq, self._n_samples, self.n_columns_, self._solved = None, None, 0, 0, None

    @classmethod
    def from_fitted(cls, lsq):
        """An empty online predictor with the windows and strength of a fitted ``LsqPredictor``."""
        check_fitted(lsq, "Kp_")
        if np.any(np.asarray(lsq.output_offset_) != 0):
            raise InvalidParameterError("the online predictor keeps no output centring; fit the batch predictor with "
                                        "centre_outputs=False.")
        return cls(past_steps=int(lsq.past_steps_), horizon_steps=int(lsq.max_horizon_steps_),
                   alpha=float(lsq.alpha_))

    def update(self, u, y, *, new_trial=True):
        """Take new samples in (a whole trial, or the next samples of the current one with ``new_trial=False``).

        Parameters
        ----------
        u, y : ndarray
            As for :meth:`OnlineRidgeArx.update`.
        new_trial : bool, default True

        Returns
        -------
        self

        Raises
        ------
        SessionError
            Shapes that do not match each other or the samples seen before.
        """
        z = self._runs.channels(u, y)
        ok = np.all(np.isfinite(z), axis=1)
        if self._sq is None:
            self._sq = np.zeros(z.shape[1])
        self._sq += np.einsum("ij,ij->j", z[ok], z[ok])
        self._n_samples += int(ok.sum())
        for run in self._runs.pieces(z, new_trial):
            W = self._windows(run)
            if W is not None:
                self._R = _factor_update(self._R, W)
                self.n_columns_ += W.shape[0]
                self._solved = None
        return self

    def _windows(self, z):
        m, T, N = self._runs.m, self.past_steps, self.horizon_steps
        L = T + N
        k = z.shape[0] - L + 1
        if k <= 0:
            return None
        u, y = z[:, :m], z[:, m:]
        W = np.empty((k, L * z.shape[1]), order="F")  # column-major: what the factor update reads
        col = 0
        for a, lo, hi in ((u, 0, T), (y, 0, T), (u, T, L), (y, T, L)):  # time-major blocks
            for j in range(lo, hi):
                W[:, col:col + a.shape[1]] = a[j:j + k]
                col += a.shape[1]
        return W

    def _solve(self):
        if self._solved is not None:
            return self._solved
        if self._R is None:
            raise NotFittedError("the online predictor has no Hankel windows yet; update it with samples first.")
        m, p, T, N = self._runs.m, self._runs.p, self.past_steps, self.horizon_steps
        rms = np.sqrt(self._sq / max(self._n_samples, 1))
        rms[~(rms > 0) | ~np.isfinite(rms)] = 1.0
        su, sy = rms[:m], rms[m:]
        s_b = np.concatenate([np.tile(su, T), np.tile(sy, T), np.tile(su, N)])
        s_y = np.tile(sy, N)
        R = np.asfortranarray(self._R / np.concatenate([s_b, s_y])[None, :])  # the factor of the scaled windows
        n_b, rows = s_b.size, R.shape[1]
        s = float(np.sum(R * R) / rows)
        # R is upper triangular: below its first n_b rows, its first n_b columns are zero, and those rows of the
        # least-squares problem hold no unknown (they add the same residual to every Θ)
        if self.alpha > 0 and R.shape == (rows, rows):
            theta = _ridge_rows_folded(R, n_b, np.sqrt(self.alpha * s))
        else:
            lhs = np.vstack([R[:n_b, :n_b], np.sqrt(self.alpha * s) * np.eye(n_b)])
            rhs = np.vstack([R[:n_b, n_b:], np.zeros((n_b, rows - n_b))])
            Q, Rl = sla.qr(lhs, mode="economic", check_finite=False)  # full column rank: the ridge rows (alpha > 0)
            theta = (sla.solve_triangular(Rl, Q.T @ rhs, check_finite=False) if self.alpha > 0 else
                     np.linalg.lstsq(lhs, rhs, rcond=None)[0]).T
        theta = (s_y[:, None] * theta) / s_b[None, :]
        self._solved = (theta[:, :(m + p) * T], theta[:, (m + p) * T:], rms)
        return self._solved

    def hankel_factor(self):
        """The compressed Hankel matrix: ``F`` with ``F Fᵀ = H Hᵀ``, rows ``[u_past; y_past; u_future; y_future]``.

        In the channels' units (what ``HankelPredictor.data_blocks()`` stacks, up to a rotation of the columns:
        DeePC with the l2 or projection regulariser does not see the rotation).

        Returns
        -------
        ndarray, shape ((n_inputs + n_outputs)(past_steps + horizon_steps), r)
        """
        if self._R is None:
            raise NotFittedError("the online predictor has no Hankel windows yet; update it with samples first.")
        return self._R.T.copy()

    @property
    def Kp_(self):
        return self._solve()[0].copy()

    @property
    def Kf_(self):
        return self._solve()[1].copy()

    @property
    def channel_scale_(self):
        return self._solve()[2].copy()


class ScheduledRefit:
    """An estimator refitted on all trials so far every ``every_trials`` new trials (e.g. the subspace model).

    Parameters
    ----------
    estimator : an estimator of :mod:`stimsteer.sysid` (not modified; clones are fitted)
    every_trials : int, default 10
    sample_rate_hz : float
        Of the samples given to :meth:`add_trial`.

    Attributes
    ----------
    estimator_ : the latest fitted clone (None before the first refit)
    n_trials_ : int
        Trials taken in.
    n_refits_ : int
    """

    def __init__(self, estimator, *, every_trials=10, sample_rate_hz):
        self.estimator = estimator
        self.every_trials = _whole("every_trials", every_trials, 1)
        self.sample_rate_hz = float(sample_rate_hz)
        self._u, self._y = [], []
        self.estimator_, self.n_trials_, self.n_refits_ = None, 0, 0

    def session(self) -> Session:
        """All trials so far as one session (one trial each)."""
        if not self._u:
            raise NotFittedError("no trial has been added yet.")
        edges = np.cumsum([0] + [u.shape[0] for u in self._u])
        u, y = np.vstack(self._u), np.vstack(self._y)
        ok = np.all(np.isfinite(u), axis=1) & np.all(np.isfinite(y), axis=1)  # a missing sample is masked
        return Session(u=np.where(ok[:, None], u, 0.0), y=np.where(ok[:, None], y, 0.0), mask=ok,
                       sample_rate_hz=self.sample_rate_hz, trials=np.column_stack([edges[:-1], edges[1:]]))

    def add_trial(self, u, y):
        """Add a trial; refit when the schedule says so. Returns True when a refit happened."""
        u, y = np.array(u, dtype=np.float64, ndmin=2), np.array(y, dtype=np.float64, ndmin=2)
        if u.shape[0] != y.shape[0] or u.shape[0] < 1:
            raise SessionError(f"a trial needs as many input as output samples (>= 1); got {u.shape} and {y.shape}.")
        self._u.append(u)
        self._y.append(y)
        self.n_trials_ += 1
        if self.n_trials_ % self.every_trials:
            return False
        from sklearn.base import clone  # scikit-learn takes about 1.3 s to import: only here
        self.estimator_ = clone(self.estimator).fit(self.session())
        self.n_refits_ += 1
        return True
