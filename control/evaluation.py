"""The route benchmark: both routes fitted on the same training trials, judged on the same held-out trials.

:func:`run_bench` answers, on one session, which route predicts and controls better, by how much, with how much
data and at what computational cost:

* **Splits.** ``n_splits`` seeded splits of whole trials into training and held-out trials (the same splits for
  every route). Every choice a route makes (ARX lags' ridge strength, subspace order, the direct route's ridge or
  Hankel strengths) happens inside the estimator's ``fit`` on the training trials only; the held-out trials are
  read for scoring and, for recordings, for the surrogate plant, never for fitting a route.
* **Prediction.** From past windows inside each held-out trial, every route predicts the next
  ``1 … horizon_steps`` samples; R², VAF, NRMSE and RMSE per step ahead and per channel
  (:func:`stimsteer.sysid.metrics.kstep_scores`), and free-run scores over whole held-out trials.
* **Control.** Each route's predictive controller (:mod:`stimsteer.control.mpc`) steers a plant in closed loop
  (:func:`stimsteer.control.loop.run_closed_loop`) to a pulse target on one output channel. A simulated session
  comes with its ground-truth plant; a recording gets a *surrogate plant*: a ridge ARX with twice the longest past
  window of the routes (a richer model class than either route's), fitted on the held-out trials only, driven with
  its own innovation noise (:class:`InnovationPlant`). Its fit quality is scored on the training trials, which it
  never saw.
* **Sweeps.** Number of training trials (the data-length question; Krishnan & Pasqualetti 2021), noise level
  (simulated sessions only: the schedule is re-recorded from the plant with scaled noise) and horizon.
* **Statistics.** Every figure is a mean over the repeated splits with a 95 % Student-t interval
  ``mean ± t_{0.975, n−1} · s / √n`` (:func:`t_interval`); route differences are paired by split.
* **Execution.** Each (split, method, setting) is one picklable task with its own seed, run sequentially, on a local
  process pool, or on a Dask cluster; the numbers do not depend on where a task ran (BLAS is limited to one thread
  per task, results are assembled in task order).

References
----------
Krishnan V., Pasqualetti F. (2021), "On direct vs indirect data-driven predictive control", IEEE CDC.
Favoreel W., De Moor B., Gevers M. (1999), "SPC: Subspace predictive control", IFAC World Congress.
Coulson J., Lygeros J., Dörfler F. (2019), "Data-enabled predictive control: in the shallows of the DeePC", ECC.
"""

from __future__ import annotations

import copy
import dataclasses
import hashlib
import json
import math
import os
import platform
import sys
import time
import warnings
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Mapping

import numpy as np
import pandas as pd
from scipy import stats

from ..sysid.exceptions import SessionError, StimsteerError
from ..sysid.metrics import freerun_scores, kstep_scores
from ..sysid.routes import METHODS
from ..sysid.session import Session, TrialSplit
from .limits import StimLimits
from .loop import run_closed_loop
from .mpc import controller_for

__all__ = [
    "MethodSpec",
    "ControlSettings",
    "BenchSettings",
    "BenchResult",
    "InnovationPlant",
    "run_bench",
    "t_interval",
    "recorded_limits",
    "METRICS",
    "MIN_TRAIN_TRIALS",
    "DEFAULT_SCHEDULER_TIMEOUT_S",
]

#: Training trials every split (and every point of the training-data sweep) keeps at least: the routes' own
#: selection folds are made of whole trials and need two of them.
MIN_TRAIN_TRIALS = 2
#: Bounded wait for a Dask scheduler (and for its first worker), seconds.
DEFAULT_SCHEDULER_TIMEOUT_S = 10.0
_ROUTES = ("indirect", "direct")
_NOISE_KEYS = ("process_noise_std", "measurement_noise_std", "drift_amplitude", "drift_step_std")


# ------------------------------------------------------------------------------------------------ settings
@dataclass(frozen=True)
class MethodSpec:
    """One method of one route, with its estimator settings.

    Parameters
    ----------
    route : {"indirect", "direct"}
    method : str
        As registered in :data:`stimsteer.sysid.routes.METHODS` (``arx``, ``subspace``, ``lsq``, ``hankel``).
    settings : mapping, optional
        Constructor arguments of the estimator. ``past_steps`` defaults to the benchmark's; ``horizon_steps`` is
        set by the benchmark (its horizon, or the sweep value) for estimators that take it.
    """

    route: str
    method: str
    settings: Mapping = field(default_factory=dict)

    def __post_init__(self):
        key = (str(self.route), str(self.method))
        if key not in METHODS:
            known = ", ".join(f"{r}/{m}" for r, m in sorted(METHODS))
            raise SessionError(f"unknown route/method {key[0]}/{key[1]}; choose from {known}.")
        if not isinstance(self.settings, Mapping):
            raise SessionError(f"MethodSpec.settings must be a mapping of estimator arguments; got "
                               f"{type(self.settings).__name__}.")
        object.__setattr__(self, "route", key[0])
        object.__setattr__(self, "method", key[1])
        object.__setattr__(self, "settings", dict(self.settings))

    @property
    def label(self) -> str:
        """``"<route> (<method>)"``, e.g. ``"indirect (arx)"``."""
        return f"{self.route} ({self.method})"

    def to_dict(self) -> dict:
        return {"route": self.route, "method": self.method, "settings": _jsonable(self.settings)}


@dataclass(frozen=True)
class ControlSettings:
    """The closed-loop task: a pulse on one output channel, tracked under the declared limits.

    Parameters
    ----------
    n_steps : int, default 100
        Closed-loop samples (after a resting warm-up of the controller's past window).
    target_channel : str or int, optional
        Output channel to steer (name or index); default the first output.
    target_level_std : float, default 1.0
        Pulse height in standard deviations of that channel over the training trials, above its training mean.
    pulse_fraction : (float, float), default (0.25, 0.75)
        The pulse is on from this share of the run to that one; the training mean elsewhere.
    other_output_weight : float, default 0.0
        Tracking weight of the other outputs (towards their training means), relative to the steered one (1).
    input_weight : float, default 1e-3
        Weight of the input energy per µA² in the controllers' cost.
    """

    n_steps: int = 100
    target_channel: object = None
    target_level_std: float = 1.0
    pulse_fraction: tuple = (0.25, 0.75)
    other_output_weight: float = 0.0
    input_weight: float = 1e-3

    def __post_init__(self):
        if not _is_int(self.n_steps) or self.n_steps < 4:
            raise SessionError(f"ControlSettings.n_steps must be an integer >= 4; got {self.n_steps!r}.")
        a, b = (float(v) for v in self.pulse_fraction)
        if not 0.0 <= a < b <= 1.0:
            raise SessionError(f"pulse_fraction must be (start, stop) with 0 <= start < stop <= 1; got "
                               f"{self.pulse_fraction!r}.")
        object.__setattr__(self, "pulse_fraction", (a, b))
        for name in ("target_level_std", "other_output_weight", "input_weight"):
            v = float(getattr(self, name))
            if not math.isfinite(v) or (v < 0 if name != "target_level_std" else False):
                raise SessionError(f"ControlSettings.{name} must be a finite number"
                                   f"{' >= 0' if name != 'target_level_std' else ''}; got {getattr(self, name)!r}.")
            object.__setattr__(self, name, v)

    def to_dict(self) -> dict:
        return _jsonable(dataclasses.asdict(self))


