"""The benchmark's design: seeded splits of whole trials, the grid of settings, and one picklable task per point.

Each (split, method, setting) is one independent :class:`_Task` with its own seeds; what every task reads (the
session, the plant, the limits, the settings) travels once per worker as a :class:`_Context`. Deterministic
intermediate results that several tasks share (re-recorded sessions, surrogate plants) are kept in a per-process
cache keyed by the run's token, so the numbers do not depend on which worker ran a task.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...sysid import Session, SessionError, StimsteerError, TrialSplit, make_estimator
from .settings import MIN_TRAIN_TRIALS, BenchSettings, MethodSpec


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
    #: the split's route choice (:func:`~.task_body.route_choice_of`) when the runner computed it before the task
    #: (once per split on a local pool); None: the task computes it (cached per process)
    choice: object = None


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



def fit_groups(st: BenchSettings, tasks) -> list:
    """The tasks as groups that fit the same model: same method, noise scale and training trials, and the same
    estimator settings once the benchmark's past window and horizon are applied (a method that takes no horizon,
    e.g. ridge ARX or subspace identification, fits the same model at every point of the horizon sweep).

    Groups keep the task order inside and are listed in the order of their first task; a task whose settings
    cannot be compared exactly (a value of another type than numbers, strings, arrays and their containers) is a
    group of its own. Fitting is deterministic, so a group's tasks give the numbers they give alone.
    """
    groups: dict = {}
    for task in tasks:
        key = _fit_key(st, task)
        groups.setdefault(("task", task.index) if key is None else key, []).append(task)
    return list(groups.values())


def _fit_key(st: BenchSettings, task) -> object:
    spec = st.methods[task.method_index]
    try:
        params = make_estimator(spec.route, spec.method, spec.settings, past_steps=st.past_steps,
                                horizon_steps=task.setting.horizon_steps).get_params(deep=False)
    except StimsteerError:  # the task itself reports what is wrong with its settings
        return None
    settings = _exact(params)
    if settings is None:
        return None
    return (task.method_index, task.split_index, float(task.setting.noise_scale),
            tuple(int(t) for t in task.train), settings)


def _exact(value) -> object:
    """A hashable value equal for equal settings and different for different ones; None where that cannot be said."""
    if value is None or isinstance(value, (bool, int, float, str, np.generic)):
        return (type(value).__name__, repr(value.item() if isinstance(value, np.generic) else value))
    if isinstance(value, np.ndarray) and value.dtype != object:
        return ("ndarray", str(value.dtype), value.shape, value.tobytes())
    if isinstance(value, (list, tuple)):
        items = [_exact(v) for v in value]
        return None if any(i is None for i in items) else (type(value).__name__, tuple(items))
    if isinstance(value, dict) and all(isinstance(k, str) for k in value):
        items = [(k, _exact(value[k])) for k in sorted(value)]
        return None if any(i is None for _, i in items) else ("dict", tuple(items))
    return None


def _fit(spec: MethodSpec, train: Session, past: int, horizon: int):
    """``spec``'s estimator fitted on ``train``: ``past_steps`` by default, the benchmark's ``horizon_steps``."""
    return make_estimator(spec.route, spec.method, spec.settings, past_steps=past, horizon_steps=horizon).fit(train)
