"""The benchmark's settings: the methods compared, the closed-loop task, the splits and sweeps, in frozen records.

Every setting is checked when the record is made, so a bad value fails at once with
:class:`~stimsteer.sysid.InvalidParameterError` (never half-way through a run), and the record is stored whole in
every result's provenance (:meth:`BenchSettings.to_dict`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from ...sysid import METHODS, InvalidParameterError
from ...sysid._records import jsonable

__all__ = ["MethodSpec", "ControlSettings", "BenchSettings", "MIN_TRAIN_TRIALS", "DEFAULT_SCHEDULER_TIMEOUT_S"]

#: Training trials every split (and every point of the training-data sweep) keeps at least: the routes' own
#: selection folds are made of whole trials and need two of them.
MIN_TRAIN_TRIALS = 2
#: Bounded wait for a Dask scheduler (and for its first worker), seconds.
DEFAULT_SCHEDULER_TIMEOUT_S = 10.0
_ROUTES = ("indirect", "direct")


@dataclass(frozen=True)
class MethodSpec:
    """One method of one route, with its estimator settings.

    Parameters
    ----------
    route : {"indirect", "direct"}
    method : str
        As registered in :data:`stimsteer.sysid.METHODS` (``arx``, ``subspace``, ``lsq``, ``hankel``).
    settings : mapping, optional
        Constructor arguments of the estimator. ``past_steps`` defaults to the benchmark's. ``horizon_steps`` is
        not a method setting: the benchmark sets it (its horizon, or the sweep value) for estimators that take it.

    Raises
    ------
    InvalidParameterError
        An unregistered route/method, settings that are not a mapping, or settings that give ``horizon_steps``.
    """

    route: str
    method: str
    settings: Mapping = field(default_factory=dict)

    def __post_init__(self):
        key = (str(self.route), str(self.method))
        if key not in METHODS:
            known = ", ".join(f"{r}/{m}" for r, m in sorted(METHODS))
            raise InvalidParameterError(f"unknown route/method {key[0]}/{key[1]}; choose from {known}.")
        if not isinstance(self.settings, Mapping):
            raise InvalidParameterError(f"MethodSpec.settings must be a mapping of estimator arguments; got "
                                        f"{type(self.settings).__name__}.")
        if "horizon_steps" in self.settings:
            raise InvalidParameterError(
                f"MethodSpec.settings gives horizon_steps={self.settings['horizon_steps']!r}, but the benchmark sets "
                "every method's horizon itself; remove it and use BenchSettings(horizon_steps=..., horizons=...).")
        object.__setattr__(self, "route", key[0])
        object.__setattr__(self, "method", key[1])
        object.__setattr__(self, "settings", dict(self.settings))

    @property
    def label(self) -> str:
        """``"<route> (<method>)"``, e.g. ``"indirect (arx)"``."""
        return f"{self.route} ({self.method})"

    def to_dict(self) -> dict:
        return {"route": self.route, "method": self.method, "settings": jsonable(self.settings)}


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

    Raises
    ------
    InvalidParameterError
        A value out of its range (the message names it).
    """

    n_steps: int = 100
    target_channel: object = None
    target_level_std: float = 1.0
    pulse_fraction: tuple = (0.25, 0.75)
    other_output_weight: float = 0.0
    input_weight: float = 1e-3

    def __post_init__(self):
        if not _is_int(self.n_steps) or self.n_steps < 4:
            raise InvalidParameterError(f"ControlSettings.n_steps must be an integer >= 4; got {self.n_steps!r}.")
        a, b = (float(v) for v in self.pulse_fraction)
        if not 0.0 <= a < b <= 1.0:
            raise InvalidParameterError(f"pulse_fraction must be (start, stop) with 0 <= start < stop <= 1; got "
                                        f"{self.pulse_fraction!r}.")
        object.__setattr__(self, "pulse_fraction", (a, b))
        for name in ("target_level_std", "other_output_weight", "input_weight"):
            v = float(getattr(self, name))
            if not math.isfinite(v) or (v < 0 if name != "target_level_std" else False):
                raise InvalidParameterError(
                    f"ControlSettings.{name} must be a finite number{' >= 0' if name != 'target_level_std' else ''}; "
                    f"got {getattr(self, name)!r}.")
            object.__setattr__(self, name, v)

    def to_dict(self) -> dict:
        return jsonable(dataclasses.asdict(self))