def _default_methods():
    return (MethodSpec("indirect", "subspace"), MethodSpec("direct", "lsq"))


@dataclass(frozen=True)
class BenchSettings:
    """Everything the benchmark does, in one frozen record (stored in every result's provenance).

    Parameters
    ----------
    methods : tuple of MethodSpec, default subspace identification (indirect) and least-squares SPC (direct)
        At least one method per route.
    past_steps : int, default 10
        Past window of every method that takes one (ARX: both lag counts), samples.
    horizon_steps : int, default 20
        Prediction horizon scored, the direct predictors' horizon and the controllers' horizon, samples.
    n_splits : int, default 3
        Repeated seeded splits of whole trials; intervals need at least 2.
    test_fraction : float, default 0.25
        Share of trials held out in each split (at least one).
    control : ControlSettings or None, default ControlSettings()
        The closed-loop task; None skips control.
    train_trials : tuple of int, default (3, 9)
        Training-trial counts of the data-length sweep (a seeded subset of each split's training trials, nested:
        smaller subsets are prefixes of larger ones); counts >= the available training trials are dropped, the
        full training set is always included.
    noise_scales : tuple of float, default (2.0,)
        Noise levels of the noise sweep relative to the plant's (simulated sessions only; 1 is the session itself).
    horizons : tuple of int, default (10,)
        Horizons of the horizon sweep (besides ``horizon_steps``).
    max_windows : int, default 5000
        At most this many k-step windows are scored per task (evenly strided over the held-out trials).
    seed : int, default 0
        Master seed of splits, subsets and closed-loop noise.
    scheduler_timeout_s : float, default 10
        Bounded wait for a Dask scheduler and its first worker.
    """

    methods: tuple = field(default_factory=_default_methods)
    past_steps: int = 10
    horizon_steps: int = 20
    n_splits: int = 3
    test_fraction: float = 0.25
    control: ControlSettings = field(default_factory=ControlSettings)
    train_trials: tuple = (3, 9)
    noise_scales: tuple = (2.0,)
    horizons: tuple = (10,)
    max_windows: int = 5000
    seed: int = 0
    scheduler_timeout_s: float = DEFAULT_SCHEDULER_TIMEOUT_S

    def __post_init__(self):
        methods = tuple(self.methods)
        if not methods or not all(isinstance(m, MethodSpec) for m in methods):
            raise SessionError("BenchSettings.methods must be a non-empty tuple of MethodSpec; got "
                               f"{self.methods!r}.")
        missing = [r for r in _ROUTES if r not in {m.route for m in methods}]
        if missing:
            raise SessionError(f"the benchmark compares both routes; no method given for {missing}. Add e.g. "
                               "MethodSpec('indirect', 'arx') and MethodSpec('direct', 'lsq').")
        labels = [m.label for m in methods]
        if len(set(labels)) != len(labels):
            raise SessionError(f"each route/method may appear once; got {labels}.")
        s = object.__setattr__
        s(self, "methods", methods)
        for name, low in (("past_steps", 1), ("horizon_steps", 1), ("n_splits", 1), ("max_windows", 1)):
            if not _is_int(getattr(self, name)) or getattr(self, name) < low:
                raise SessionError(f"BenchSettings.{name} must be an integer >= {low}; got {getattr(self, name)!r}.")
        if not 0.0 < float(self.test_fraction) < 1.0:
            raise SessionError(f"test_fraction must lie strictly between 0 and 1; got {self.test_fraction!r}.")
        if self.control is not None and not isinstance(self.control, ControlSettings):
            raise SessionError("BenchSettings.control must be a ControlSettings or None.")
        s(self, "train_trials", _int_tuple("train_trials", self.train_trials, MIN_TRAIN_TRIALS))
        s(self, "horizons", _int_tuple("horizons", self.horizons, 1))
        scales = tuple(float(v) for v in self.noise_scales)
        if any(not math.isfinite(v) or v < 0 for v in scales):
            raise SessionError(f"noise_scales must be finite numbers >= 0; got {self.noise_scales!r}.")
        s(self, "noise_scales", tuple(sorted(set(scales))))
        if not _is_int(self.seed) or self.seed < 0:
            raise SessionError(f"seed must be an integer >= 0; got {self.seed!r}.")
        t = float(self.scheduler_timeout_s)
        if not math.isfinite(t) or t <= 0:
            raise SessionError(f"scheduler_timeout_s must be a positive number of seconds; got {t}.")

    @classmethod
    def quick(cls, **changes) -> "BenchSettings":
        """Small settings for a first look and for tests: 2 splits, one point per sweep, 60 control steps."""
        base = dict(n_splits=2, horizon_steps=10, control=ControlSettings(n_steps=60), train_trials=(3,),
                    noise_scales=(2.0,), horizons=(), max_windows=150)
        return cls(**{**base, **changes})

    def replace(self, **changes) -> "BenchSettings":
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        d = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        d["methods"] = [m.to_dict() for m in self.methods]
        d["control"] = None if self.control is None else self.control.to_dict()
        return _jsonable(d)


def _is_int(v) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))


def _int_tuple(name, values, low) -> tuple:
    out = tuple(values)
    if any(not _is_int(v) or v < low for v in out):
        raise SessionError(f"{name} must hold integers >= {low}; got {values!r}.")
    return tuple(sorted(set(int(v) for v in out)))


def _jsonable(value):
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    return value


# ------------------------------------------------------------------------------------------------ statistics
def t_interval(values, level: float = 0.95) -> tuple[float, float, float]:
    """Mean and Student-t confidence interval of repeated measurements.

    Parameters
    ----------
    values : array_like, shape (n,)
        One number per split; NaNs are dropped.
    level : float, default 0.95

    Returns
    -------
    mean, low, high : float
        ``mean ± t_{(1+level)/2, n−1} · s / √n`` with the sample standard deviation ``s`` (ddof = 1); the bounds
        are NaN for fewer than two values.

    Examples
    --------
    >>> m, lo, hi = t_interval([1.0, 2.0, 3.0])
    >>> m, round(hi - m, 4)  # t_{0.975, 2} = 4.3027 times 1 / sqrt(3)
    (2.0, 2.4841)
    """
    v = np.asarray(values, dtype=np.float64).reshape(-1)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return math.nan, math.nan, math.nan
    mean = float(v.mean())
    if v.size < 2:
        return mean, math.nan, math.nan
    half = float(stats.t.ppf(0.5 + level / 2.0, v.size - 1) * v.std(ddof=1) / math.sqrt(v.size))
    return mean, mean - half, mean + half


