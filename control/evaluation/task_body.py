"""One task of the benchmark: fit one method on one split at one setting, score it on the held-out trials, and
steer the plant with it.

A task runs with single-threaded BLAS, so its numbers do not depend on where it ran; a toolkit error is returned as
the task's result (recorded, not raised), so one failed fit never stops the run.
"""

from __future__ import annotations

import contextlib
import copy
import dataclasses
import hashlib
import time
import warnings
from typing import Mapping

import numpy as np
import pandas as pd

from ...sysid import Session, StimsteerError, freerun_scores, kstep_scores
from ...sysid._lagged import blas_controller
from ...sysid._records import window_stride
from .closed_loop import _channel_index, _control, _output_stats, _rerecord
from .tasks import _cached, _Context, _fit, _seed, _Task


def one_thread():
    """Single-threaded BLAS/OpenMP for the duration of a ``with`` (every task of the benchmark and of a study).

    Through the process's one threadpool controller (``sysid._lagged.blas_controller``): a fresh
    ``threadpool_limits`` scans the loaded libraries each time (~6 ms of CPU here, ~30 ms of wall time under load),
    a tenth of a small task.
    """
    ctl = blas_controller()
    return contextlib.nullcontext() if ctl is None else ctl.limit(limits=1)


def _run_task(ctx: _Context, task: _Task, shared: dict | None = None) -> dict:
    """Run one task with single-threaded BLAS; toolkit errors are returned (recorded), not raised.

    ``shared``: a dict kept across the tasks of one :func:`~.tasks.fit_groups` group (same method, training data
    and estimator settings, so the same fit): the first task that fits stores its model there and the others take a
    copy of it instead of fitting again (:func:`run_group`).
    """
    t0 = time.perf_counter()
    with one_thread(), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            out = _task_body(ctx, task, shared)
        except StimsteerError as exc:
            out = {"error": f"{type(exc).__name__}: {exc}"}
    out["warnings"] = sorted({str(w.message) for w in caught} | set(out.pop("fit_warnings", ())))
    out["task"] = task.index
    out["total_s"] = time.perf_counter() - t0
    return out


def run_group(ctx: _Context, group) -> list:
    """The results of the tasks of one fit group (:func:`~.tasks.fit_groups`), in the group's order, with one fit.

    A group of one task keeps no copy of its fit; the last task of a larger group takes the kept copy itself.
    """
    shared = {} if len(group) > 1 else None
    out = []
    for k, task in enumerate(group):
        if shared is not None and k == len(group) - 1:
            shared["last"] = True
        out.append(_run_task(ctx, task, shared))
    return out


def _fitted(spec, train: Session, st, horizon: int, shared: dict | None) -> tuple:
    """``(predictor, fit_s, fit warnings)``: fitted here, or a copy of the group's fit (its time and warnings).

    ``shared`` None: no other task of the group needs the fit (nothing is kept); ``shared["last"]``: this is the
    group's last task, which takes the kept copy instead of copying it again.
    """
    if shared is not None and "predictor" in shared:
        kept = shared.pop("predictor") if shared.get("last") else copy.deepcopy(shared["predictor"])
        return kept, shared["fit_s"], shared["warnings"]
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        predictor = _fit(spec, train, st.past_steps, horizon)
    fit_s, said = time.perf_counter() - t0, tuple(str(w.message) for w in caught)
    if shared is None or shared.get("last"):
        return predictor, fit_s, said
    try:  # the group's copy is taken before this task uses the model: every task starts from the same fit
        shared.update(predictor=copy.deepcopy(predictor), fit_s=fit_s, warnings=said)
    except (TypeError, copy.Error, RecursionError):  # a model that cannot be copied: each task fits its own
        pass
    return predictor, fit_s, said


def _freerun(predictor, test: Session, shared: dict | None) -> tuple:
    """``(free-run scores, seconds)``: computed here, or the group's (the same fit on the same held-out trials
    gives the same free run at every horizon; its seconds are then added to this task's prediction time)."""
    if shared is not None and "freerun" in shared:
        return shared["freerun"]
    t0 = time.perf_counter()
    freerun = freerun_scores(predictor, test)
    if shared is not None:
        shared["freerun"] = (freerun, time.perf_counter() - t0)
    return freerun, 0.0


def _session_at(ctx: _Context, scale: float) -> Session:
    if scale == 1.0:
        return ctx.session
    return _cached((ctx.token, "session", scale), lambda: _rerecord(ctx.session, ctx.plant, scale))