def _default_methods():
    # every registered method of each route (ridge ARX and subspace; least squares and Hankel): a route is then
    # represented by its best method on the training trials (tables._with_best), not by one chosen in advance
    # methods whose class sets ``in_default_bench = False`` (the nonlinear, recursive and ensemble methods, slower;
    # closed-loop identification, for data recorded under feedback, which the bench's designed inputs are not) take
    # part when named: BenchSettings(methods=(..., MethodSpec("indirect", "hammerstein"))) or bench --methods
    return tuple(MethodSpec(r, m) for r, m in sorted(METHODS, key=lambda k: (k[0] != "indirect", k[1]))
                 if getattr(METHODS[(r, m)].cls(), "in_default_bench", True))


@dataclass(frozen=True)
class BenchSettings:
    """Everything the benchmark does, in one frozen record (stored in every result's provenance).

    Parameters
    ----------
    methods : tuple of MethodSpec, default every registered method of each route
        At least one method per route. With several methods on a route, each split also represents the route by
        its best method on the training trials (nested: a fit on part of them, scored on the rest).
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

    Raises
    ------
    InvalidParameterError
        A value out of its range, or a route without a method (the message names what to change).
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
        object.__setattr__(self, "methods", _check_methods(self.methods))
        for name, low in (("past_steps", 1), ("horizon_steps", 1), ("n_splits", 1), ("max_windows", 1)):
            if not _is_int(getattr(self, name)) or getattr(self, name) < low:
                raise InvalidParameterError(f"BenchSettings.{name} must be an integer >= {low}; got "
                                            f"{getattr(self, name)!r}.")
        if not 0.0 < float(self.test_fraction) < 1.0:
            raise InvalidParameterError(f"test_fraction must lie strictly between 0 and 1; got "
                                        f"{self.test_fraction!r}.")
        if self.control is not None and not isinstance(self.control, ControlSettings):
            raise InvalidParameterError("BenchSettings.control must be a ControlSettings or None.")
        object.__setattr__(self, "train_trials", _int_tuple("train_trials", self.train_trials, MIN_TRAIN_TRIALS))
        object.__setattr__(self, "horizons", _int_tuple("horizons", self.horizons, 1))
        scales = tuple(float(v) for v in self.noise_scales)
        if any(not math.isfinite(v) or v < 0 for v in scales):
            raise InvalidParameterError(f"noise_scales must be finite numbers >= 0; got {self.noise_scales!r}.")
        object.__setattr__(self, "noise_scales", tuple(sorted(set(scales))))
        if not _is_int(self.seed) or self.seed < 0:
            raise InvalidParameterError(f"seed must be an integer >= 0; got {self.seed!r}.")
        t = float(self.scheduler_timeout_s)
        if not math.isfinite(t) or t <= 0:
            raise InvalidParameterError(f"scheduler_timeout_s must be a positive number of seconds; got {t}.")

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
        return jsonable(d)


def _check_methods(methods) -> tuple:
    methods = tuple(methods)
    if not methods or not all(isinstance(m, MethodSpec) for m in methods):
        raise InvalidParameterError(f"BenchSettings.methods must be a non-empty tuple of MethodSpec; got {methods!r}.")
    missing = [r for r in _ROUTES if r not in {m.route for m in methods}]
    if missing:
        raise InvalidParameterError(f"the benchmark compares both routes; no method given for {missing}. Add e.g. "
                                    "MethodSpec('indirect', 'arx') and MethodSpec('direct', 'lsq').")
    labels = [m.label for m in methods]
    if len(set(labels)) != len(labels):
        raise InvalidParameterError(f"each route/method may appear once; got {labels}.")
    return methods


def _is_int(v) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, (bool, np.bool_))


def _int_tuple(name, values, low) -> tuple:
    out = tuple(values)
    if any(not _is_int(v) or v < low for v in out):
        raise InvalidParameterError(f"{name} must hold integers >= {low}; got {values!r}.")
    return tuple(sorted(set(int(v) for v in out)))
