"""Simulated plants: stimulated networks that stand in for tissue in the demo data, the tests and closed loops.

Every plant here has the plant interface that the closed loop drives (see ``notes/CONTRACTS.md``):

- attributes ``n_inputs, n_outputs, sample_rate_hz, input_names, output_names``;
- ``reset(seed=None, x0=None)``; ``step(u_k) -> y_k`` returns the measured output at the current sample and then
  advances the state; ``simulate(u, seed=None, x0=None) -> y`` runs a whole input.

Both plants share one recording model. With node state ``x_k`` (n,), stimulation ``u_k`` (m,) in µA and recorded
channels ``y_k`` (p,)::

    y_k     = h(x_k, u_k) + v_k + d_k + G s_k             (measured output)
    x_{k+1} = f(x_k, u_k) + w_k                            (node dynamics)

with process noise ``w_k ~ N(0, diag(process_noise_std²))``, measurement noise ``v_k ~ N(0,
diag(measurement_noise_std²))``, a slow drift ``d_k`` (a sinusoid of period ``drift_period_s`` with a seeded phase
per channel plus a seeded random walk) and a stimulation artifact ``G s_k``: ``s_k`` (m,) jumps by the stimulation
amplitude at every onset (a sample where an input turns on from zero) and decays by ``exp(-1 / (artifact_decay_s
· sample_rate_hz))`` per sample, so a decaying transient shows in the recorded channels from the onset sample on.

:class:`LinearNetworkPlant` has ``f = A x + B u`` and ``h = C x + D u``; :class:`SaturatingRateNetworkPlant` has
``f = (1 − leak) x + leak · tanh(W x + B u + bias)`` and the same linear read-out. Each noise source draws from its
own stream (spawned from the seed), so switching one source off leaves the others' realisations unchanged, and
``step`` and ``simulate`` consume the streams identically.
"""

from __future__ import annotations

import numbers
from pathlib import Path

import h5py
import numpy as np

from ..sysid._files import atomic_path
from ..sysid.exceptions import FileFormatError, SessionError, StimsteerError, UnstableModelError
from ..sysid.session import Session
from ..sysid.statespace import StateSpaceModel, kalman_gain

__all__ = [
    "random_network",
    "LinearNetworkPlant",
    "SaturatingRateNetworkPlant",
    "record_session",
    "save_plant",
    "load_plant",
    "PLANT_FILE_VERSION",
]

PLANT_FILE_VERSION = 1
_FILE_TAG = "stimsteer-plant"
_N_STREAMS = 4  # process noise, measurement noise, drift random walk, drift phases
_CHUNK = 256  # rows of noise drawn at once; step and simulate consume them row by row


# ------------------------------------------------------------------------------------------------ validation
def _matrix(name: str, M, shape: tuple | None = None) -> np.ndarray:
    arr = np.asarray(M, dtype=np.float64)
    if arr.ndim != 2:
        raise SessionError(f"{name} must be a 2-D matrix; got an array of shape {arr.shape}. Reshape it.")
    if shape is not None and arr.shape != shape:
        raise SessionError(
            f"{name} must have shape {shape} to match the other matrices; got {arr.shape}. Check its orientation "
            "(rows = nodes for A, W and B; rows = recorded channels for C and D)."
        )
    if not np.all(np.isfinite(arr)):
        raise SessionError(f"{name} holds NaN or infinite entries; give finite numbers.")
    arr = arr.copy()
    arr.setflags(write=False)
    return arr


def _input_output_matrices(n: int, B, C, D):
    """Validate B (n, m), C (p, n) and D (p, m, default zero) against n nodes."""
    B = _matrix("B", B)
    if B.shape[0] != n:
        raise SessionError(
            f"B must have one row per node, shape ({n}, n_inputs); got {B.shape}. Transpose it if it is (m, n)."
        )
    C = _matrix("C", C)
    if C.shape[1] != n:
        raise SessionError(
            f"C must have one column per node, shape (n_outputs, {n}); got {C.shape}. Transpose it if it is (n, p)."
        )
    D = _matrix("D", np.zeros((C.shape[0], B.shape[1])) if D is None else D, (C.shape[0], B.shape[1]))
    return B, C, D


def _nonneg(name: str, value, n: int) -> np.ndarray:
    arr = np.asarray(value, dtype=np.float64)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        raise SessionError(f"{name} must be a number or one value per channel, shape ({n},); got shape {arr.shape}.")
    if not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise SessionError(f"{name} must be finite and non-negative (a standard deviation or amplitude); got {arr}.")
    arr = arr.copy()
    arr.setflags(write=False)
    return arr