def _task_body(ctx: _Context, task: _Task, shared: dict | None) -> dict:
    st = ctx.settings
    spec, setting = st.methods[task.method_index], task.setting
    choice = _route_choice(ctx, task)
    skipped = skip_reason(st, task, choice)
    if skipped:
        return {"skipped": skipped}
    session = _session_at(ctx, setting.noise_scale)
    train, test = session.select_trials(task.train), session.select_trials(task.split.test)
    predictor, fit_s, fit_warnings = _fitted(spec, train, st, setting.horizon_steps, shared)
    past, H = int(predictor.past_steps_), setting.horizon_steps
    t0 = time.perf_counter()
    kstep = kstep_scores(predictor, test, horizon_steps=H, stride_steps=window_stride(test, past, H, st.max_windows))
    freerun, freerun_s = _freerun(predictor, test, shared)
    predict_s = time.perf_counter() - t0 + freerun_s
    out = {"kstep": kstep.kstep, "freerun": freerun.freerun, "fit_s": fit_s, "predict_s": predict_s,
           "n_windows": kstep.n_windows, "selection": _selection(predictor), "fingerprint": _fingerprint(predictor),
           "fit_warnings": fit_warnings}
    if choice is not None and spec.label in choice:
        out["inner_r2"] = choice[spec.label]
    if task.keep_traces:
        out["prediction_trace"] = _prediction_trace(predictor, test, H, _trace_channels(ctx, train))
    # closed loop with each route's representative only: every method is fitted and scored, the route is steered
    # by its best method on the training trials (which keeps the benchmark's cost that of one method per route)
    if st.control is not None and (choice is None or choice.get(spec.route, spec.label) == spec.label):
        out.update(_control(ctx, task, predictor, session))
    return out


def skip_reason(st, task: _Task, choice) -> str:
    """Why ``task`` is skipped ('' when it runs): away from the base setting only each route's representative runs.

    The sweeps compare the routes by their representatives; every method is fitted and scored at the base.
    """
    spec = st.methods[task.method_index]
    if choice is not None and not _is_base(st, task.setting) and choice.get(spec.route, spec.label) != spec.label:
        return f"not {spec.route}'s best method on the training trials of split {task.split_index}"
    return ""


def chooses_routes(st) -> bool:
    """Whether a route has several methods (then each split chooses its representative by inner scores)."""
    return any(sum(m.route == r for m in st.methods) >= 2 for r in ("indirect", "direct"))


def route_choice_of(st, scores: dict) -> dict:
    """Inner scores by label and each route's best label by route, from the inner score of every method."""
    best = {}
    for m in st.methods:
        top = best.get(m.route)
        if top is None or (np.nan_to_num(scores[m.label], nan=-np.inf) > np.nan_to_num(scores[top], nan=-np.inf)):
            best[m.route] = m.label
    return {**scores, **best}


def inner_score_of(ctx: _Context, split_index: int, split, method_index: int) -> float:
    """:func:`_inner_score` of one method on one split, with single-threaded BLAS (as inside a task)."""
    st = ctx.settings
    with one_thread(), warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the task that uses the choice records its own warnings
        train = ctx.session.select_trials(split.train)
        return _inner_score(st.methods[method_index], train, st, st.horizon_steps, split_index)


def _route_choice(ctx: _Context, task: _Task):
    """Inner scores of every method of the split (by label) and each route's best label (by route); None when no
    route has several methods. Given with the task by a runner that computed it first, else computed once per
    split and process (deterministic, training trials only)."""
    st = ctx.settings
    if not chooses_routes(st):
        return None
    if task.choice is not None:
        return task.choice

    def make():
        train = ctx.session.select_trials(task.split.train)
        return route_choice_of(st, {m.label: _inner_score(m, train, st, st.horizon_steps, task.split_index)
                                    for m in st.methods})

    return _cached((ctx.token, "route choice", task.split_index), make)


def _is_base(st, setting) -> bool:
    return setting.n_train is None and setting.noise_scale == 1.0 and setting.horizon_steps == st.horizon_steps


#: Share of a split's training trials held out to choose each route's best method (nested inside the training).
_INNER_FRACTION = 0.25
#: At most this many k-step windows score a method on the inner held-out trials (evenly strided): a ranking of a
#: few methods needs far fewer windows than the reported figures.
_INNER_WINDOWS = 500


def _inner_score(spec, train: Session, st, H: int, split_index: int) -> float:
    """Mean k-step R² of ``spec`` fitted on part of the training trials and scored on the rest (NaN if impossible).

    The inner split depends on the split only, so every method of a route is judged on the same trials; the
    held-out trials of the split are never touched.
    """
    n = train.n_trials
    n_val = max(1, int(round(_INNER_FRACTION * n)))
    if n - n_val < 2:
        return float("nan")
    perm = np.random.default_rng(_seed(st.seed, 4, split_index)).permutation(n)
    val, fit_on = sorted(int(i) for i in perm[:n_val]), sorted(int(i) for i in perm[n_val:])
    try:
        predictor = _fit(spec, train.select_trials(fit_on), st.past_steps, H)
        inner = train.select_trials(val)
        past = int(predictor.past_steps_)
        ks = kstep_scores(predictor, inner, horizon_steps=H,
                          stride_steps=window_stride(inner, past, H, min(st.max_windows, _INNER_WINDOWS)))
    except StimsteerError:
        return float("nan")
    return float(ks.kstep["r2"].mean())


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

