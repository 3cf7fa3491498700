"""Simulated plants: stimulated networks that stand in for tissue in the demo data, the tests and closed loops.

Every plant here satisfies :class:`stimsteer.sysid.protocols.Plant`, the interface the closed loop drives:

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

:class:`InnovationPlant` drives a fitted linear model with its own innovation noise: the surrogate plant of a
recording in the benchmark (:mod:`stimsteer.control.evaluation`).

The network plants live in :mod:`stimsteer.control.network_plant` (the shared recording model and the linear
plant) and :mod:`stimsteer.control.saturating_plant`, the network generator in
:mod:`stimsteer.control.random_networks`; this module gathers them with the innovation plant, recording a session
from a plant, and the plant files.
"""


from __future__ import annotations

import numbers
from pathlib import Path

import h5py
import numpy as np

from ..sysid import FileFormatError, Session, SessionError, StimsteerError
from ..sysid._files import hdf5_bytes, write_bytes
from ._plant_params import _input_array, _positive
from .network_plant import LinearNetworkPlant, _NetworkPlant
from .random_networks import random_network
from .saturating_plant import SaturatingRateNetworkPlant

__all__ = [
    "random_network",
    "LinearNetworkPlant",
    "SaturatingRateNetworkPlant",
    "InnovationPlant",
    "record_session",
    "save_plant",
    "load_plant",
    "PLANT_FILE_VERSION",
]

PLANT_FILE_VERSION = 1
_FILE_TAG = "stimsteer-plant"


class InnovationPlant:
    """A fitted linear model with its noise model, driven like a plant (the surrogate of a recording).

    ``y_k = C x_k + D u_k + e_k + offset``, ``x_{k+1} = A x_k + B u_k + K e_k`` with ``e_k ~ N(0, Σ_e)`` drawn from a
    seeded generator; ``Σ_e`` is the model's ``innovation_cov``.

    Parameters
    ----------
    model : StateSpaceModel
        In innovation form (``K``, ``innovation_cov``), in the session's units.
    output_offset : ndarray, shape (n_outputs,), optional
        Resting output added to every sample (e.g. ``RidgeArx.model_.info["output_offset"]``); default zero.
    seed : int, default 0
        Used by :meth:`reset` when it gets none.
    noise : bool, default True
        Draw the innovations; False runs the noise-free model.

    Notes
    -----
    The rest state is ``x = 0`` (zero input, output at ``offset``).
    """

    def __init__(self, model, *, output_offset=None, seed: int = 0, noise: bool = True):
        self.model = model
        self.n_inputs, self.n_outputs = int(model.n_inputs), int(model.n_outputs)
        self.sample_rate_hz = float(model.sample_rate_hz)
        self.input_names, self.output_names = tuple(model.input_names), tuple(model.output_names)
        off = np.zeros(self.n_outputs) if output_offset is None else np.asarray(output_offset, np.float64)
        if off.shape != (self.n_outputs,) or not np.all(np.isfinite(off)):
            raise SessionError(f"output_offset must be {self.n_outputs} finite values; got shape {off.shape}.")
        self.output_offset = off
        self.seed = int(seed)
        self.noise = bool(noise)
        ev, V = np.linalg.eigh(0.5 * (model.innovation_cov + model.innovation_cov.T))
        self._noise_factor = V * np.sqrt(np.clip(ev, 0.0, None))
        self.reset()

    def reset(self, seed=None, x0=None) -> None:
        """Rest state (or ``x0``) and a fresh innovation stream from ``seed`` (default the plant's own)."""
        self._rng = np.random.default_rng(self.seed if seed is None else seed)
        n = self.model.n_states
        x = np.zeros(n) if x0 is None else np.asarray(x0, np.float64).reshape(-1)
        if x.shape != (n,) or not np.all(np.isfinite(x)):
            raise SessionError(f"x0 must be a finite state vector of shape ({n},); got {np.shape(x0)}.")
        self._x = x.copy()

    def step(self, u_k) -> np.ndarray:
        """Output at the current sample under ``u_k`` (n_inputs,), then advance the state."""
        u = np.asarray(u_k, np.float64).reshape(-1)
        if u.shape != (self.n_inputs,) or not np.all(np.isfinite(u)):
            raise SessionError(f"u_k must hold {self.n_inputs} finite values; got shape {np.shape(u_k)}.")
        md = self.model
        e = self._noise_factor @ self._rng.standard_normal(self.n_outputs) if self.noise else np.zeros(self.n_outputs)
        y = md.C @ self._x + md.D @ u + e
        self._x = md.A @ self._x + md.B @ u + md.K @ e
        return y + self.output_offset

    def simulate(self, u, seed=None, x0=None) -> np.ndarray:
        """Reset and run a whole input (n_samples, n_inputs); returns the outputs (n_samples, n_outputs)."""
        u = np.asarray(u, np.float64)
        self.reset(seed=seed, x0=x0)
        return np.array([self.step(row) for row in u]).reshape(u.shape[0], self.n_outputs)


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
    u = _input_array(u, plant.n_inputs, what="the schedule u", min_samples=1)
    resolution = None if output_resolution is None else _positive("output_resolution", output_resolution)
    probe = Session(u=u, y=np.zeros((u.shape[0], 1)), sample_rate_hz=plant.sample_rate_hz, trials=trials)
    starts = set(int(a) for a in probe.trials[:, 0]) if trial_start == "rest" else set()
    if starts and not (hasattr(plant, "set_state") and hasattr(plant, "rest_state")):
        raise SessionError("trial_start='rest' needs a plant with rest_state() and set_state(x); use 'continue'.")
    plant.reset(seed=seed, x0=x0)
    if isinstance(plant, _NetworkPlant) and plant._runs_whole_schedules():  # the numbers of step, bit for bit
        y = plant._run(u, rest_at=starts)
    else:
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
    with hdf5_bytes() as buf:  # built in memory, then written whole (see stimsteer.sysid._files.hdf5_bytes)
        with h5py.File(buf, "w", track_order=True) as f:
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
        write_bytes(path, buf.getbuffer(), suffix=".h5")
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