# ------------------------------------------------------------------------------------------------ plants
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


def _check_plant(plant, session) -> None:
    for attr in ("n_inputs", "n_outputs", "reset", "step"):
        if not hasattr(plant, attr):
            raise SessionError(f"the plant lacks {attr!r}; give an object with the plant interface (see "
                               "stimsteer.control.plants), e.g. load_plant('demo_plant.h5').")
    if (int(plant.n_inputs), int(plant.n_outputs)) != (session.n_inputs, session.n_outputs):
        raise SessionError(f"the plant has {plant.n_inputs} inputs and {plant.n_outputs} outputs; the session "
                           f"{session.n_inputs} and {session.n_outputs}. Give the plant that recorded this session.")
    rate = getattr(plant, "sample_rate_hz", session.sample_rate_hz)
    if abs(float(rate) - session.sample_rate_hz) > 1e-9 * session.sample_rate_hz:
        raise SessionError(f"the plant runs at {float(rate):g} Hz but the session at {session.sample_rate_hz:g} Hz; "
                           "give the plant that recorded this session.")


def _scaled_plant(plant, scale: float):
    if not hasattr(plant, "with_params"):
        raise StimsteerError(f"the noise sweep re-records the session from the plant with scaled noise, which "
                             f"needs a plant with with_params(...); {type(plant).__name__} has none. Pass "
                             "noise_scales=() to skip the sweep.")
    params = plant.get_params()
    changes = {k: np.asarray(params[k], np.float64) * scale for k in _NOISE_KEYS if k in params}
    return plant.with_params(**changes)


def _rerecord(session: Session, plant, scale: float) -> Session:
    """The session's schedule played again through the plant with its noise scaled by ``scale``."""
    from .plants import record_session

    u = np.where(session.mask[:, None], session.u, 0.0)
    start = str(session.metadata.get("trial_start", "continue"))
    rec = record_session(_scaled_plant(plant, scale), u, trials=session.trials,
                         trial_start=start if start in ("continue", "rest") else "continue",
                         input_units=session.input_units, output_units=session.output_units,
                         metadata={**session.metadata, "noise_scale": float(scale)})
    return rec.replace(mask=session.mask, input_names=session.input_names, output_names=session.output_names)


# ------------------------------------------------------------------------------------------------ limits and target
def recorded_limits(session: Session) -> StimLimits:
    """Amplitude limits equal to the range of the recorded inputs (widened to include zero), no slew or budget.

    Used when no limits are declared: the controllers then stay inside the range the routes were fitted on.
    """
    lo, hi = np.zeros(session.n_inputs), np.zeros(session.n_inputs)
    for s, e in session.segments():
        u = session.u[s:e]
        lo, hi = np.minimum(lo, u.min(axis=0)), np.maximum(hi, u.max(axis=0))
    return StimLimits(amplitude_min_ua=lo, amplitude_max_ua=hi, input_names=session.input_names)


def _channel_index(session, channel) -> int:
    if channel is None:
        return 0
    names = list(session.output_names)
    if isinstance(channel, str):
        if channel not in names:
            raise SessionError(f"target channel {channel!r} is not an output of the session; outputs: {names}.")
        return names.index(channel)
    if not _is_int(channel) or not 0 <= int(channel) < len(names):
        raise SessionError(f"target channel index {channel!r} is out of range for {len(names)} outputs.")
    return int(channel)


def _output_stats(train: Session) -> tuple[np.ndarray, np.ndarray]:
    ys = np.concatenate([train.y[s:e] for s, e in train.segments()])
    std = ys.std(axis=0)
    return ys.mean(axis=0), np.where(std > 0, std, 1.0)


def _target(ctrl: ControlSettings, mean, std, c: int, horizon: int) -> np.ndarray:
    """Pulse target, shape (n_steps + horizon − 1, n_outputs): training mean, plus the pulse on channel ``c``."""
    n = ctrl.n_steps + horizon - 1
    target = np.tile(mean, (n, 1))
    a, b = (int(round(f * ctrl.n_steps)) for f in ctrl.pulse_fraction)
    target[a:b, c] += ctrl.target_level_std * std[c]
    return target


# ------------------------------------------------------------------------------------------------ tasks
@dataclass(frozen=True)
class _Setting:
    """One point of the design: training trials (None = all of the split's), noise scale, horizon."""

    n_train: object
    noise_scale: float
    horizon_steps: int


@dataclass(frozen=True)
class _Task:
    """One independent unit of work: fit one method on one split at one setting, score it, control with it."""

    index: int
    split_index: int
    split: TrialSplit
    method_index: int
    setting: _Setting
    train: tuple
    loop_seed: int
    keep_traces: bool


@dataclass(frozen=True)
class _Context:
    """What every task reads (sent once per worker)."""

    token: str
    session: Session
    plant: object
    limits: object
    settings: BenchSettings


_WORKER_CACHE: dict = {}


def _cached(key, make):
    """Per-process cache of deterministic intermediate results (re-recorded sessions, surrogate plants)."""
    if key[0] != _WORKER_CACHE.get("token"):
        _WORKER_CACHE.clear()
        _WORKER_CACHE["token"] = key[0]
    if key not in _WORKER_CACHE:
        _WORKER_CACHE[key] = make()
    return _WORKER_CACHE[key]


def _seed(*parts) -> int:
    return int(np.random.SeedSequence([int(p) for p in parts]).generate_state(1)[0])


def _n_test(n_trials: int, fraction: float) -> int:
    return max(1, int(round(fraction * n_trials)))


def _check_trials(session: Session, st: BenchSettings) -> int:
    n = session.n_trials
    n_test = _n_test(n, st.test_fraction)
    if n - n_test < MIN_TRAIN_TRIALS:
        need = next(k for k in range(2, 10_000) if k - _n_test(k, st.test_fraction) >= MIN_TRAIN_TRIALS)
        raise SessionError(
            f"the benchmark holds out whole trials ({st.test_fraction:g} of them, at least 1) and trains on at "
            f"least {MIN_TRAIN_TRIALS}, so it needs at least {need} trials; this session has {n}. Record more "
            "trials, or cut the recording into trials (Session(trials=...))."
        )
    longest = max((e - s for s, e in session.segments()), default=0)
    need_len = st.past_steps + max((st.horizon_steps, *st.horizons)) + 1
    if longest < need_len:
        raise SessionError(
            f"held-out scoring needs valid runs of past_steps + horizon + 1 = {need_len} samples inside a trial; "
            f"the longest has {longest}. Use a shorter past window or horizon, or record longer trials."
        )
    return n - n_test


def _grid(st: BenchSettings, n_train: int, simulated: bool) -> list:
    base = _Setting(None, 1.0, st.horizon_steps)
    grid = [base]
    grid += [_Setting(k, 1.0, st.horizon_steps) for k in st.train_trials if k < n_train]
    if simulated:
        grid += [_Setting(None, s, st.horizon_steps) for s in st.noise_scales if s != 1.0]
    grid += [_Setting(None, 1.0, h) for h in st.horizons if h != st.horizon_steps]
    return grid


