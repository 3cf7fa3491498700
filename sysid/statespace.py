"""Discrete-time linear state-space models in innovation form.

    x[k+1] = A x[k] + B u[k] + K e[k]
    y[k]   = C x[k] + D u[k] + e[k],        e ~ white, covariance ``innovation_cov``

Both fitted forms of the indirect route (ridge ARX, subspace identification) end up here, so prediction, control
and network analysis downstream see one interface.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla

from ._shift import PredictorStep, eigenvalues, unit_window_run
from ._windows import small_gemms, window_batch
from .exceptions import SessionError, UnstableModelError
from .protocols import PredictionMaps

__all__ = ["StateSpaceModel", "kalman_gain", "markov_toeplitz"]


def markov_toeplitz(h, horizon_steps: int | None = None) -> np.ndarray:
    """The lower block-Toeplitz matrix of Markov parameters: the map from future inputs to future outputs.

    ``T[i·p:(i+1)·p, j·m:(j+1)·m] = h[i − j]`` for ``j <= i`` and zero above the block diagonal, so that
    ``vec(y) = T @ vec(u)`` (time-major stacking) is the response from rest to the inputs ``u``.

    Parameters
    ----------
    h : ndarray, shape (n_steps, p, m)
        Markov parameters ``h[0] = D``, ``h[k] = C A^(k−1) B`` (:meth:`StateSpaceModel.impulse_response`).
    horizon_steps : int, optional
        Number of block rows and columns ``N``; default ``n_steps``. Needs ``N <= n_steps``.

    Returns
    -------
    T : ndarray, shape (N·p, N·m)

    Examples
    --------
    >>> markov_toeplitz(np.array([[[1.0]], [[2.0]], [[3.0]]])).tolist()
    [[1.0, 0.0, 0.0], [2.0, 1.0, 0.0], [3.0, 2.0, 1.0]]
    """
    h = np.asarray(h, dtype=np.float64)
    N = h.shape[0] if horizon_steps is None else int(horizon_steps)
    if h.ndim != 3 or not 0 <= N <= h.shape[0]:
        raise SessionError(f"markov_toeplitz needs Markov parameters of shape (n_steps >= {N}, p, m); got {h.shape}.")
    p, m = h.shape[1], h.shape[2]
    lag = np.arange(N)[:, None] - np.arange(N)[None, :]  # block (i, j) holds h[i - j] on and below the diagonal
    T = np.zeros((N, p, N, m))
    below = lag >= 0
    rows, cols = np.nonzero(below)
    T[rows, :, cols, :] = h[lag[below]]  # one gather and one scatter instead of a copy per block
    return T.reshape(N * p, N * m)


def kalman_gain(A, C, Q, R, S=None):
    """Steady-state one-step-predictor Kalman gain and prior error covariance.

    Solves the filtering Riccati equation ``P = A P Aᵀ + Q − (A P Cᵀ + S)(C P Cᵀ + R)⁻¹(A P Cᵀ + S)ᵀ``
    with :func:`scipy.linalg.solve_discrete_are` and returns ``K = (A P Cᵀ + S)(C P Cᵀ + R)⁻¹``.

    Parameters
    ----------
    A : ndarray, shape (n, n)
    C : ndarray, shape (p, n)
    Q : ndarray, shape (n, n)
        Process-noise covariance.
    R : ndarray, shape (p, p)
        Measurement-noise covariance (positive definite).
    S : ndarray, shape (n, p), optional
        Cross covariance of process and measurement noise; default zero.

    Returns
    -------
    K : ndarray, shape (n, p)
    P : ndarray, shape (n, n)
        Prior (one-step-ahead) state error covariance.

    References
    ----------
    Anderson B.D.O., Moore J.B. (1979), Optimal Filtering, ch. 4.

    Examples
    --------
    >>> K, P = kalman_gain(np.eye(1), np.eye(1), np.eye(1), np.eye(1))
    >>> round(float(P[0, 0]), 6)  # the golden ratio for a unit random walk
    1.618034
    """
    A, C, Q, R = (np.atleast_2d(np.asarray(M, dtype=np.float64)) for M in (A, C, Q, R))
    S = np.zeros((A.shape[0], C.shape[0])) if S is None else np.atleast_2d(np.asarray(S, dtype=np.float64))
    P = sla.solve_discrete_are(A.T, C.T, Q, R, s=S)
    P = 0.5 * (P + P.T)
    K = np.linalg.solve((C @ P @ C.T + R).T, (A @ P @ C.T + S).T).T
    return K, P


def _mat(name, M, shape):
    M = np.atleast_2d(np.asarray(M, dtype=np.float64))
    if M.shape != shape:
        raise SessionError(f"{name} must have shape {shape}; got {M.shape}.")
    if not np.all(np.isfinite(M)):
        raise SessionError(f"{name} holds NaN or infinite entries.")
    M = M.copy()
    M.setflags(write=False)
    return M


def _oriented(name, M, n, axis):
    """``B`` (states along axis 0) or ``C`` (states along axis 1) as a 2-D array; a 1-D vector is one channel."""
    M = np.asarray(M, dtype=np.float64)
    if M.ndim == 1:
        M = M[:, None] if axis == 0 else M[None, :]
    if M.ndim != 2 or M.shape[axis] != n:
        want = f"({n}, n_inputs)" if axis == 0 else f"(n_outputs, {n})"
        raise SessionError(f"{name} must have shape {want} for a model with {n} states; got {M.shape}.")
    return M


#: Largest number of entries (float64) of the dense prediction maps ``predict_many`` builds; beyond it (long
#: horizons) it predicts window by window. 4e6 entries are 32 MB.
DENSE_MAP_LIMIT = 4_000_000


@dataclass(frozen=True)
class StateSpaceModel:
    """A linear time-invariant model in innovation form (see the module docstring).

    Parameters
    ----------
    A : ndarray, shape (n_states, n_states)
    B : ndarray, shape (n_states, n_inputs)
    C : ndarray, shape (n_outputs, n_states)
    D : ndarray, shape (n_outputs, n_inputs), optional
        Default zero (no direct feed-through, usual for stimulation → recording).
    K : ndarray, shape (n_states, n_outputs), optional
        Steady-state Kalman (predictor) gain; default zero (output-error model).
    innovation_cov : ndarray, shape (n_outputs, n_outputs), optional
        Covariance of ``e``; default zero (unknown).
    sample_rate_hz : float, default 1.0
    past_steps : int, optional
        Length of the past window :meth:`predict` expects; default ``max(n_states, 1)``.
    input_names, output_names : tuple of str, optional
    info : dict, optional
        Where the model came from (e.g. the output offset of a ridge ARX fit).
    input_units, output_units : tuple of str, optional
        Units of the channels (default empty strings: unknown).

    Notes
    -----
    A state-space model is a predictor with no ``fit`` (the ``Predictor``, ``LinearPredictor`` and
    ``StateSpaceForm`` contracts of :mod:`stimsteer.sysid.protocols`): its fitted-attribute names
    (``past_steps_``, ``n_inputs_``, ``input_units_`` ...) read its fields.

    Matrices are in the units of the data they were fitted on (often standardised units, see ``prep``).
    """

    A: np.ndarray
    B: np.ndarray
    C: np.ndarray
    D: np.ndarray = None
    K: np.ndarray = None
    innovation_cov: np.ndarray = None
    sample_rate_hz: float = 1.0
    past_steps: int = None
    input_names: tuple = None
    output_names: tuple = None
    info: dict = field(default_factory=dict)
    input_units: tuple = None
    output_units: tuple = None

    #: Affine in its window: :meth:`prediction_maps` gives the maps (see :mod:`stimsteer.sysid.protocols`).
    has_linear_maps = True

    def __post_init__(self):
        A = np.atleast_2d(np.asarray(self.A, dtype=np.float64))
        n = A.shape[0]
        if A.shape != (n, n):
            raise SessionError(f"A must be square; got shape {A.shape}.")
        B = _oriented("B", self.B, n, axis=0)
        C = _oriented("C", self.C, n, axis=1)
        m, p = B.shape[1], C.shape[0]
        D = np.zeros((p, m)) if self.D is None else self.D
        K = np.zeros((n, p)) if self.K is None else self.K
        Re = np.zeros((p, p)) if self.innovation_cov is None else self.innovation_cov
        s = object.__setattr__
        for name, M, shape in (("A", A, (n, n)), ("B", B, (n, m)), ("C", C, (p, n)), ("D", D, (p, m)),
                               ("K", K, (n, p)), ("innovation_cov", Re, (p, p))):
            s(self, name, _mat(name, M, shape))
        rate = float(self.sample_rate_hz)
        if not np.isfinite(rate) or rate <= 0:
            raise SessionError(f"sample_rate_hz must be positive and finite; got {self.sample_rate_hz}.")
        s(self, "sample_rate_hz", rate)
        past = max(n, 1) if self.past_steps is None else int(self.past_steps)
        if past < 1:
            raise SessionError(f"past_steps must be at least 1; got {past}.")
        s(self, "past_steps", past)
        s(self, "input_names", tuple(self.input_names) if self.input_names else tuple(f"u{i}" for i in range(m)))
        s(self, "output_names", tuple(self.output_names) if self.output_names else tuple(f"y{i}" for i in range(p)))
        s(self, "info", dict(self.info or {}))
        for name, k in (("input_units", m), ("output_units", p)):
            units = ("",) * k if getattr(self, name) is None else tuple(str(x) for x in getattr(self, name))
            if len(units) != k:
                raise SessionError(f"{name} must give one unit per channel ({k}); got {len(units)}: {list(units)}.")
            s(self, name, units)

    # ------------------------------------------------------------------------------------------------ shape
    n_states = property(lambda self: int(self.A.shape[0]), doc="States (rows of ``A``).")
    n_inputs = property(lambda self: int(self.B.shape[1]), doc="Inputs (columns of ``B``).")
    n_outputs = property(lambda self: int(self.C.shape[0]), doc="Outputs (rows of ``C``).")

    # ------------------------------------------------------------------------------------------------ predictor
    # The Predictor contract's fitted-attribute names, read from the fields (a given model needs no fit).
    past_steps_ = property(lambda self: self.past_steps, doc="Past samples :meth:`predict` uses (``past_steps``).")
    max_horizon_steps_ = property(lambda self: None, doc="None: any horizon.")
    n_inputs_ = property(lambda self: self.n_inputs)
    n_outputs_ = property(lambda self: self.n_outputs)
    input_names_ = property(lambda self: self.input_names)
    output_names_ = property(lambda self: self.output_names)
    input_units_ = property(lambda self: self.input_units)
    output_units_ = property(lambda self: self.output_units)

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]:
        """A past window at rest (zero inputs and outputs: the model describes deviations from rest)."""
        return np.zeros((self.past_steps, self.n_inputs)), np.zeros((self.past_steps, self.n_outputs))

    # ------------------------------------------------------------------------------------------------ stability
    @property
    def poles(self) -> np.ndarray:
        """Eigenvalues of A, sorted by decreasing modulus (computed once: ``A`` is a read-only copy)."""
        if "_poles" not in self.__dict__:
            ev = eigenvalues(self.A) if self.n_states else np.zeros(0, complex)
            object.__setattr__(self, "_poles", ev[np.argsort(-np.abs(ev), kind="stable")])  # ties: eigvals order
        return self._poles.copy()

    @property
    def spectral_radius(self) -> float:
        return float(np.max(np.abs(self.poles))) if self.n_states else 0.0

    @property
    def stability_margin(self) -> float:
        """``1 − spectral radius``: positive for a stable model, the distance of the slowest pole to the unit circle."""
        return 1.0 - self.spectral_radius

    @property
    def is_stable(self) -> bool:
        return self.spectral_radius < 1.0

    def require_stable(self, purpose: str) -> None:
        """Raise :class:`UnstableModelError` when the model is not stable (needed e.g. for Gramians)."""
        if not self.is_stable:
            raise UnstableModelError(
                f"{purpose} needs a stable model, but the spectral radius is {self.spectral_radius:.4f} >= 1. "
                "Refit with a different order or more regularisation, or use a finite horizon."
            )

    # ------------------------------------------------------------------------------------------------ simulation
    def _check_u(self, u, name="u") -> np.ndarray:
        u = np.asarray(u, dtype=np.float64)
        if u.ndim == 1 and self.n_inputs == 1:
            u = u[:, None]
        if u.ndim != 2 or u.shape[1] != self.n_inputs:
            raise SessionError(
                f"{name} must have shape (n_samples, {self.n_inputs}) for this model's {self.n_inputs} input(s); "
                f"got {u.shape}."
            )
        if not np.all(np.isfinite(u)):
            raise SessionError(f"{name} holds NaN or infinite values.")
        return u

    def simulate(self, u, x0=None, return_states: bool = False):
        """Noise-free response to the input ``u`` from state ``x0`` (default rest).

        Parameters
        ----------
        u : ndarray, shape (n_samples, n_inputs)
        x0 : ndarray, shape (n_states,), optional
        return_states : bool, default False
            Also return the states, shape (n_samples + 1, n_states) (the last row is the state after the input).

        Returns
        -------
        y : ndarray, shape (n_samples, n_outputs)
        x : ndarray, shape (n_samples + 1, n_states), only when ``return_states``
        """
        u = self._check_u(u)
        x = np.zeros(self.n_states) if x0 is None else np.asarray(x0, dtype=np.float64).reshape(-1)
        if x.shape != (self.n_states,) or not np.all(np.isfinite(x)):
            raise SessionError(
                f"x0 must be a finite state vector of length {self.n_states}; got shape {np.shape(x0)}."
            )
        X = np.empty((u.shape[0] + 1, self.n_states))
        X[0] = x
        A, B = self.A, self.B
        for k in range(u.shape[0]):
            X[k + 1] = A @ X[k] + B @ u[k]
        y = X[:-1] @ self.C.T + u @ self.D.T
        return (y, X) if return_states else y

    def _innovation_terms(self, u_past, y_past):
        """Free-response basis and driven part of the innovation predictor over a past window; ``Ak^T`` is None
        where the predictor is a nilpotent shift that reached zero (a lag realisation: :mod:`._shift`)."""
        T, n = u_past.shape[0], self.n_states
        step = PredictorStep.of(self)
        Bk = self.B - self.K @ self.D
        Phi = np.empty((T, self.n_outputs, n))  # C Ak^t: response of the predicted output to the initial state
        x = np.zeros(n)
        driven = np.empty((T, self.n_outputs))
        for t in range(T):
            Phi[t] = step.times_power(self.C)
            driven[t] = self.C @ x + self.D @ u_past[t]
            x = step(x) + Bk @ u_past[t] + self.K @ y_past[t]
            step.advance()
        return Phi, driven, step.power(), x

    def estimate_state(self, u_past, y_past) -> np.ndarray:
        """State at the sample just after a measured past window.

        The state at the window's start is fitted by least squares to the innovations of the Kalman predictor
        over the window (minimum-norm where it is not identifiable), then propagated through the predictor.
        Exact for noise-free data from this model when the window is at least the observability index.

        Parameters
        ----------
        u_past : ndarray, shape (n_past, n_inputs)
        y_past : ndarray, shape (n_past, n_outputs)

        Returns
        -------
        x : ndarray, shape (n_states,)
        """
        u_past = self._check_u(u_past, "u_past")
        y_past = np.asarray(y_past, dtype=np.float64)
        if y_past.ndim == 1 and self.n_outputs == 1:
            y_past = y_past[:, None]
        if y_past.shape != (u_past.shape[0], self.n_outputs):
            raise SessionError(
                f"y_past must have shape ({u_past.shape[0]}, {self.n_outputs}), one row per row of u_past and one "
                f"column per output; got {y_past.shape}."
            )
        if not np.all(np.isfinite(y_past)):
            raise SessionError("y_past holds NaN or infinite values; give a window of valid samples.")
        if u_past.shape[0] == 0 or self.n_states == 0:
            return np.zeros(self.n_states)
        Phi, driven, M, x_driven = self._innovation_terms(u_past, y_past)
        if M is None:  # the start of the window no longer matters (M @ x0 would add zeros)
            return x_driven
        lhs = Phi.reshape(-1, self.n_states)
        rhs = (y_past - driven).reshape(-1)
        x0 = np.linalg.lstsq(lhs, rhs, rcond=None)[0]
        return M @ x0 + x_driven

    def state_map(self, n_past):
        """The matrix of :meth:`estimate_state` on windows of ``n_past`` samples, shape (n, n_past·(m + p)).

        The estimate is linear in ``[vec(u_past); vec(y_past)]``: the predictor is run on every unit window at once
        (one column each) and the least-squares fit to the innovations is solved for all columns together, where
        calling :meth:`estimate_state` on each unit window repeated the data-free basis and its factorisation.
        The predictor's run is :func:`._shift.unit_window_run` (4.6 -> 1.4 s for the 2,297-state ridge ARX at past
        100 ms; ``stimsteer plan`` with that model 7.0 -> 2.6-3.5 s, the same plan).
        """
        m, p, n = self.n_inputs, self.n_outputs, self.n_states
        Phi, _, M, _ = self._innovation_terms(np.zeros((n_past, m)), np.zeros((n_past, p)))
        x, resid = unit_window_run(self, n_past)
        if M is None:
            return x
        x0 = np.linalg.lstsq(Phi.reshape(-1, n), resid.reshape(n_past * p, -1), rcond=None)[0]
        return M @ x0 + x

    def predict(self, u_past, y_past, u_future) -> np.ndarray:
        """Predict outputs over ``u_future`` from a measured past window (the predictor protocol).

        Parameters
        ----------
        u_past : ndarray, shape (n_past, n_inputs)
        y_past : ndarray, shape (n_past, n_outputs)
        u_future : ndarray, shape (n_future, n_inputs)

        Returns
        -------
        y_future : ndarray, shape (n_future, n_outputs)
        """
        x = self.estimate_state(u_past, y_past)
        return self.simulate(u_future, x0=x)

    def prediction_maps(self, past_steps: int, horizon_steps: int) -> PredictionMaps:
        """The affine maps of :meth:`predict` for windows of fixed lengths (the ``LinearPredictor`` contract).

        ``vec(y_future) = P @ [vec(u_past); vec(y_past)] + F @ vec(u_future)`` (time-major stacking, ``c = 0``:
        the model describes deviations), exactly what :meth:`predict` computes: the least-squares state estimate
        is linear in the window, so ``P`` is built by applying it to the unit windows, and ``F`` is the
        block-Toeplitz matrix of Markov parameters (:func:`markov_toeplitz`).

        Returns
        -------
        PredictionMaps
            ``P`` (horizon_steps·p, past_steps·(m + p)), ``F`` (horizon_steps·p, horizon_steps·m), ``c`` zeros.
        """
        n_past, n_future = int(past_steps), int(horizon_steps)
        m, p, n = self.n_inputs, self.n_outputs, self.n_states
        obs = np.empty((n_future, p, n))
        M = np.eye(n)
        for k in range(n_future):
            obs[k] = self.C @ M
            M = self.A @ M
        obs = obs.reshape(-1, n)
        X = self.state_map(n_past) if n and n_past else np.zeros((n, n_past * (m + p)))
        F = markov_toeplitz(self.impulse_response(max(n_future, 1)), n_future)
        return PredictionMaps(P=obs @ X, F=F, c=np.zeros(n_future * p), past_steps=n_past, horizon_steps=n_future)

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """:meth:`predict` for a batch of windows, shapes (n_windows, n_samples, channels).

        Short horizons go through :meth:`prediction_maps` (one matrix product after building them); when the maps
        would exceed :data:`DENSE_MAP_LIMIT` entries (the future map grows with the square of the horizon, e.g. a
        free run over a whole trial) the windows are simulated together instead (:meth:`_simulate_many`).
        """
        m, p = self.n_inputs, self.n_outputs
        up, yp, uf = window_batch(u_past, y_past, u_future, n_inputs=m, n_outputs=p)
        W, n_past, H = up.shape[0], up.shape[1], uf.shape[1]
        past = np.concatenate([up.reshape(W, -1), yp.reshape(W, -1)], axis=1)
        if H * p * (H * m + n_past * (m + p)) > DENSE_MAP_LIMIT:
            return self._simulate_many(past, uf)
        maps = self._cached_maps(n_past, H)
        y = small_gemms(past, maps.P.T) + small_gemms(uf.reshape(W, -1), maps.F.T)  # one BLAS thread each
        return y.reshape(W, uf.shape[1], self.n_outputs)

    def _simulate_many(self, past, uf) -> np.ndarray:
        """:meth:`predict` of a batch of windows over long horizons (``past`` the stacked past windows, one row
        each): every state estimated by one product with the :meth:`state_map` (kept per window length), then all
        windows simulated together, one product of the batch's states per step."""
        (W, H, _), n, n_past = uf.shape, self.n_states, past.shape[1] // (self.n_inputs + self.n_outputs)
        x = past @ self._cached_maps(n_past, None).T if n and n_past else np.zeros((W, n))
        drive, states, A_T = uf @ self.B.T, np.empty((W, H, n)), self.A.T
        for k in range(H):
            states[:, k] = x
            x = x @ A_T + drive[:, k]
        return states @ self.C.T + uf @ self.D.T

    def _cached_maps(self, n_past: int, horizon_steps: int | None):
        """:meth:`prediction_maps` for :meth:`predict_many`, kept per window shape: scoring calls it batch after
        batch with the same shapes (a state map and a Toeplitz build each time); ``horizon_steps`` None: the
        :meth:`state_map` alone. Keyed by the matrices' bytes as well, so a model whose arrays were changed in place
        is not answered from stale maps; a few shapes kept."""
        key = (int(n_past), None if horizon_steps is None else int(horizon_steps), b"".join(
            np.ascontiguousarray(M).tobytes() for M in (self.A, self.B, self.C, self.D, self.K)))
        cache = self.__dict__.get("_maps_cache")
        if cache is None:
            cache = {}
            object.__setattr__(self, "_maps_cache", cache)  # not a field: replace() and == ignore it
        maps = cache.get(key)
        if maps is None:
            if len(cache) >= 4:
                cache.clear()
            maps = cache[key] = self.prediction_maps(n_past, horizon_steps) if horizon_steps is not None else \
                self.state_map(n_past)
        return maps

    def impulse_response(self, n_steps: int) -> np.ndarray:
        """Markov parameters ``h[0] = D, h[k] = C A^(k−1) B``, shape (n_steps, n_outputs, n_inputs)."""
        n_steps = int(n_steps)
        if n_steps < 1:
            raise SessionError(f"n_steps must be at least 1; got {n_steps}.")
        h = np.empty((n_steps, self.n_outputs, self.n_inputs))
        h[0] = self.D
        # (A^k B)ᵀ as rows times a contiguous Aᵀ: half the time of A @ (A^k B) at 922 states and 3 inputs (OpenBLAS
        # packs A for every thin product; measured 557 -> 315 µs a step)
        AT, CT, BkT = np.ascontiguousarray(self.A.T), np.ascontiguousarray(self.C.T), self.B.T.copy()
        for k in range(1, n_steps):
            h[k] = (BkT @ CT).T
            BkT = BkT @ AT
        return h

    def state_space_model(self) -> "StateSpaceModel":
        """This model (the :class:`~stimsteer.sysid.protocols.StateSpaceForm` capability)."""
        return self

    def with_noise(self, Q, R, S=None) -> "StateSpaceModel":
        """A copy whose Kalman gain and innovation covariance come from process/measurement covariances."""
        K, P = kalman_gain(self.A, self.C, Q, R, S)
        Re = self.C @ P @ self.C.T + np.atleast_2d(R)
        return self.replace(K=K, innovation_cov=0.5 * (Re + Re.T))

    def replace(self, **changes) -> "StateSpaceModel":
        import dataclasses

        return dataclasses.replace(self, **changes)

    def __repr__(self) -> str:
        return (
            f"StateSpaceModel(n_states={self.n_states}, n_inputs={self.n_inputs}, n_outputs={self.n_outputs}, "
            f"spectral_radius={self.spectral_radius:.4f}, sample_rate_hz={self.sample_rate_hz:g})"
        )
