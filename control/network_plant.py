"""The recording model shared by the simulated network plants (noise, drift, artifacts, reset/step/simulate), and
the linear network plant (see :mod:`stimsteer.control.plants` for the model's equations)."""

from __future__ import annotations

import math

import numpy as np

from ..sysid import SessionError, StateSpaceModel, UnstableModelError, kalman_gain
from ._plant_params import (_input_array, _matrix, _names, _network_matrices, _nonneg, _positive, _seed_int,
                            _spectral_radius)

__all__ = ["LinearNetworkPlant"]

_N_STREAMS = 4  # process noise, measurement noise, drift random walk, drift phases
_CHUNK = 256  # rows of noise drawn at once; step and simulate consume them row by row


class _GaussStream:
    """Standard normal rows of a fixed width, drawn :data:`_CHUNK` rows at a time."""

    __slots__ = ("_rng", "_dim", "_scale")

    def __init__(self, rng: np.random.Generator, dim: int, scale=None):
        self._rng, self._dim, self._scale = rng, dim, scale

    def block(self) -> np.ndarray:
        """The next :data:`_CHUNK` rows, times ``scale`` when one was given (the same product per element as
        scaling each row)."""
        buf = self._rng.standard_normal((_CHUNK, self._dim))
        if self._scale is not None:
            buf *= self._scale
        return buf


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
        # noise rows come scaled by their standard deviation (row by row the same products as scaling each row)
        self._proc = _GaussStream(gens[0], self.n_states, self.process_noise_std)
        self._meas = _GaussStream(gens[1], self.n_outputs, self.measurement_noise_std)
        self._walk_stream = _GaussStream(gens[2], self.n_outputs)
        self._phase = gens[3].uniform(0.0, 2.0 * np.pi, self.n_outputs)
        self._walk = np.zeros(self.n_outputs)  # the drift walk at the start of the next block
        self._art = np.zeros(self.n_inputs)
        self._u_prev = [0.0] * self.n_inputs
        self._i, self._adds, self._procs = _CHUNK, (), None  # the first step starts a block

    def _new_block(self) -> None:
        """The next :data:`_CHUNK` samples' additive output terms (measurement noise, sine drift, the walk before each
        sample, in the order they are added) and process noise, each computed whole.

        Each element is the same operation on the same numbers as when it was computed sample by sample (the noise
        streams draw the same chunks; the walk is a running sum, added in sample order), so a run gives the same
        numbers bit for bit; only the number of calls per sample is smaller.
        """
        has, adds = self._has, []
        if has["measurement"]:
            adds.append(self._meas.block())
        if has["sine"]:
            k = np.arange(self._k, self._k + _CHUNK, dtype=np.float64)[:, None]  # integers, exact in float64
            adds.append(self.drift_amplitude * np.sin(self._omega * k + self._phase))
        if has["walk"]:
            walk = np.cumsum(np.vstack([self._walk, self.drift_step_std * self._walk_stream.block()]), axis=0)
            adds.append(walk[:-1])
            self._walk = walk[-1]
        self._adds = adds
        self._procs = self._proc.block() if has["process"] else None
        self._i = 0

    def _checked_u(self, u_k):
        """``u_k`` as a new float array of shape (n_inputs,) and as a list of floats; SessionError when bad."""
        u = np.array(u_k, dtype=np.float64)  # a copy: the caller may reuse its buffer
        if u.shape != (self.n_inputs,):
            if u.size != self.n_inputs:
                raise SessionError(
                    f"u_k must hold one value per input, shape ({self.n_inputs},); got shape {u.shape}."
                )
            u = u.reshape(self.n_inputs)
        values = u.tolist()
        if not all(map(math.isfinite, values)):  # plain floats: a handful of inputs, a live loop's every sample
            raise SessionError(f"u_k holds NaN or infinite values: {u}. Give finite amplitudes.")
        return u, values

    def _check_u_k(self, u_k) -> np.ndarray:
        return self._checked_u(u_k)[0]

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
        u, values = self._checked_u(u_k)
        if self._i == _CHUNK:
            self._new_block()
        i = self._i
        y = self._read_out(self._x, u)
        for rows in self._adds:  # measurement noise, sine drift, walk: in this order, as the recording adds them
            y += rows[i]
        if self._has["artifact"]:
            art = self._art
            art *= self._decay
            prev = self._u_prev
            if 0.0 in prev:  # an onset needs an input that was off (-0.0 counts as off too)
                onset = [j for j, (v, w) in enumerate(zip(values, prev)) if v != 0.0 and w == 0.0]
                if onset:
                    art[onset] += u[onset]
            y += self.artifact_gain.dot(art)
        x = self._advance(self._x, u)
        if self._procs is not None:
            x += self._procs[i]
        self._x = x
        self._u_prev = values
        self._i = i + 1
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
        if self._runs_whole_schedules():
            return self._run(u, return_states=return_states)
        y, X = np.empty((u.shape[0], self.n_outputs)), np.empty((u.shape[0] + 1, self.n_states))
        X[0] = self._x
        for k in range(u.shape[0]):  # a subclass's own step
            y[k] = self.step(u[k])
            X[k + 1] = self._x
        return (y, X) if return_states else y

    def _runs_whole_schedules(self) -> bool:
        """Whether a whole schedule may be run at once (:meth:`_run`): the sample-by-sample step is this module's (a
        subclass with a step of its own is run through it)."""
        return type(self).step is _NetworkPlant.step

    def _run(self, u, rest_at=frozenset(), return_states: bool = False):
        """Run a checked input ``u`` (n_samples, n_inputs) on from the current state, the node state set to rest at
        the samples in ``rest_at``: the outputs (and states) :meth:`step` gives sample by sample, bit for bit.

        Only the node state and the artifact move sample by sample (their products are the same matrix-vector
        products); the output's additive terms are added a block at a time, each element in the same order.
        """
        u = np.ascontiguousarray(u, dtype=np.float64)
        n = u.shape[0]
        Y = np.empty((n, self.n_outputs))
        X = np.empty((n + 1, self.n_states)) if return_states else None
        if X is not None:
            X[0] = self._x
        onsets = self._onsets(u) if self._has["artifact"] and n else None
        k0 = 0
        while k0 < n:
            if self._i == _CHUNK:
                self._new_block()
            i0 = self._i
            k1 = min(n, k0 + _CHUNK - i0)
            Y[k0:k1], art = self._run_states(u, k0, k1, i0, rest_at, onsets, X)
            for rows in self._adds:  # measurement noise, sine drift, walk: as step adds them
                Y[k0:k1] += rows[i0:i0 + k1 - k0]
            if art is not None:
                Y[k0:k1] += art
            self._i, self._k = i0 + k1 - k0, self._k + k1 - k0
            k0 = k1
        if n:
            self._u_prev = u[-1].tolist()
        return (Y, X) if return_states else Y

    def _onsets(self, u) -> dict:
        """Sample -> the inputs that turn on from zero there (after the last input applied), for :meth:`_run`."""
        before = np.vstack([np.asarray(self._u_prev, np.float64)[None], u[:-1]])
        on = (u != 0.0) & (before == 0.0)
        return {int(k): np.flatnonzero(on[k]) for k in np.flatnonzero(on.any(axis=1))}

    def _run_states(self, u, k0, k1, i0, rest_at, onsets, X):
        """Samples ``k0:k1`` (rows from ``i0`` of the current block): read-outs, artifact terms (None without) and the
        node state after each (into ``X`` when given)."""
        outs, arts = [], ([] if onsets is not None else None)
        x, procs, read, advance = self._x, self._procs, self._read_out, self._advance
        art, decay, G = self._art, self._decay, self.artifact_gain
        for k in range(k0, k1):
            if k in rest_at:
                self.set_state(self.rest_state())
                x = self._x
            uk = u[k]
            outs.append(read(x, uk))
            if arts is not None:
                art *= decay
                on = onsets.get(k)
                if on is not None:
                    art[on] += uk[on]
                arts.append(G.dot(art))
            x = advance(x, uk)
            if procs is not None:
                x += procs[i0 + k - k0]
            if X is not None:
                X[k + 1] = x
        self._x = x
        return outs, arts

    def _check_input(self, u) -> np.ndarray:
        return _input_array(u, self.n_inputs)

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
        A, B, C, D = _network_matrices("A", A, B, C, D)
        n, m, p = A.shape[0], B.shape[1], C.shape[0]
        self.A, self.B, self.C, self.D = A, B, C, D
        self._feedthrough = bool(np.any(D))
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
        # ndarray.dot: the same BLAS product as ``@`` (matrix times vector), with half the call's overhead
        if not self._feedthrough:  # D u is zero: the same numbers (up to the sign of a zero) in half the calls
            return self.C.dot(x)
        return self.C.dot(x) + self.D.dot(u)

    def _advance(self, x, u):
        return self.A.dot(x) + self.B.dot(u)

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

