"""The study's settings in one frozen record: the methods, the windows, the splits, the analyses and the margin.

Every value is checked when the record is made (:class:`~stimsteer.sysid.InvalidParameterError` names the setting
and the fix), and the record is stored whole in the result's provenance and in every cached task's key.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field
from pathlib import PurePath

from ...sysid import InvalidParameterError
from ...sysid._records import jsonable
from ..evaluation import ControlSettings, MethodSpec
from ..limits import StimLimits, load_limits

__all__ = ["StudySettings", "ANALYSES", "OFFSETS", "parse_method"]

#: The analyses a study can run (see :mod:`stimsteer.control.study`).
ANALYSES = ("sessions", "days", "subjects", "sites")
#: How session-level output offsets are handled: ``remove`` subtracts each session's own per-channel output mean
#: (estimated on that session's training trials of the split, never on scored trials); ``none`` keeps them.
OFFSETS = ("remove", "none")


def parse_method(text) -> MethodSpec:
    """``"indirect/subspace"`` (or a :class:`MethodSpec`) as a :class:`MethodSpec`."""
    if isinstance(text, MethodSpec):
        return text
    parts = str(text).split("/")
    if len(parts) != 2:
        raise InvalidParameterError(f"a study method is written route/method, e.g. 'indirect/subspace' or "
                                    f"'direct/lsq'; got {text!r}.")
    return MethodSpec(parts[0].strip(), parts[1].strip())


def _default_methods():
    return (MethodSpec("indirect", "subspace"), MethodSpec("direct", "lsq"))


@dataclass(frozen=True)
class StudySettings:
    """What a study computes, in one frozen record.

    Parameters
    ----------
    methods : tuple of MethodSpec or "route/method" strings, default subspace (indirect) and lsq (direct)
        At least one per route for the route verdict.
    past_steps : int, default 10
        Past window of every method, samples.
    horizon_steps : int, default 10
        Steps ahead scored (and the direct predictors' horizon), samples.
    n_splits : int, default 3
        Seeded splits of each session's whole trials into training and held-out trials.
    test_fraction : float, default 0.25
        Share of a session's trials held out per split (at least one).
    min_trials : int, default 4
        A session with fewer trials is excluded by name (reported, never silently); a subject left without
        sessions is excluded too.
    offsets : {"remove", "none"}, default "remove"
        Session-level output offsets: ``remove`` centres every session's outputs on the mean of its own training
        trials of the split (the scored trials never inform it), so a model fitted on one day is not charged
        for another day's baseline shift; ``none`` keeps the raw outputs.
    analyses : tuple of str, default all of :data:`ANALYSES`
    channels : tuple of str, optional
        Explicit common subset of channel names (inputs and outputs) kept from every session; required when
        sessions of a subject (or subjects pooled together) record different channel sets.
    max_windows : int, default 2000
        At most this many k-step windows scored per task (evenly strided).
    margin_abs, margin_rel : float, default 1e-3 and 0.01
        Practical margin of a difference of R²: ``max(margin_abs, margin_rel * |reference R²|)``, the same rule as
        the single-session benchmark.
    seed : int, default 0
        Master seed of every split and subset.
    max_retries : int, default 2
        Times a task whose worker died is submitted again before the study fails.
    scheduler_timeout_s : float, default 10
    control : ControlSettings, mapping or None, default ControlSettings()
        The closed-loop part of the per-session analysis (the single-session benchmark's closed-loop task): each
        per-session fit tracks a pulse on a surrogate plant of its session (a ridge ARX fitted on the held-out
        trials), inside the amplitude range recorded on the training trials; None (or ``false`` in a study file)
        scores prediction only. A mapping gives :class:`~stimsteer.control.evaluation.ControlSettings` fields.
    limits : StimLimits, mapping, path or None, default None
        Declared stimulation limits for the closed loops (the limits file of ``stimsteer plan`` and ``bench``, a
        mapping in its layout, or its path): every per-session loop is planned inside them, matched to each
        session's inputs by name. None keeps each loop inside the input range recorded on its training trials.
        Soft output bounds apply to the outputs as the loop sees them (centred on the training trials' mean when
        ``offsets="remove"``).

    Raises
    ------
    InvalidParameterError
        A value out of its range (the message names it).
    """

    methods: tuple = field(default_factory=_default_methods)
    past_steps: int = 10
    horizon_steps: int = 10
    n_splits: int = 3
    test_fraction: float = 0.25
    min_trials: int = 4
    offsets: str = "remove"
    analyses: tuple = ANALYSES
    channels: tuple = None
    max_windows: int = 2000
    margin_abs: float = 1e-3
    margin_rel: float = 0.01
    seed: int = 0
    max_retries: int = 2
    scheduler_timeout_s: float = 10.0
    control: ControlSettings = field(default_factory=ControlSettings)
    limits: StimLimits = None

    def __post_init__(self):
        object.__setattr__(self, "control", _control(self.control))
        object.__setattr__(self, "limits", _limits(self.limits))
        methods = tuple(parse_method(m) for m in (self.methods or ()))
        if not methods or len({m.label for m in methods}) != len(methods):
            raise InvalidParameterError(f"StudySettings.methods must name each route/method once; got {methods!r}.")
        object.__setattr__(self, "methods", methods)
        for name, low in (("past_steps", 1), ("horizon_steps", 1), ("n_splits", 1), ("min_trials", 2),
                          ("max_windows", 1), ("max_retries", 0), ("seed", 0)):
            v = getattr(self, name)
            if isinstance(v, bool) or not isinstance(v, int) or v < low:
                raise InvalidParameterError(f"StudySettings.{name} must be an integer >= {low}; got {v!r}.")
        if not 0.0 < float(self.test_fraction) < 1.0:
            raise InvalidParameterError(f"test_fraction must lie strictly between 0 and 1; got {self.test_fraction!r}.")
        if self.offsets not in OFFSETS:
            raise InvalidParameterError(f"offsets must be one of {OFFSETS}; got {self.offsets!r}.")
        analyses = tuple(str(a) for a in self.analyses)
        unknown = sorted(set(analyses) - set(ANALYSES))
        if unknown or not analyses:
            raise InvalidParameterError(f"unknown analyses {unknown or analyses}; choose from {ANALYSES}.")
        object.__setattr__(self, "analyses", tuple(a for a in ANALYSES if a in analyses))
        if self.channels is not None:
            chans = tuple(str(c) for c in self.channels)
            if not chans or len(set(chans)) != len(chans):
                raise InvalidParameterError(f"channels must be a non-empty list of distinct names; got "
                                            f"{self.channels!r}.")
            object.__setattr__(self, "channels", chans)
        for name in ("margin_abs", "margin_rel", "scheduler_timeout_s"):
            v = float(getattr(self, name))
            if not math.isfinite(v) or v < 0 or (name == "scheduler_timeout_s" and v == 0):
                raise InvalidParameterError(f"StudySettings.{name} must be a finite number >= 0; got {v!r}.")

    @classmethod
    def quick(cls, **changes) -> "StudySettings":
        """Small settings for a first look and for tests: 2 splits, past 6, horizon 5, 300 windows, 60 loop steps."""
        base = dict(n_splits=2, past_steps=6, horizon_steps=5, max_windows=300, control=ControlSettings(n_steps=60))
        return cls(**{**base, **changes})

    def replace(self, **changes) -> "StudySettings":
        return dataclasses.replace(self, **changes)

    def margin(self, reference_r2: float) -> float:
        """The practical margin of an R² difference against a reference R²."""
        ref = abs(float(reference_r2)) if math.isfinite(float(reference_r2)) else 0.0
        return max(float(self.margin_abs), float(self.margin_rel) * ref)

    def task_dict(self) -> dict:
        """The settings a task's numbers depend on (its cache key); execution settings are left out."""
        d = self.to_dict()
        for name in ("analyses", "max_retries", "scheduler_timeout_s", "margin_abs", "margin_rel", "min_trials"):
            d.pop(name)
        if d["limits"] is None:
            d.pop("limits")  # the keys of studies without declared limits stay those of earlier versions
        return d

    def to_dict(self) -> dict:
        d = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        d["methods"] = [m.to_dict() for m in self.methods]
        d["control"] = None if self.control is None else self.control.to_dict()
        d["limits"] = None if self.limits is None else self.limits.to_dict()
        return jsonable(d)


def _control(value):
    if value is None or value is False:
        return None
    if isinstance(value, ControlSettings):
        return value
    if value is True:
        return ControlSettings()
    if isinstance(value, dict):
        try:
            return ControlSettings(**value)
        except TypeError as exc:
            raise InvalidParameterError(f"StudySettings.control: {exc}; give fields of ControlSettings (n_steps, "
                                        "target_channel, target_level_std, pulse_fraction, ...).") from None
    raise InvalidParameterError(f"StudySettings.control must be a ControlSettings, a mapping of its fields, or "
                                f"None/false to score prediction only; got {value!r}.")


def _limits(value):
    if value is None or isinstance(value, StimLimits):
        return value
    if isinstance(value, dict):
        return StimLimits.from_dict(value)
    if isinstance(value, (str, PurePath)):
        return load_limits(value)
    raise InvalidParameterError(f"StudySettings.limits must be a StimLimits, a mapping in the limits file's layout, "
                                f"a limits file's path, or None; got {type(value).__name__}.")