def _splits(session: Session, st: BenchSettings) -> tuple:
    return tuple(session.split(test_fraction=st.test_fraction, seed=_seed(st.seed, 1, i)) for i in range(st.n_splits))


def _tasks(st: BenchSettings, splits, grid) -> list:
    tasks = []
    for i, split in enumerate(splits):
        order = np.random.default_rng(_seed(st.seed, 2, i)).permutation(np.asarray(split.train))
        for setting in grid:
            train = split.train if setting.n_train is None else tuple(sorted(int(t) for t in order[:setting.n_train]))
            loop_seed = _seed(st.seed, 3, i, setting.n_train or 0, round(setting.noise_scale * 1e6),
                              setting.horizon_steps)
            for k in range(len(st.methods)):
                tasks.append(_Task(len(tasks), i, split, k, setting, train, loop_seed,
                                   keep_traces=(i == 0 and setting.n_train is None and setting.noise_scale == 1.0
                                                and setting.horizon_steps == st.horizon_steps)))
    return tasks


# ------------------------------------------------------------------------------------------------ one task
def _run_task(ctx: _Context, task: _Task) -> dict:
    """Run one task with single-threaded BLAS; toolkit errors are returned (recorded), not raised."""
    from threadpoolctl import threadpool_limits

    t0 = time.perf_counter()
    with threadpool_limits(limits=1), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            out = _task_body(ctx, task)
        except StimsteerError as exc:
            out = {"error": f"{type(exc).__name__}: {exc}"}
    out["warnings"] = sorted({str(w.message) for w in caught})
    out["task"] = task.index
    out["total_s"] = time.perf_counter() - t0
    return out


def _session_at(ctx: _Context, scale: float) -> Session:
    if scale == 1.0:
        return ctx.session
    return _cached((ctx.token, "session", scale), lambda: _rerecord(ctx.session, ctx.plant, scale))


def _fit(spec: MethodSpec, train: Session, past: int, horizon: int):
    factory = METHODS[(spec.route, spec.method)]
    settings = {"past_steps": past, **spec.settings}
    params = factory.parameters() if hasattr(factory, "parameters") else ()
    if "horizon_steps" in params:
        settings["horizon_steps"] = int(horizon)
    return factory(settings).fit(train)