def _positive(name: str, value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise SessionError(f"{name} must be a positive number; got {value!r}.") from None
    if not np.isfinite(v) or v <= 0:
        raise SessionError(f"{name} must be positive and finite; got {v}.")
    return v


def _names(kind: str, names, n: int, prefix: str) -> tuple:
    if names is None:
        return tuple(f"{prefix}{i}" for i in range(n))
    names = tuple(str(s) for s in names)
    if len(names) != n or len(set(names)) != n or any(not s.strip() for s in names):
        raise SessionError(f"{kind} must be {n} unique non-empty names, one per channel; got {list(names)}.")
    return names


def _seed_int(seed) -> int:
    if isinstance(seed, numbers.Integral) and not isinstance(seed, bool) and int(seed) >= 0:
        return int(seed)
    raise SessionError(f"seed must be a non-negative integer; got {seed!r}.")


def _spectral_radius(A: np.ndarray) -> float:
    return float(np.max(np.abs(np.linalg.eigvals(A)))) if A.size else 0.0


# ------------------------------------------------------------------------------------------------ network
def random_network(n_nodes: int, *, density: float, seed, scale: float = 1.0, self_weight=0.0,
                   symmetric: bool = False, signed: bool = True, require_stable: bool = True) -> np.ndarray:
    """A sparse random coupling matrix made stable by the normalisation of Gu et al. (2015).

    Parameters
    ----------
    n_nodes : int
        Number of nodes n (at least 1).
    density : float
        Probability in (0, 1] that each off-diagonal edge exists (Erdős–Rényi).
    seed : int or numpy.random.Generator
        Source of the random edges and weights.
    scale : float, default 1.0
        Positive factor applied to the normalised coupling.
    self_weight : float or ndarray (n_nodes,), default 0.0
        Weight added on the diagonal: each node's persistence of its own activity (one value for all nodes, or
        one per node for nodes with different time constants).
    symmetric : bool, default False
        Undirected network: edges and weights mirrored across the diagonal.
    signed : bool, default True
        Weights are standard normal; when False, their absolute values (excitatory-only coupling).
    require_stable : bool, default True
        Raise when the spectral radius of the result is not below 1.

    Returns
    -------
    A : ndarray, shape (n_nodes, n_nodes)
        ``diag(self_weight) + scale · A_raw / (1 + σ_max(A_raw))``, dimensionless.

    Raises
    ------
    SessionError
        On a bad size, density or scale.
    UnstableModelError
        When ``require_stable`` and the spectral radius is at least 1.

    Notes
    -----
    Since ``σ_max(A_raw / (1 + σ_max(A_raw))) = σ_max / (1 + σ_max) < 1``, the result satisfies
    ``σ_max(A) ≤ max|self_weight| + scale · σ_max / (1 + σ_max) < 1`` whenever ``max|self_weight| + scale ≤ 1``;
    the spectral radius is bounded by ``σ_max``, so such a network is stable.

    References
    ----------
    Gu S. et al. (2015), Controllability of structural brain networks, Nat. Commun. 6:8414 (Methods).

    Examples
    --------
    >>> A = random_network(8, density=0.3, seed=1)
    >>> bool(np.linalg.norm(A, 2) < 1)
    True
    """
    if not isinstance(n_nodes, numbers.Integral) or isinstance(n_nodes, bool) or n_nodes < 1:
        raise SessionError(f"n_nodes must be a positive integer; got {n_nodes!r}.")
    density = float(density)
    if not 0 < density <= 1:
        raise SessionError(f"density must be in (0, 1], the probability of each edge; got {density}.")
    scale = _positive("scale", scale)
    n = int(n_nodes)
    diag = np.asarray(self_weight, dtype=np.float64)
    if diag.ndim == 0:
        diag = np.full(n, float(diag))
    if diag.shape != (n,) or not np.all(np.isfinite(diag)):
        raise SessionError(
            f"self_weight must be a finite number or one finite value per node, shape ({n},); got {self_weight!r}."
        )
    rng = np.random.default_rng(seed)
    edges = rng.random((n, n)) < density
    weights = rng.standard_normal((n, n))
    if not signed:
        weights = np.abs(weights)
    raw = np.where(edges, weights, 0.0)
    np.fill_diagonal(raw, 0.0)
    if symmetric:
        upper = np.triu(raw, 1)
        raw = upper + upper.T
    sigma = float(np.linalg.norm(raw, 2)) if n > 1 else 0.0
    A = np.diag(diag) + scale * raw / (1.0 + sigma)
    rho = _spectral_radius(A)
    if require_stable and rho >= 1:
        raise UnstableModelError(
            f"the scaled network has spectral radius {rho:.4f} >= 1 (scale={scale}, largest self_weight "
            f"{np.max(np.abs(diag)):g}). Keep max|self_weight| + scale <= 1 for a guaranteed stable network, or pass "
            "require_stable=False."
        )
    return A


# ------------------------------------------------------------------------------------------------ noise streams
class _GaussStream:
    """Standard normal rows of a fixed width, drawn in chunks and handed out one row at a time."""

    __slots__ = ("_rng", "_dim", "_buf", "_i")

    def __init__(self, rng: np.random.Generator, dim: int):
        self._rng, self._dim = rng, dim
        self._buf = np.empty((0, dim))
        self._i = 0

    def next(self) -> np.ndarray:
        if self._i >= self._buf.shape[0]:
            self._buf = self._rng.standard_normal((_CHUNK, self._dim))
            self._i = 0
        row = self._buf[self._i]
        self._i += 1
        return row


# ------------------------------------------------------------------------------------------------ plants
class _NetworkPlant:
    """Shared recording model (noise, drift, artifacts, names, reset/step/simulate) of the network plants."""

    plant_type = ""
    _MATRICES: tuple = ()  # names of the matrix parameters, in constructor order

    def _init_recording(self, *, m, n, p, process_noise_std, measurement_noise_std, drift_amplitude,
                        drift_period_s, drift_step_std, artifact_gain, artifact_decay_s, sample_rate_hz,
                        input_names, output_names, seed, require_stable):
        self.n_states, self.n_inputs, self.n_outputs = n, m, p
        self.process_noise_std = _nonneg("process_noise_std", process_noise_std, n)
        self.measurement_noise_std = _nonneg("measurement_noise_std", measurement_noise_std, p)
        self.drift_amplitude = _nonneg("drift_amplitude", drift_amplitude, p)
        self.drift_period_s = _positive("drift_period_s", drift_period_s)
        self.drift_step_std = _nonneg("drift_step_std", drift_step_std, p)
        if artifact_gain is not None:
            gain = np.asarray(artifact_gain, dtype=np.float64)
            artifact_gain = _matrix("artifact_gain", np.full((p, m), float(gain)) if gain.ndim == 0 else gain, (p, m))
        self.artifact_gain = artifact_gain
        self.artifact_decay_s = _positive("artifact_decay_s", artifact_decay_s)
        self.sample_rate_hz = _positive("sample_rate_hz", sample_rate_hz)
        self.input_names = _names("input_names", input_names, m, "u")
        self.output_names = _names("output_names", output_names, p, "y")
        overlap = set(self.input_names) & set(self.output_names)
        if overlap:
            raise SessionError(f"input and output names must differ; both hold {sorted(overlap)}. Rename them.")
        self.seed = _seed_int(seed)
        self.require_stable = bool(require_stable)
        self._omega = 2.0 * np.pi / (self.drift_period_s * self.sample_rate_hz)
        self._decay = float(np.exp(-1.0 / (self.artifact_decay_s * self.sample_rate_hz)))
        self._has = {
            "process": bool(np.any(self.process_noise_std > 0)),
            "measurement": bool(np.any(self.measurement_noise_std > 0)),
            "sine": bool(np.any(self.drift_amplitude > 0)),
            "walk": bool(np.any(self.drift_step_std > 0)),
            "artifact": artifact_gain is not None and bool(np.any(artifact_gain != 0)),
        }

    # -------------------------------------------------------------------------------------------- parameters
    def get_params(self) -> dict:
        """Constructor arguments (validated, as stored) that rebuild this plant: ``type(p)(**p.get_params())``."""
        params = {name: getattr(self, name) for name in self._MATRICES}
        params.update(self._extra_params())
        for name in ("process_noise_std", "measurement_noise_std", "drift_amplitude", "drift_period_s",
                     "drift_step_std", "artifact_gain", "artifact_decay_s", "sample_rate_hz", "input_names",
                     "output_names", "seed", "require_stable"):
            params[name] = getattr(self, name)
        return params

    def _extra_params(self) -> dict:
        return {}

    def with_params(self, **changes):
        """A new plant of the same type with some constructor arguments changed (e.g. noise switched off)."""
        unknown = sorted(set(changes) - set(self.get_params()))
        if unknown:
            raise SessionError(f"unknown plant parameters {unknown}; choose from {sorted(self.get_params())}.")
        return type(self)(**{**self.get_params(), **changes})

    # -------------------------------------------------------------------------------------------- running
    def rest_state(self) -> np.ndarray:
        """The state the plant rests in without stimulation, shape (n_states,)."""
        return np.zeros(self.n_states)

    @property
    def state(self) -> np.ndarray:
        """A copy of the current node state x_k, shape (n_states,)."""
        return self._x.copy()

    def set_state(self, x) -> None:
        """Move the node state to ``x`` (n_states,) without touching noise, drift or artifact state."""
        self._x = self._check_x0(x)

    def _check_x0(self, x0) -> np.ndarray:
        if x0 is None:
            return self.rest_state()
        x = np.asarray(x0, dtype=np.float64)
        if x.size != self.n_states or x.ndim > 2 or not np.all(np.isfinite(x)):
            raise SessionError(
                f"x0 must be a finite state vector of shape ({self.n_states},); got shape {x.shape}."
            )
        return x.reshape(self.n_states).copy()

    def reset(self, seed=None, x0=None) -> None:
        """Restart the plant: node state ``x0`` (default the rest state), fresh noise streams, drift at time 0.

        Parameters
        ----------
        seed : int or numpy.random.Generator, optional
            Seed of the noise, drift and artifact realisation; default the plant's own ``seed`` (so
            ``reset()`` always replays the same realisation).
        x0 : ndarray, shape (n_states,), optional
        """
        if seed is None:
            seed = self.seed
        if isinstance(seed, np.random.Generator):
            gens = seed.spawn(_N_STREAMS)
        else:
            gens = [np.random.default_rng(s) for s in np.random.SeedSequence(_seed_int(seed)).spawn(_N_STREAMS)]
        self._x = self._check_x0(x0)
        self._k = 0
        self._proc = _GaussStream(gens[0], self.n_states)
        self._meas = _GaussStream(gens[1], self.n_outputs)
        self._walk_stream = _GaussStream(gens[2], self.n_outputs)
        self._phase = gens[3].uniform(0.0, 2.0 * np.pi, self.n_outputs)
        self._walk = np.zeros(self.n_outputs)
        self._art = np.zeros(self.n_inputs)
        self._u_prev = np.zeros(self.n_inputs)

    def _check_u_k(self, u_k) -> np.ndarray:
        u = np.array(u_k, dtype=np.float64)  # a copy: the caller may reuse its buffer
        if u.shape != (self.n_inputs,):
            if u.size != self.n_inputs:
                raise SessionError(
                    f"u_k must hold one value per input, shape ({self.n_inputs},); got shape {u.shape}."
                )
            u = u.reshape(self.n_inputs)
        if not np.isfinite(u).all():
            raise SessionError(f"u_k holds NaN or infinite values: {u}. Give finite amplitudes.")
        return u

    def step(self, u_k) -> np.ndarray:
        """Measure the output at the current sample under input ``u_k``, then advance the state one sample.

        Parameters
        ----------
        u_k : ndarray, shape (n_inputs,)
            Stimulation amplitudes at this sample (µA).

        Returns
        -------
        y_k : ndarray, shape (n_outputs,)
            ``h(x_k, u_k)`` plus measurement noise, drift and artifact (see the module docstring).
        """
        if not hasattr(self, "_x"):
            self.reset()
        u = self._check_u_k(u_k)
        y = self._read_out(self._x, u)
        has = self._has
        if has["measurement"]:
            y += self.measurement_noise_std * self._meas.next()
        if has["sine"]:
            y += self.drift_amplitude * np.sin(self._omega * self._k + self._phase)
        if has["walk"]:
            y += self._walk
            self._walk += self.drift_step_std * self._walk_stream.next()
        if has["artifact"]:
            self._art *= self._decay
            onset = (u != 0.0) & (self._u_prev == 0.0)
            self._art[onset] += u[onset]
            y += self.artifact_gain @ self._art
        x = self._advance(self._x, u)
        if has["process"]:
            x += self.process_noise_std * self._proc.next()
        self._x = x
        self._u_prev = u
        self._k += 1
        return y

    def simulate(self, u, seed=None, x0=None, return_states: bool = False):
        """Reset the plant and run it over a whole input; the plant is left in its final state.

        Parameters
        ----------
        u : ndarray, shape (n_samples, n_inputs)
            Stimulation amplitudes (µA).
        seed : int or numpy.random.Generator, optional
            Passed to :meth:`reset`.
        x0 : ndarray, shape (n_states,), optional
            Initial node state; default the rest state.
        return_states : bool, default False
            Also return the node states, shape (n_samples + 1, n_states) (the last row follows the last input).

        Returns
        -------
        y : ndarray, shape (n_samples, n_outputs)
        x : ndarray, shape (n_samples + 1, n_states), only when ``return_states``
        """
        u = self._check_input(u)
        self.reset(seed=seed, x0=x0)
        y = np.empty((u.shape[0], self.n_outputs))
        X = np.empty((u.shape[0] + 1, self.n_states))
        X[0] = self._x
        for k in range(u.shape[0]):
            y[k] = self.step(u[k])
            X[k + 1] = self._x
        return (y, X) if return_states else y

    def _check_input(self, u) -> np.ndarray:
        u = np.asarray(u, dtype=np.float64)
        if u.ndim == 1 and self.n_inputs == 1:
            u = u[:, None]
        if u.ndim != 2 or u.shape[1] != self.n_inputs:
            raise SessionError(
                f"u must be time-major with shape (n_samples, {self.n_inputs}) for this plant's {self.n_inputs} "
                f"input(s); got shape {u.shape}."
            )
        if not np.all(np.isfinite(u)):
            raise SessionError("u holds NaN or infinite values; give finite amplitudes (µA).")
        return u

    def __repr__(self) -> str:
        return (f"{type(self).__name__}(n_states={self.n_states}, n_inputs={self.n_inputs}, "
                f"n_outputs={self.n_outputs}, sample_rate_hz={self.sample_rate_hz:g}, seed={self.seed})")


class LinearNetworkPlant(_NetworkPlant):
    """A linear network of nodes driven at stimulation sites and seen through mixed recording channels.

    ``x_{k+1} = A x_k + B u_k + w_k``, ``y_k = C x_k + D u_k + v_k + d_k + G s_k`` (module docstring).

    Parameters
    ----------
    A : ndarray, shape (n_nodes, n_nodes)
        Node coupling (dimensionless, per sample), e.g. from :func:`random_network`.
    B : ndarray, shape (n_nodes, n_inputs)
        Drive of each node by each stimulation site (node units per µA).
    C : ndarray, shape (n_outputs, n_nodes)
        Mixing of node activity into the recorded channels (output units, e.g. µV, per node unit).
    D : ndarray, shape (n_outputs, n_inputs), optional
        Direct feed-through (output units per µA); default zero.
    process_noise_std : float or ndarray (n_nodes,), default 0
        Standard deviation of ``w_k`` (node units).
    measurement_noise_std : float or ndarray (n_outputs,), default 0
        Standard deviation of ``v_k`` (output units).
    drift_amplitude : float or ndarray (n_outputs,), default 0
        Amplitude of the slow sinusoidal drift (output units).
    drift_period_s : float, default 60.0
        Period of the sinusoidal drift (s).
    drift_step_std : float or ndarray (n_outputs,), default 0
        Standard deviation of the drift random walk's step per sample (output units).
    artifact_gain : float or ndarray (n_outputs, n_inputs), optional
        Artifact ``G`` at an onset per µA of the onset amplitude (output units per µA); default no artifacts.
    artifact_decay_s : float, default 0.005
        Time constant of the artifact's exponential decay (s).
    sample_rate_hz : float, default 1.0
    input_names, output_names : sequence of str, optional
        Default ``u0, u1, ...`` and ``y0, y1, ...``.
    seed : int, default 0
        Seed used by :meth:`reset` when it gets none.
    require_stable : bool, default True
        Refuse an ``A`` whose spectral radius is not below 1.

    Raises
    ------
    SessionError
        On a wrong shape, a non-finite entry, a negative standard deviation or a non-positive rate or time constant.
    UnstableModelError
        When ``require_stable`` and ``A`` has spectral radius >= 1.

    Examples
    --------
    >>> plant = LinearNetworkPlant(A=[[0.5]], B=[[1.0]], C=[[2.0]])
    >>> plant.simulate(np.array([[1.0], [0.0], [0.0]]))[:, 0].tolist()
    [0.0, 2.0, 1.0]
    """

    plant_type = "linear_network"
    _MATRICES = ("A", "B", "C", "D")

    def __init__(self, A, B, C, D=None, *, process_noise_std=0.0, measurement_noise_std=0.0, drift_amplitude=0.0,
                 drift_period_s=60.0, drift_step_std=0.0, artifact_gain=None, artifact_decay_s=0.005,
                 sample_rate_hz=1.0, input_names=None, output_names=None, seed=0, require_stable=True):
        A = _matrix("A", A)
        n = A.shape[0]
        if A.shape != (n, n):
            raise SessionError(f"A must be square (n_nodes, n_nodes); got shape {A.shape}.")
        B, C, D = _input_output_matrices(n, B, C, D)
        m, p = B.shape[1], C.shape[0]
        self.A, self.B, self.C, self.D = A, B, C, D
        self._init_recording(
            m=m, n=n, p=p, process_noise_std=process_noise_std, measurement_noise_std=measurement_noise_std,
            drift_amplitude=drift_amplitude, drift_period_s=drift_period_s, drift_step_std=drift_step_std,
            artifact_gain=artifact_gain, artifact_decay_s=artifact_decay_s, sample_rate_hz=sample_rate_hz,
            input_names=input_names, output_names=output_names, seed=seed, require_stable=require_stable)
        rho = _spectral_radius(A)
        if self.require_stable and rho >= 1:
            raise UnstableModelError(
                f"A has spectral radius {rho:.4f} >= 1, so the network is unstable. Normalise it (see "
                "random_network: A / (1 + sigma_max(A))) or pass require_stable=False."
            )
        self.reset()

    def _read_out(self, x, u):
        return self.C @ x + self.D @ u

    def _advance(self, x, u):
        return self.A @ x + self.B @ u

    def to_state_space(self, *, innovation: bool = False) -> StateSpaceModel:
        """The true model of the node dynamics and read-out, without drift and artifacts.

        Parameters
        ----------
        innovation : bool, default False
            False: the noise-free model (``K = 0``). True: the steady-state Kalman (innovation) form for the
            plant's process and measurement noise, ``Q = diag(process_noise_std²)``, ``R =
            diag(measurement_noise_std²)`` (needs every measurement noise level positive).

        Returns
        -------
        StateSpaceModel
            In the plant's units (node units, µA, output units) at the plant's sample rate.

        Raises
        ------
        SessionError
            When ``innovation`` and some measurement noise level is zero (R singular).
        """
        model = StateSpaceModel(A=self.A, B=self.B, C=self.C, D=self.D, sample_rate_hz=self.sample_rate_hz,
                                input_names=self.input_names, output_names=self.output_names,
                                info={"source": f"{type(self).__name__} ground truth"})
        if not innovation:
            return model
        if np.any(self.measurement_noise_std <= 0):
            raise SessionError(
                "the innovation form needs a positive measurement noise level on every channel; got "
                f"{self.measurement_noise_std}. Use innovation=False for the noise-free model."
            )
        K, P = kalman_gain(self.A, self.C, np.diag(self.process_noise_std ** 2),
                           np.diag(self.measurement_noise_std ** 2))
        Re = self.C @ P @ self.C.T + np.diag(self.measurement_noise_std ** 2)
        return model.replace(K=K, innovation_cov=0.5 * (Re + Re.T))


class SaturatingRateNetworkPlant(_NetworkPlant):
    """A leaky rate network with a tanh saturation: linear for weak stimulation, bounded for strong.

    ``x_{k+1} = (1 − leak) x_k + leak · tanh(W x_k + B u_k + bias) + w_k``,
    ``y_k = C x_k + D u_k + v_k + d_k + G s_k`` (module docstring).

    Parameters
    ----------
    W : ndarray, shape (n_nodes, n_nodes)
        Recurrent coupling (dimensionless), e.g. :func:`random_network`; ``σ_max(W) < 1`` makes the map a
        contraction with one rest state.
    B : ndarray, shape (n_nodes, n_inputs)
        Drive per µA (dimensionless per µA).
    C, D : ndarray
        Read-out as in :class:`LinearNetworkPlant`.
    leak : float, default 0.2
        In (0, 1]: the fraction of the way each node moves to its saturated drive per sample.
    bias : ndarray, shape (n_nodes,), optional
        Constant drive; default zero (then the rest state is 0).
    process_noise_std, measurement_noise_std, drift_amplitude, drift_period_s, drift_step_std, artifact_gain,
    artifact_decay_s, sample_rate_hz, input_names, output_names, seed
        As in :class:`LinearNetworkPlant`.
    require_stable : bool, default True
        Refuse a network whose linearisation at rest has spectral radius >= 1.

    Raises
    ------
    SessionError
        As in :class:`LinearNetworkPlant`, and for a leak outside (0, 1].
    UnstableModelError
        When no rest state is found, or (``require_stable``) the rest state is unstable.

    Notes
    -----
    States started inside [−1, 1]ⁿ stay there without process noise: each step is a convex combination of the
    state and a tanh value.
    """

    plant_type = "saturating_rate_network"
    _MATRICES = ("W", "B", "C", "D")

    def __init__(self, W, B, C, D=None, *, leak=0.2, bias=None, process_noise_std=0.0, measurement_noise_std=0.0,
                 drift_amplitude=0.0, drift_period_s=60.0, drift_step_std=0.0, artifact_gain=None,
                 artifact_decay_s=0.005, sample_rate_hz=1.0, input_names=None, output_names=None, seed=0,
                 require_stable=True):
        W = _matrix("W", W)
        n = W.shape[0]
        if W.shape != (n, n):
            raise SessionError(f"W must be square (n_nodes, n_nodes); got shape {W.shape}.")
        B, C, D = _input_output_matrices(n, B, C, D)
        m, p = B.shape[1], C.shape[0]
        leak = float(leak)
        if not 0 < leak <= 1:
            raise SessionError(f"leak must be in (0, 1], the fraction moved per sample; got {leak}.")
        bias = np.zeros(n) if bias is None else np.asarray(bias, dtype=np.float64)
        if bias.shape != (n,) or not np.all(np.isfinite(bias)):
            raise SessionError(f"bias must be a finite vector of shape ({n},); got shape {bias.shape}.")
        bias = bias.copy()
        bias.setflags(write=False)
        self.W, self.B, self.C, self.D, self.leak, self.bias = W, B, C, D, leak, bias
        self._init_recording(
            m=m, n=n, p=p, process_noise_std=process_noise_std, measurement_noise_std=measurement_noise_std,
            drift_amplitude=drift_amplitude, drift_period_s=drift_period_s, drift_step_std=drift_step_std,
            artifact_gain=artifact_gain, artifact_decay_s=artifact_decay_s, sample_rate_hz=sample_rate_hz,
            input_names=input_names, output_names=output_names, seed=seed, require_stable=require_stable)
        self._rest = self._fixed_point(np.zeros(m))
        self._rest.setflags(write=False)
        rho = self.linearize().spectral_radius
        if self.require_stable and rho >= 1:
            raise UnstableModelError(
                f"the rate network's linearisation at rest has spectral radius {rho:.4f} >= 1, so its rest state is "
                "unstable. Use a coupling W with sigma_max(W) < 1 (see random_network) or pass require_stable=False."
            )
        self.reset()

    def _extra_params(self) -> dict:
        return {"leak": self.leak, "bias": self.bias}

    def _read_out(self, x, u):
        return self.C @ x + self.D @ u

    def _advance(self, x, u):
        return (1.0 - self.leak) * x + self.leak * np.tanh(self.W @ x + self.B @ u + self.bias)

    def _fixed_point(self, u0: np.ndarray, max_iter: int = 20000, tol: float = 1e-13) -> np.ndarray:
        x = np.zeros(self.n_states)
        drive = self.B @ u0 + self.bias
        for _ in range(max_iter):
            x_new = (1.0 - self.leak) * x + self.leak * np.tanh(self.W @ x + drive)
            if np.max(np.abs(x_new - x), initial=0.0) <= tol:
                return x_new
            x = x_new
        raise UnstableModelError(
            f"the rate network did not settle to a rest state within {max_iter} samples under a constant input "
            f"{u0.tolist()}. Use a coupling W with sigma_max(W) < 1 (see random_network) or a smaller bias."
        )

    def rest_state(self, u0=None) -> np.ndarray:
        """The equilibrium ``x* = tanh(W x* + B u0 + bias)`` (default ``u0 = 0``), shape (n_states,)."""
        if u0 is None and hasattr(self, "_rest"):
            return self._rest.copy()
        return self._fixed_point(np.zeros(self.n_inputs) if u0 is None else self._check_u_k(u0))

    def linearize(self, u0=None) -> StateSpaceModel:
        """The linear model of small deviations around the equilibrium under the constant input ``u0``.

        Returns
        -------
        StateSpaceModel
            ``δx_{k+1} = A δx_k + B δu_k``, ``δy_k = C δx_k + D δu_k`` with
            ``A = (1 − leak) I + leak · diag(s) W``, ``B = leak · diag(s) B_plant``,
            ``s = 1 − tanh²(W x* + B u0 + bias)``; ``info`` holds the operating state ``x*``, input ``u0`` and output
            ``C x* + D u0``.

        Raises
        ------
        UnstableModelError
            When the network does not settle under ``u0``.
        """
        u0 = np.zeros(self.n_inputs) if u0 is None else self._check_u_k(u0)
        x_star = self.rest_state(u0)
        s = 1.0 - np.tanh(self.W @ x_star + self.B @ u0 + self.bias) ** 2
        A = (1.0 - self.leak) * np.eye(self.n_states) + self.leak * s[:, None] * self.W
        B = self.leak * s[:, None] * self.B
        info = {"operating_state": x_star.tolist(), "operating_input": u0.tolist(),
                "operating_output": (self.C @ x_star + self.D @ u0).tolist(),
                "source": "SaturatingRateNetworkPlant linearisation"}
        return StateSpaceModel(A=A, B=B, C=self.C, D=self.D, sample_rate_hz=self.sample_rate_hz,
                               input_names=self.input_names, output_names=self.output_names, info=info)


_PLANT_TYPES = {cls.plant_type: cls for cls in (LinearNetworkPlant, SaturatingRateNetworkPlant)}


# ------------------------------------------------------------------------------------------------ sessions
def record_session(plant, u, *, trials=None, seed=None, x0=None, trial_start: str = "continue",
                   input_units="uA", output_units="uV", output_resolution=None, metadata=None) -> Session:
    """Run a plant over a stimulation schedule and pack the recording as a :class:`Session`.

    Parameters
    ----------
    plant : plant
        Anything with the plant interface (``reset``, ``step``, names, rate); ``trial_start="rest"`` also needs
        ``rest_state()`` and ``set_state(x)``.
    u : ndarray, shape (n_samples, n_inputs)
        The whole schedule in µA, rests between trials included (usually zeros there).
    trials : array_like, shape (n_trials, 2), optional
        Half-open sample ranges ``[start, stop)``; default one trial over the whole schedule.
    seed : int or numpy.random.Generator, optional
        Passed once to ``plant.reset`` before the first sample; default the plant's own seed.
    x0 : ndarray, shape (n_states,), optional
        Initial state at sample 0; default the rest state.
    trial_start : {"continue", "rest"}, default "continue"
        "continue": one uninterrupted run, so each trial starts from the state the previous trial and the rest
        after it left. "rest": the node state is set back to the rest state at every trial start (noise, drift
        and artifacts carry on, as the recording does).
    input_units, output_units : str or sequence of str, default "uA" and "uV"
    output_resolution : float, optional
        Quantisation step of the recorder (output units): outputs are rounded to multiples of it.
    metadata : mapping, optional
        Extra metadata; ``simulated``, ``plant_type``, ``seed`` and ``trial_start`` are added.

    Returns
    -------
    Session
        Every sample valid (artifacts stay in the data: blanking them is ``prep``'s job).

    Raises
    ------
    SessionError
        On a schedule of the wrong width, bad trials (from :class:`Session`), an unknown ``trial_start`` or a
        non-positive resolution.
    """
    if trial_start not in ("continue", "rest"):
        raise SessionError(f"trial_start must be 'continue' or 'rest'; got {trial_start!r}.")
    u = _schedule(plant, u)
    resolution = None if output_resolution is None else _positive("output_resolution", output_resolution)
    probe = Session(u=u, y=np.zeros((u.shape[0], 1)), sample_rate_hz=plant.sample_rate_hz, trials=trials)
    starts = set(int(a) for a in probe.trials[:, 0]) if trial_start == "rest" else set()
    if starts and not (hasattr(plant, "set_state") and hasattr(plant, "rest_state")):
        raise SessionError("trial_start='rest' needs a plant with rest_state() and set_state(x); use 'continue'.")
    plant.reset(seed=seed, x0=x0)
    y = np.empty((u.shape[0], plant.n_outputs))
    for k in range(u.shape[0]):
        if k in starts:
            plant.set_state(plant.rest_state())
        y[k] = plant.step(u[k])
    if resolution is not None:
        y = np.round(y / resolution) * resolution
    units = lambda v, n: (v,) * n if isinstance(v, str) else v  # noqa: E731
    meta = {"simulated": True, "plant_type": getattr(plant, "plant_type", type(plant).__name__),
            "trial_start": trial_start, **dict(metadata or {})}
    effective = getattr(plant, "seed", None) if seed is None else seed
    if isinstance(effective, numbers.Integral):
        meta["seed"] = int(effective)
    return Session(u=u, y=y, sample_rate_hz=plant.sample_rate_hz, trials=probe.trials,
                   input_names=plant.input_names, output_names=plant.output_names,
                   input_units=units(input_units, plant.n_inputs), output_units=units(output_units, plant.n_outputs),
                   metadata=meta)


def _schedule(plant, u) -> np.ndarray:
    u = np.asarray(u, dtype=np.float64)
    if u.ndim == 1 and plant.n_inputs == 1:
        u = u[:, None]
    if u.ndim != 2 or u.shape[1] != plant.n_inputs or u.shape[0] == 0:
        raise SessionError(
            f"the schedule u must have shape (n_samples, {plant.n_inputs}) with at least one sample for this "
            f"plant's {plant.n_inputs} input(s); got shape {u.shape}."
        )
    if not np.all(np.isfinite(u)):
        raise SessionError("the schedule u holds NaN or infinite values; give finite amplitudes (µA).")
    return u


# ------------------------------------------------------------------------------------------------ files
def save_plant(plant, path, *, overwrite: bool = False) -> Path:
    """Write a plant to an HDF5 file of our own layout, atomically.

    Layout: root attributes ``stimsteer_file = "stimsteer-plant"``, ``format_version``, ``plant_type`` and the
    scalar parameters; one dataset per array parameter (matrices, per-channel noise levels, ``artifact_gain`` when
    set, ``bias``); ``input_names`` and ``output_names`` as UTF-8 string datasets. Datasets carry no time stamps,
    so the same plant gives the same bytes.

    Parameters
    ----------
    plant : LinearNetworkPlant or SaturatingRateNetworkPlant
    path : str or Path
    overwrite : bool, default False
        Replace an existing file.

    Returns
    -------
    Path

    Raises
    ------
    StimsteerError
        When the plant type is not storable or the file exists and ``overwrite`` is False.
    """
    if type(plant) not in _PLANT_TYPES.values():
        raise StimsteerError(
            f"save_plant stores {sorted(c.__name__ for c in _PLANT_TYPES.values())}; got {type(plant).__name__}."
        )
    path = Path(path)
    if path.exists() and not overwrite:
        raise StimsteerError(f"{path} already exists; pass overwrite=True to replace it or choose another path.")
    params = plant.get_params()
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w", track_order=True) as f:
            f.attrs["stimsteer_file"] = _FILE_TAG
            f.attrs["format_version"] = PLANT_FILE_VERSION
            f.attrs["plant_type"] = plant.plant_type
            for name, value in params.items():
                if value is None:
                    continue
                if name in ("input_names", "output_names"):
                    f.create_dataset(name, data=np.array(value, dtype=object), dtype=h5py.string_dtype(),
                                     track_times=False)
                elif isinstance(value, np.ndarray):
                    f.create_dataset(name, data=value, track_times=False)
                else:
                    f.attrs[name] = value
    return path


def load_plant(path):
    """Read a plant written by :func:`save_plant`.

    Raises
    ------
    FileFormatError
        When the file is not HDF5, not a stimsteer plant file, of a newer version, of an unknown plant type,
        or misses a parameter.
    FileNotFoundError
        When the file does not exist.
    """
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(2, "no such plant file", str(path))
    if not h5py.is_hdf5(path):
        raise FileFormatError(f"{path} is not an HDF5 file; give a plant file written by save_plant.")
    with h5py.File(path, "r") as f:
        if f.attrs.get("stimsteer_file") != _FILE_TAG:
            raise FileFormatError(
                f"{path} is HDF5 but not a stimsteer plant file (root attribute stimsteer_file != '{_FILE_TAG}'). "
                "Give a file written by save_plant."
            )
        version = int(f.attrs.get("format_version", -1))
        if not 1 <= version <= PLANT_FILE_VERSION:
            raise FileFormatError(
                f"{path} has plant file version {version}; this stimsteer reads versions 1 to {PLANT_FILE_VERSION}. "
                "Upgrade stimsteer."
            )
        kind = str(f.attrs.get("plant_type"))
        if kind not in _PLANT_TYPES:
            raise FileFormatError(f"{path} holds an unknown plant_type {kind!r}; known: {sorted(_PLANT_TYPES)}.")
        params = {k: v.item() if isinstance(v, np.generic) else v for k, v in f.attrs.items()
                  if k not in ("stimsteer_file", "format_version", "plant_type")}
        for name, ds in f.items():
            params[name] = tuple(ds.asstr()[()]) if name.endswith("_names") else ds[()]
    cls = _PLANT_TYPES[kind]
    needed = set(cls._MATRICES[:3]) | {"input_names", "output_names", "sample_rate_hz", "seed"}
    missing = sorted(needed - set(params))
    if missing:
        raise FileFormatError(f"{path} misses the plant parameters {missing}; the file is damaged or incomplete.")
    try:
        return cls(**params)
    except TypeError as exc:
        raise FileFormatError(f"{path} holds parameters {cls.__name__} does not take: {exc}.") from None