def _stride(test: Session, past: int, horizon: int, max_windows: int) -> int:
    n = sum(max(0, e - s - past - horizon + 1) for s, e in test.segments(min_length=past + horizon))
    return max(1, -(-n // max_windows))


def _task_body(ctx: _Context, task: _Task) -> dict:
    st = ctx.settings
    spec, setting = st.methods[task.method_index], task.setting
    session = _session_at(ctx, setting.noise_scale)
    train, test = session.select_trials(task.train), session.select_trials(task.split.test)
    t0 = time.perf_counter()
    predictor = _fit(spec, train, st.past_steps, setting.horizon_steps)
    fit_s = time.perf_counter() - t0
    past, H = int(predictor.past_steps_), setting.horizon_steps
    t0 = time.perf_counter()
    kstep = kstep_scores(predictor, test, horizon_steps=H, stride_steps=_stride(test, past, H, st.max_windows))
    freerun = freerun_scores(predictor, test)
    predict_s = time.perf_counter() - t0
    out = {"kstep": kstep.kstep, "freerun": freerun.freerun, "fit_s": fit_s, "predict_s": predict_s,
           "n_windows": kstep.n_windows, "selection": _selection(predictor), "fingerprint": _fingerprint(predictor)}
    if task.keep_traces:
        out["prediction_trace"] = _prediction_trace(predictor, test, H, _trace_channels(ctx, train))
    if st.control is not None:
        out.update(_control(ctx, task, predictor, session))
    return out


def _selection(predictor) -> str:
    """What the estimator chose on its training trials, as ``name=value`` pairs."""
    names = (("alpha_", "alpha"), ("order_", "order"), ("lambda_g_relative_", "lambda_g"), ("regularizer_", "reg"))
    parts = []
    for attr, short in names:
        v = getattr(predictor, attr, None)
        if v is not None:
            parts.append(f"{short}={v:.3g}" if isinstance(v, float) else f"{short}={v}")
    return ", ".join(parts)


def _fingerprint(obj) -> str:
    """SHA-256 over every fitted attribute (numbers, arrays, tables, nested models): equal iff the fit is equal."""
    h = hashlib.sha256()
    _feed(h, {k: v for k, v in vars(obj).items() if k.endswith("_") and not k.startswith("_")}, 0)
    return h.hexdigest()[:16]


def _feed(h, v, depth) -> None:
    if depth > 4:
        return
    if isinstance(v, np.ndarray):
        h.update(str(v.dtype).encode() + str(v.shape).encode())
        h.update(np.ascontiguousarray(v).tobytes() if v.dtype != object else repr(v.tolist()).encode())
    elif isinstance(v, pd.DataFrame):
        h.update(repr(list(v.columns)).encode())
        for c in v.columns:
            _feed(h, np.asarray(v[c]), depth + 1)
    elif isinstance(v, Mapping):
        for k in sorted(v, key=str):
            h.update(str(k).encode())
            _feed(h, v[k], depth + 1)
    elif isinstance(v, (list, tuple)):
        for x in v:
            _feed(h, x, depth + 1)
    elif dataclasses.is_dataclass(v) and not isinstance(v, type):
        _feed(h, {f.name: getattr(v, f.name) for f in dataclasses.fields(v)}, depth + 1)
    elif isinstance(v, (bool, int, float, str, np.generic)) or v is None:
        h.update(repr(v.item() if isinstance(v, np.generic) else v).encode())
    else:
        h.update(type(v).__name__.encode())


def _trace_channels(ctx: _Context, train: Session) -> list:
    st = ctx.settings
    c = _channel_index(ctx.session, None if st.control is None else st.control.target_channel)
    if train.n_outputs == 1:
        return [c]
    _mean, std = _output_stats(train)
    std = std.copy()
    std[c] = -np.inf
    return [c, int(np.argmax(std))]


def _prediction_trace(predictor, test: Session, H: int, channels) -> pd.DataFrame:
    """Recorded outputs of the longest valid held-out run and their H-step predictions, restarted every H samples.

    Each block ``[t, t + H)`` is predicted from the measured window ``[t − P, t)`` only.
    """
    past = int(predictor.past_steps_)
    segs = test.segments(min_length=past + H)
    if not segs:
        return pd.DataFrame()
    s, e = max(segs, key=lambda ab: ab[1] - ab[0])
    u, y, _mask = test.read(s, e)
    pred = np.full_like(y, np.nan)
    for t in range(past, y.shape[0], H):
        h = min(H, y.shape[0] - t)
        pred[t:t + h] = predictor.predict(u[t - past:t], y[t - past:t], u[t:t + h])
    time_s = np.arange(y.shape[0]) / test.sample_rate_hz
    names = list(test.output_names)
    rows = [pd.DataFrame({"time_s": time_s, "channel": names[c], "recorded": y[:, c], "predicted": pred[:, c]})
            for c in channels]
    src = test.metadata.get("source_trials")
    trial = int(src[int(np.searchsorted(test.trials[:, 0], s, side="right") - 1)]) if src else -1
    return pd.concat(rows, ignore_index=True).assign(trial=trial)


# ------------------------------------------------------------------------------------------------ control
def _controller(predictor, limits, horizon: int, weight, input_weight):
    """The route's predictive controller (:func:`stimsteer.control.mpc.controller_for`), in the outputs' units."""
    return controller_for(predictor, limits, horizon_steps=horizon, output_weight=weight, input_weight=input_weight)


def _surrogate_spec(st: BenchSettings) -> MethodSpec:
    longest = max(int(m.settings.get("past_steps", st.past_steps)) for m in st.methods)
    return MethodSpec("indirect", "arx", {"past_steps": 2 * longest})


def _surrogate(ctx: _Context, task: _Task, session: Session):
    """Ridge ARX of twice the routes' longest past window fitted on the held-out trials, and its quality."""
    def make():
        st = ctx.settings
        test, train = session.select_trials(task.split.test), session.select_trials(task.split.train)
        est = _fit(_surrogate_spec(st), test, st.past_steps, st.horizon_steps)
        model = est.model_
        H = st.horizon_steps
        ks = kstep_scores(est, train, horizon_steps=H, stride_steps=_stride(train, est.past_steps_, H,
                                                                            st.max_windows))
        fr = freerun_scores(est, train)
        quality = {"surrogate": f"ridge ARX, {est.output_lags} output and input lags, fitted on held-out trials",
                   "alpha": est.alpha_, "r2_kstep_mean": float(ks.kstep["r2"].mean()),
                   "r2_last": float(ks.kstep.loc[ks.kstep["step"] == H, "r2"].mean()),
                   "r2_freerun": float(fr.freerun["r2"].mean()), "scored_on": "training trials (unseen by it)"}
        plant = InnovationPlant(model, output_offset=model.info.get("output_offset"), seed=0)
        return plant, quality

    return _cached((ctx.token, "surrogate", task.split_index), make)


def _plant_for(ctx: _Context, task: _Task, session: Session):
    if ctx.plant is None:
        plant, quality = _surrogate(ctx, task, session)
        return copy.deepcopy(plant), quality
    scale = task.setting.noise_scale
    return copy.deepcopy(ctx.plant if scale == 1.0 else _scaled_plant(ctx.plant, scale)), None


def _control(ctx: _Context, task: _Task, predictor, session: Session) -> dict:
    cs = ctx.settings.control
    H = task.setting.horizon_steps
    full_train = session.select_trials(task.split.train)
    limits = ctx.limits if ctx.limits is not None else recorded_limits(full_train)
    mean, std = _output_stats(full_train)
    c = _channel_index(session, cs.target_channel)
    target = _target(cs, mean, std, c, H)
    weight = np.full(session.n_outputs, cs.other_output_weight)
    weight[c] = 1.0
    controller = _controller(predictor, limits, H, weight, cs.input_weight)
    plant, quality = _plant_for(ctx, task, session)
    t0 = time.perf_counter()
    loop = run_closed_loop(controller, plant, n_steps=cs.n_steps, target=target, seed=task.loop_seed)
    control_s = time.perf_counter() - t0
    out = {"loop": _loop_row(loop, c, limits), "control_s": control_s, "surrogate": quality,
           "limits": limits.to_dict()}
    if task.keep_traces:
        out["loop_trace"] = _loop_trace(loop, c, session)
    return out


def _loop_row(loop, c: int, limits) -> dict:
    times = np.asarray(loop.solve_time_s) * 1e3
    return {
        "tracking_rms": float(loop.rms_tracking_error[c]),
        "tracking_rms_all": float(np.sqrt(np.mean(np.asarray(loop.tracking_error) ** 2))),
        "energy_ua2": float(loop.energy_ua2),
        **{f"use_{k}": float(v) for k, v in loop.limit_use.items()},
        **{f"violations_{k}": int(v) for k, v in loop.violations.items()},
        "n_fallback": int(loop.n_fallback),
        "solve_ms_median": float(np.median(times)), "solve_ms_p95": float(np.percentile(times, 95)),
        "solve_ms_max": float(np.max(times)),
    }


def _loop_trace(loop, c: int, session: Session) -> pd.DataFrame:
    n = loop.n_steps
    time_s = np.arange(n) / session.sample_rate_hz
    frames = [pd.DataFrame({"time_s": time_s, "signal": "output", "channel": session.output_names[c],
                            "value": np.asarray(loop.outputs)[:, c]}),
              pd.DataFrame({"time_s": time_s, "signal": "target", "channel": session.output_names[c],
                            "value": np.asarray(loop.targets)[:, c]})]
    for i, name in enumerate(session.input_names):
        frames.append(pd.DataFrame({"time_s": time_s, "signal": "input", "channel": name,
                                    "value": np.asarray(loop.inputs)[:, i]}))
    return pd.concat(frames, ignore_index=True)


# ------------------------------------------------------------------------------------------------ execution
_INSTALLED: dict = {}


def _install(ctx: _Context) -> None:
    _INSTALLED["ctx"] = ctx


def _run_installed(task: _Task) -> dict:
    return _run_task(_INSTALLED["ctx"], task)


def _available_cores() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not on Linux
        return max(1, os.cpu_count() or 1)


def _progress_bar(total: int, enabled: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="stimsteer bench", unit="task", disable=not enabled, file=sys.stderr,
                dynamic_ncols=True, leave=False)


def _run_local(ctx: _Context, tasks, n_workers: int, bar) -> list:
    results = [None] * len(tasks)
    if n_workers <= 1:
        for t in tasks:
            results[t.index] = _run_task(ctx, t)
            bar.update()
        return results
    from concurrent.futures import ProcessPoolExecutor, as_completed

    with ProcessPoolExecutor(max_workers=n_workers, initializer=_install, initargs=(ctx,)) as pool:
        futures = {pool.submit(_run_installed, t): t.index for t in tasks}
        try:
            for fut in as_completed(futures):
                results[futures[fut]] = fut.result()
                bar.update()
        except BaseException:
            pool.shutdown(wait=False, cancel_futures=True)
            raise
    return results


def _connect(address: str, timeout: float):
    try:
        from distributed import Client
    except ImportError:
        raise StimsteerError("running on a Dask cluster (--scheduler) needs Dask's distributed package; install "
                             "the extra: pip install 'stimsteer[dist]'. Or run locally without --scheduler.") from None
    try:
        client = Client(str(address), timeout=f"{timeout}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        raise StimsteerError(
            f"could not reach a Dask scheduler at {address!r} within {timeout:g} s ({exc}). Check the address "
            "(e.g. tcp://host:8786) and that the scheduler is running, or run locally without --scheduler."
        ) from None
    try:
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError) as exc:
        client.close()
        raise StimsteerError(f"the Dask scheduler at {address!r} answered but no worker joined within {timeout:g} s "
                             f"({exc}); start workers (`dask worker {address}`) or run locally.") from None
    return client


def _run_dask(ctx: _Context, tasks, client, bar) -> tuple[list, int]:
    from distributed import as_completed

    results = [None] * len(tasks)
    try:
        ctx_future = client.scatter(ctx, broadcast=True, hash=False)
        futures = [client.submit(_run_task, ctx_future, t, pure=False) for t in tasks]
        index = {f.key: t.index for f, t in zip(futures, tasks)}
        for fut in as_completed(futures, loop=client.loop):
            results[index[fut.key]] = fut.result()
            bar.update()
        n_workers = len(client.scheduler_info().get("workers", {}))
    finally:
        client.close()
    return results, n_workers


def _execute(ctx: _Context, tasks, scheduler, n_workers, progress) -> tuple[list, dict]:
    """Run every task; results come back in task order whatever the order of completion."""
    if scheduler:
        client = _connect(scheduler, ctx.settings.scheduler_timeout_s)
        with _progress_bar(len(tasks), progress) as bar:
            results, used = _run_dask(ctx, tasks, client, bar)
        return results, {"mode": "dask", "scheduler": str(scheduler), "n_workers": used}
    n = _available_cores() if n_workers is None else int(n_workers)
    if n < 1:
        raise SessionError(f"n_workers must be at least 1; got {n_workers!r}.")
    n = min(n, len(tasks))
    with _progress_bar(len(tasks), progress) as bar:
        results = _run_local(ctx, tasks, n, bar)
    return results, {"mode": "sequential" if n <= 1 else "local processes", "n_workers": n}


# ------------------------------------------------------------------------------------------------ tables
#: Task-level figures summarised over splits: name -> True when higher is better.
METRICS = {
    "r2_mean": True, "r2_step1": True, "r2_last": True, "vaf_mean": True, "r2_freerun": True,
    "tracking_rms": False, "energy_ua2": False, "fit_s": False, "predict_ms_per_window": False,
    "solve_ms_median": False,
}
_KEYS = ["task", "split", "label", "route", "method", "n_train_trials", "noise_scale", "horizon_steps"]


def _keys(st: BenchSettings, task: _Task) -> dict:
    spec = st.methods[task.method_index]
    return {"task": task.index, "split": task.split_index, "label": spec.label, "route": spec.route,
            "method": spec.method, "n_train_trials": len(task.train), "noise_scale": task.setting.noise_scale,
            "horizon_steps": task.setting.horizon_steps}


def _task_row(st: BenchSettings, task: _Task, res: dict) -> dict:
    row = {**_keys(st, task), "status": "failed" if "error" in res else "ok", "error": res.get("error", ""),
           "full_train": task.setting.n_train is None, "warnings": " | ".join(res.get("warnings", [])),
           "total_s": res["total_s"]}
    if "error" in res:
        return row
    ks, fr = res["kstep"], res["freerun"]
    H = task.setting.horizon_steps
    row.update(selection=res["selection"], fingerprint=res["fingerprint"], fit_s=res["fit_s"],
               predict_s=res["predict_s"], n_windows=res["n_windows"],
               predict_ms_per_window=1e3 * res["predict_s"] / max(res["n_windows"], 1),
               r2_mean=float(ks["r2"].mean()), r2_step1=float(ks.loc[ks["step"] == 1, "r2"].mean()),
               r2_last=float(ks.loc[ks["step"] == H, "r2"].mean()), vaf_mean=float(ks["vaf"].mean()),
               r2_freerun=float(fr["r2"].mean()), vaf_freerun=float(fr["vaf"].mean()))
    if "loop" in res:
        row.update(res["loop"], control_s=res["control_s"])
    return row


def _prediction_rows(keys: dict, res: dict) -> pd.DataFrame:
    ks = res["kstep"].assign(mode="kstep")
    fr = res["freerun"].assign(mode="freerun", step=0)
    frame = pd.concat([ks, fr[ks.columns]], ignore_index=True)
    return frame.assign(**keys)[[*_KEYS, "mode", "step", "channel", "r2", "vaf", "nrmse", "rmse", "n_samples"]]


def _assemble(st: BenchSettings, tasks, results) -> dict:
    rows, pred, traces_p, traces_l, surrogate = [], [], [], [], {}
    limits = None
    for task, res in zip(tasks, results):
        keys = _keys(st, task)
        rows.append(_task_row(st, task, res))
        if "error" in res:
            continue
        pred.append(_prediction_rows(keys, res))
        if res.get("prediction_trace") is not None and not res["prediction_trace"].empty:
            traces_p.append(res["prediction_trace"].assign(label=keys["label"], route=keys["route"]))
        if res.get("loop_trace") is not None:
            traces_l.append(res["loop_trace"].assign(label=keys["label"], route=keys["route"]))
            limits = res["limits"]
        if res.get("surrogate") is not None:
            surrogate.setdefault(task.split_index, {"split": task.split_index, **res["surrogate"]})
    task_table = pd.DataFrame(rows)
    return {"tasks": task_table, "prediction": _concat(pred), "traces_prediction": _concat(traces_p),
            "traces_loop": _concat(traces_l), "surrogate": pd.DataFrame(list(surrogate.values())),
            "limits": limits}


def _concat(frames) -> pd.DataFrame:
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()


def _columns(table: pd.DataFrame, names) -> pd.DataFrame:
    return table[[c for c in names if c in table.columns]].copy()


def _sweep_members(tasks: pd.DataFrame, st: BenchSettings) -> dict:
    """Rows of the task table belonging to each sweep (the base point belongs to every sweep)."""
    ok = tasks[tasks["status"] == "ok"]
    full, quiet, h0 = ok["full_train"], ok["noise_scale"] == 1.0, ok["horizon_steps"] == st.horizon_steps
    members = {"base": (ok[full & quiet & h0], None),
               "train_trials": (ok[quiet & h0], "n_train_trials"),
               "noise_scale": (ok[full & h0], "noise_scale"),
               "horizon_steps": (ok[full & quiet], "horizon_steps")}
    return {k: v for k, v in members.items() if k == "base" or v[0][v[1]].nunique() > 1}


def _sweeps(tasks: pd.DataFrame, st: BenchSettings) -> pd.DataFrame:
    rows = []
    for sweep, (sub, col) in _sweep_members(tasks, st).items():
        groups = sub.groupby(["label", "route", "method"] + ([col] if col else []), sort=True)
        for key, g in groups:
            for metric in METRICS:
                if metric not in g.columns:
                    continue
                mean, lo, hi = t_interval(g[metric])
                rows.append({"sweep": sweep, "value": float(key[3]) if col else math.nan, "label": key[0],
                             "route": key[1], "method": key[2], "metric": metric, "n": int(g[metric].notna().sum()),
                             "mean": mean, "ci_low": lo, "ci_high": hi})
    return pd.DataFrame(rows, columns=["sweep", "value", "label", "route", "method", "metric", "n", "mean",
                                       "ci_low", "ci_high"])


def _comparison(tasks: pd.DataFrame, st: BenchSettings) -> pd.DataFrame:
    """Paired (same split, same setting) differences direct − indirect for every pair of methods."""
    ind = [m.label for m in st.methods if m.route == "indirect"]
    dirs = [m.label for m in st.methods if m.route == "direct"]
    rows = []
    for sweep, (sub, col) in _sweep_members(tasks, st).items():
        values = sorted(sub[col].unique()) if col else [None]
        for value in values:
            part = sub if col is None else sub[sub[col] == value]
            for a in ind:
                for b in dirs:
                    rows += _paired(part, a, b, sweep, value)
    return pd.DataFrame(rows, columns=["sweep", "value", "indirect", "direct", "metric", "n", "mean_difference",
                                       "ci_low", "ci_high", "better"])


def _paired(part, a, b, sweep, value) -> list:
    rows = []
    for metric, higher in METRICS.items():
        if metric not in part.columns:
            continue
        wide = part.pivot_table(index="split", columns="label", values=metric, aggfunc="mean")
        if a not in wide or b not in wide:
            continue
        d = (wide[b] - wide[a]).dropna()
        mean, lo, hi = t_interval(d)
        if not (np.isfinite(lo) and np.isfinite(hi)) or lo <= 0 <= hi:
            better = "neither"
        else:
            better = "direct" if (mean > 0) == higher else "indirect"
        rows.append({"sweep": sweep, "value": math.nan if value is None else float(value), "indirect": a,
                     "direct": b, "metric": metric, "n": int(d.size), "mean_difference": mean, "ci_low": lo,
                     "ci_high": hi, "better": better})
    return rows


# ------------------------------------------------------------------------------------------------ result
@dataclass(frozen=True)
class BenchResult:
    """Everything a benchmark run found, as tidy tables (one row per observation), with its provenance.

    Attributes
    ----------
    settings : BenchSettings
    splits : tuple of TrialSplit
        The seeded splits (training and held-out trial indices, seed), the same for every route.
    prediction : pandas.DataFrame
        Per task, step ahead and channel: ``mode`` (``kstep``; ``freerun`` with ``step`` 0), ``r2``, ``vaf`` (%),
        ``nrmse``, ``rmse`` (channel unit), ``n_samples``; keys ``task, split, label, route, method,
        n_train_trials, noise_scale, horizon_steps``.
    control : pandas.DataFrame
        Per task: ``tracking_rms`` (steered channel, its unit), ``tracking_rms_all``, ``energy_ua2`` (Σ u², µA²),
        ``use_<limit>`` (share of steps a hard limit was binding), ``violations_<limit>``, ``n_fallback``,
        ``solve_ms_median``/``_p95``/``_max`` (per step, ms), ``plant``.
    sweeps : pandas.DataFrame
        Per sweep (``base``, ``train_trials``, ``noise_scale``, ``horizon_steps``), value, method and metric:
        ``n`` splits, ``mean`` and the 95 % t-interval ``ci_low``, ``ci_high``.
    comparison : pandas.DataFrame
        Paired differences direct − indirect per sweep point and metric with their t-interval and ``better``
        (``direct``, ``indirect`` or ``neither`` when the interval contains 0).
    timings : pandas.DataFrame
        Per task: ``fit_s``, ``predict_s``, ``predict_ms_per_window``, ``control_s``, ``solve_ms_median``,
        ``total_s`` (seconds unless named ms).
    fits : pandas.DataFrame
        Per task: what the estimator selected on its training trials (``selection``), a ``fingerprint`` of all
        fitted values, warnings.
    tasks : pandas.DataFrame
        One row per task with every scalar figure and its status (``ok`` or ``failed`` with ``error``).
    surrogate : pandas.DataFrame
        Recordings only: per split, the surrogate plant and its fit quality on the trials it did not see.
    traces : dict of str to pandas.DataFrame
        ``prediction`` (recorded vs H-step predictions on a held-out trial) and ``closed_loop`` (outputs, target,
        inputs) of the first split at the base setting.
    limits : dict
        The limits of the first split's closed loops (:meth:`StimLimits.to_dict`) and their ``source``.
    plant : str
        ``"ground truth"`` or ``"surrogate"``.
    provenance : dict
        Session hash and description, settings, seed, splits, execution, package versions, time.
    """

    settings: BenchSettings
    splits: tuple
    prediction: pd.DataFrame
    control: pd.DataFrame
    sweeps: pd.DataFrame
    comparison: pd.DataFrame
    timings: pd.DataFrame
    fits: pd.DataFrame
    tasks: pd.DataFrame
    surrogate: pd.DataFrame
    traces: Mapping
    limits: Mapping
    plant: str
    provenance: Mapping

    def tables(self) -> dict:
        """The result tables by name (what the report writes as CSV and JSON)."""
        return {"prediction": self.prediction, "control": self.control, "sweeps": self.sweeps,
                "comparison": self.comparison, "timings": self.timings, "fits": self.fits, "tasks": self.tasks,
                "surrogate": self.surrogate, "traces_prediction": self.traces.get("prediction", pd.DataFrame()),
                "traces_closed_loop": self.traces.get("closed_loop", pd.DataFrame())}

    @property
    def failures(self) -> pd.DataFrame:
        """Tasks that raised a toolkit error (e.g. too few training trials for a method), with the message."""
        if self.tasks.empty or "status" not in self.tasks:
            return pd.DataFrame()
        return self.tasks.loc[self.tasks["status"] == "failed", [*_KEYS, "error"]]


def _versions(execution: dict) -> dict:
    from importlib.metadata import PackageNotFoundError, version

    names = ["stimsteer", "numpy", "scipy", "pandas", "scikit-learn", "cvxpy", "osqp", "clarabel", "h5py",
             "matplotlib", "tqdm", "threadpoolctl"]
    if execution.get("mode") == "dask":
        names += ["dask", "distributed"]
    out = {"python": platform.python_version()}
    for n in names:
        try:
            out[n] = version(n)
        except PackageNotFoundError:
            out[n] = "not installed"
    return out


def _session_record(session: Session) -> dict:
    return {"content_hash": session.content_hash(), "n_samples": session.n_samples, "n_trials": session.n_trials,
            "sample_rate_hz": session.sample_rate_hz, "input_names": list(session.input_names),
            "input_units": list(session.input_units), "output_names": list(session.output_names),
            "output_units": list(session.output_units),
            "simulated_flag": bool(session.metadata.get("simulated", False))}


def _plant_text(st: BenchSettings, plant) -> str:
    if plant is not None:
        return f"ground truth: {type(plant).__name__}"
    lags = _surrogate_spec(st).settings["past_steps"]
    return f"surrogate: ridge ARX with {lags} output and input lags, fitted on each split's held-out trials"


def _provenance(session, st, splits, plant, limits, execution, started, wall_s, source, n_failed) -> dict:
    return _jsonable({
        "tool": "stimsteer bench", "session": _session_record(session), "settings": st.to_dict(), "seed": st.seed,
        "splits": [s.as_dict() for s in splits],
        "plant": _plant_text(st, plant),
        "limits_source": "declared" if limits is not None else "recorded input range of each split's training trials",
        "execution": execution, "versions": _versions(execution), "started_utc": started,
        "wall_time_s": wall_s, "n_failed_tasks": n_failed, "source": dict(source or {}),
        "interval": "95 % Student-t interval over splits: mean ± t(0.975, n−1)·s/√n; differences paired by split",
    })


def _as_session(session) -> Session:
    if isinstance(session, Session):
        return session
    if hasattr(session, "to_session"):
        return session.to_session()
    raise SessionError(f"run_bench needs a stimsteer Session (load it with stimsteer.sysid.io.load_session); got "
                       f"{type(session).__name__}.")


def _check_base(st: BenchSettings, tasks: pd.DataFrame) -> None:
    base = tasks[tasks["full_train"] & (tasks["noise_scale"] == 1.0) & (tasks["horizon_steps"] == st.horizon_steps)]
    for label, g in base.groupby("label"):
        if (g["status"] == "failed").all():
            raise StimsteerError(f"{label} failed on every split of the benchmark; first error: {g['error'].iloc[0]}")


def _token(session: Session, st: BenchSettings, plant) -> str:
    text = json.dumps([session.content_hash(), st.to_dict(), repr(plant)], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def run_bench(session, settings: BenchSettings | None = None, *, plant=None, limits: StimLimits | None = None,
              out_dir=None, force: bool = False, scheduler: str | None = None, n_workers: int | None = None,
              progress: bool = True, source: Mapping | None = None) -> BenchResult:
    """Benchmark both routes on the same held-out trials: prediction, closed-loop control, sweeps, compute time.

    Parameters
    ----------
    session : Session
        The recording (or simulated session). Never modified.
    settings : BenchSettings, optional
        Default ``BenchSettings()``; ``BenchSettings.quick()`` for a fast look.
    plant : plant, optional
        The ground-truth plant of a simulated session (e.g. ``load_plant("demo_plant.h5")``): closed loops run on it
        and the noise sweep re-records from it. Without it, closed loops run on a surrogate fitted on the held-out
        trials and there is no noise sweep.
    limits : StimLimits, optional
        Declared stimulation limits; default the recorded input range of each split's training trials.
    out_dir : str or Path, optional
        When given, checked before any work (new or empty, or ``force``) and the report is written there at the
        end (:func:`stimsteer.control.report.write_report`).
    force : bool, default False
        Replace an existing ``out_dir`` whole.
    scheduler : str, optional
        Address of a Dask scheduler (``tcp://host:8786``) to run the tasks on; default local.
    n_workers : int, optional
        Local processes; default all available cores; 1 runs in this process. Ignored with ``scheduler``.
    progress : bool, default True
        Show a progress bar on stderr.
    source : mapping, optional
        Extra provenance (e.g. the session and plant file names).

    Returns
    -------
    BenchResult

    Raises
    ------
    SessionError
        Fewer trials than a split needs (the message says how many), trials too short for the windows, bad
        settings, a plant that does not match the session.
    StimsteerError
        An unreachable Dask scheduler (after ``settings.scheduler_timeout_s``), an ``out_dir`` holding another
        run without ``force``, or a method that failed on every split.

    Notes
    -----
    The same ``settings`` (seed included) give the same numbers sequentially, on local processes or on Dask; only
    the timing columns differ.
    """
    st = BenchSettings() if settings is None else settings
    if not isinstance(st, BenchSettings):
        raise SessionError(f"settings must be a BenchSettings; got {type(st).__name__}.")
    session = _as_session(session)
    if out_dir is not None:
        from .report import check_out_dir

        check_out_dir(out_dir, force=force)
    if plant is not None:
        _check_plant(plant, session)
    if limits is not None and not isinstance(limits, StimLimits):
        raise SessionError(f"limits must be a StimLimits (see stimsteer.control.limits.load_limits); got "
                           f"{type(limits).__name__}.")
    if limits is not None:
        limits.aligned(session.input_names, session.output_names)  # LimitsError now, not in every task
    n_train = _check_trials(session, st)
    splits = _splits(session, st)
    tasks = _tasks(st, splits, _grid(st, n_train, simulated=plant is not None))
    ctx = _Context(_token(session, st, plant), session, plant, limits, st)
    started, t0 = datetime.now(timezone.utc).isoformat(timespec="seconds"), time.perf_counter()
    results, execution = _execute(ctx, tasks, scheduler, n_workers, progress)
    result = _result(st, session, plant, limits, splits, tasks, results, execution, started,
                     time.perf_counter() - t0, source)
    if out_dir is not None:
        from .report import write_report

        write_report(result, out_dir, force=force)
    return result


def _result(st, session, plant, limits, splits, tasks, results, execution, started, wall_s, source) -> BenchResult:
    parts = _assemble(st, tasks, results)
    table = parts["tasks"]
    _check_base(st, table)
    ok = table[table["status"] == "ok"]
    control_cols = [*_KEYS, "tracking_rms", "tracking_rms_all", "energy_ua2"] + \
        [c for c in ok.columns if c.startswith(("use_", "violations_"))] + \
        ["n_fallback", "solve_ms_median", "solve_ms_p95", "solve_ms_max"]
    control = _columns(ok, control_cols) if st.control is not None else pd.DataFrame()
    if not control.empty:
        control["plant"] = "ground truth" if plant is not None else "surrogate"
    lim = dict(parts["limits"] or {})
    lim["source"] = "declared" if limits is not None else "recorded input range (training trials)"
    return BenchResult(
        settings=st, splits=tuple(splits), prediction=parts["prediction"], control=control,
        sweeps=_sweeps(table, st), comparison=_comparison(table, st),
        timings=_columns(ok, [*_KEYS, "fit_s", "predict_s", "n_windows", "predict_ms_per_window", "control_s",
                              "solve_ms_median", "solve_ms_p95", "total_s"]),
        fits=_columns(table, [*_KEYS, "status", "selection", "fingerprint", "fit_s", "warnings"]),
        tasks=table, surrogate=parts["surrogate"],
        traces={"prediction": parts["traces_prediction"], "closed_loop": parts["traces_loop"]}, limits=lim,
        plant="ground truth" if plant is not None else "surrogate",
        provenance=_provenance(session, st, splits, plant, limits, execution, started, wall_s, source,
                               int((table["status"] == "failed").sum())),
    )
