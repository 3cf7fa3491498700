"""The study's tasks: one (analysis, subject, session, method, split) each, picklable, keyed by content.

A task names its sessions by file and content hash only; the worker that runs it reads them (one at a time, and
only the trials it needs), so a task holds at most one session plus its training trials in memory, never the study.

* ``sessions``: fit on the session's training trials of the split, score on its held-out trials.
* ``days``: fit on the subject's earlier sessions (their training trials of the split), score on the same held-out
  trials of the later session.
* ``subjects``: leave one subject out: fit on the other subjects' sessions (their training trials), score on the
  same held-out trials of this subject's session.

Transfer fits draw as many training trials as the within-session fit of the scored session had, so a difference
between analyses measures transfer, not the amount of training data. The draw is a bottom-k sample: every candidate
trial (a training trial of a pooled session) gets a priority hashed from the scored session, the split and the
candidate's own session hash and index, and the ``k`` lowest are taken. A task's key covers exactly the trials it
drew, so adding a session to the study changes only the tasks that score it and the few pooled tasks whose draw
now picks one of its trials; every other cached result stays valid. Each session's split is seeded by
the study seed, the split number and the session's content hash: the same session gets the same split in every
analysis, run and scheduler. Session-level output offsets are removed explicitly (``offsets="remove"``): every
session is centred on its own training trials' mean output, scored trials never inform it.
"""

from __future__ import annotations

import hashlib
import json
import time
import warnings
from dataclasses import dataclass

import numpy as np

from ...sysid import (Session, SessionError, StateSpaceForm, StimsteerError, TrialSplit, impulse_responses,
                      kstep_scores, load_session, make_estimator)
from ...sysid._records import window_stride
from ..evaluation.task_body import one_thread
from .loop import session_loop
from .settings import StudySettings

__all__ = ["SessionRef", "StudyTask", "run_task", "CACHE_VERSION"]

#: Part of every cache key: bump it when a task's numbers would change for the same inputs.
CACHE_VERSION = 1


@dataclass(frozen=True)
class SessionRef:
    """A session by file and content hash (what a task sends instead of data)."""

    file: str
    content_hash: str
    subject: str
    session: str
    n_trials: int
    n_samples: int = 0


@dataclass(frozen=True)
class StudyTask:
    """One unit of work (see the module docstring); ``key`` identifies its result in the cache."""

    kind: str
    subject: str
    session: str
    method_index: int
    split: int
    test: SessionRef
    train: tuple
    key: str
    train_trials: tuple = ()


def task_key(kind, test: SessionRef, train, train_trials, method_index, split, st: StudySettings) -> str:
    """SHA-256 over what the task's numbers depend on: the data (hashes and trials drawn), the method, the split,
    the settings."""
    drawn = [[r.content_hash, list(t)] for r, t in zip(train, train_trials)]
    settings = st.task_dict()
    if kind != "sessions":
        settings.pop("control")  # only the per-session analysis steers a plant (under the limits)
        settings.pop("limits", None)
    text = json.dumps([CACHE_VERSION, kind, test.content_hash, drawn, st.methods[method_index].to_dict(), int(split),
                       settings], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:32]


def draw_trials(test: SessionRef, candidates, split: int, st: StudySettings) -> tuple[tuple, tuple]:
    """The bottom-k draw of training trials for a transfer task (module docstring).

    Returns
    -------
    refs : tuple of SessionRef
        The pooled sessions that contribute at least one trial, in the order given.
    trials : tuple of tuple of int
        Their drawn trial indices, sorted.
    """
    k = len(session_split(test, split, st).train)
    scored = []
    for ref in candidates:
        for t in session_split(ref, split, st).train:
            text = f"{st.seed}|{split}|{test.content_hash}|{ref.content_hash}|{t}".encode()
            scored.append((hashlib.blake2b(text, digest_size=8).digest(), ref.content_hash, t))
    chosen: dict = {}
    for _p, h, t in sorted(scored)[:k]:
        chosen.setdefault(h, []).append(int(t))
    refs = tuple(r for r in candidates if r.content_hash in chosen)
    return refs, tuple(tuple(sorted(chosen[r.content_hash])) for r in refs)


def _seed(*parts) -> int:
    return int(np.random.SeedSequence([int(p) for p in parts]).generate_state(1)[0])


def session_split(ref: SessionRef, split: int, st: StudySettings) -> TrialSplit:
    """The seeded split of a session's trials: the same in every analysis, run and scheduler."""
    n = int(ref.n_trials)
    n_test = max(1, int(round(st.test_fraction * n)))
    seed = _seed(st.seed, 11, split, int(ref.content_hash[:12], 16))
    perm = np.random.default_rng(seed).permutation(n)
    return TrialSplit(train=tuple(sorted(int(i) for i in perm[n_test:])),
                      test=tuple(sorted(int(i) for i in perm[:n_test])), seed=seed)


_LAST: dict = {}


def _load(ref: SessionRef, channels, slot: str = "scored") -> Session:
    """The session of ``ref``. The last session read in each slot (``scored``: the session a task scores; ``pool``:
    a session it pools trials from) is kept, so the tasks of one batch (:mod:`~.execute`) read and hash their
    scored session once, however many sessions their pooled fits read in between."""
    key = (ref.content_hash, channels)
    held = _LAST.get(slot)
    if held is None or held[0] != key:
        _LAST.pop(slot, None)  # before reading the next one: one session per slot
        s = load_session(ref.file)
        if s.content_hash() != ref.content_hash:
            raise SessionError(f"session file {ref.file} changed since the study table was made (its content hash "
                               "differs); describe the study again.")
        _LAST[slot] = (key, _subset(s, channels))
    return _LAST[slot][1]


def _subset(s: Session, channels) -> Session:
    if channels is None:
        return s
    ii = [i for i, n in enumerate(s.input_names) if n in channels]
    oi = [i for i, n in enumerate(s.output_names) if n in channels]
    if not ii or not oi:
        raise SessionError(f"the common channel subset {list(channels)} keeps {len(ii)} inputs and {len(oi)} "
                           f"outputs of a session with inputs {list(s.input_names)} and outputs "
                           f"{list(s.output_names)}; it must keep at least one of each.")
    return s.replace(u=s.u[:, ii], y=s.y[:, oi], input_names=[s.input_names[i] for i in ii],
                     output_names=[s.output_names[i] for i in oi], input_units=[s.input_units[i] for i in ii],
                     output_units=[s.output_units[i] for i in oi])


def _centred(s: Session, train_trials, st: StudySettings) -> Session:
    """The session with its outputs centred on the mean of its training trials (``offsets="remove"``)."""
    if st.offsets == "none":
        return s
    part = s.select_trials(train_trials)
    mean = part.y[part.mask].mean(axis=0)
    return s.replace(y=s.y - mean)


_POOLED: dict = {}


def _pool(task: StudyTask, st: StudySettings) -> Session:
    """The drawn training trials of a transfer task, read one session at a time, each centred on its own offset.

    The last pool is kept: the methods of one split draw the same trials, so a batch pools them once.
    """
    if not task.train:
        raise SessionError(f"no training trials to pool for {task.kind} task {task.subject}/{task.session}.")
    key = (task.split, tuple((r.content_hash, t) for r, t in zip(task.train, task.train_trials)), st.channels,
           st.offsets, st.seed, st.test_fraction)
    if _POOLED.get("key") != key:
        _POOLED.clear()
        parts = []
        for ref, trials in zip(task.train, task.train_trials):
            s = _load(ref, st.channels, slot="pool")
            parts.append(_centred(s, session_split(ref, task.split, st).train, st).select_trials(list(trials)))
        _POOLED.update(key=key, session=_concat(parts))
    return _POOLED["session"]


def _concat(parts) -> Session:
    first = parts[0]
    for p in parts[1:]:
        if (p.input_names, p.output_names) != (first.input_names, first.output_names):
            raise SessionError(f"pooled sessions record different channels "
                               f"({list(first.input_names + first.output_names)}"
                               f" and {list(p.input_names + p.output_names)}); give a common channel subset.")
    stops = np.cumsum([p.n_samples for p in parts])
    trials = np.concatenate([p.trials + (stop - p.n_samples) for p, stop in zip(parts, stops)])
    return first.replace(u=np.concatenate([p.u for p in parts]), y=np.concatenate([p.y for p in parts]),
                         mask=np.concatenate([p.mask for p in parts]),
                         output_mask=np.concatenate([p.output_mask for p in parts]), trials=trials, metadata={})


def run_task(st: StudySettings, task: StudyTask) -> dict:
    """Run one task with single-threaded BLAS; a toolkit error is returned as the task's result, not raised."""
    t0, c0 = time.perf_counter(), time.process_time()
    with one_thread(), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            out = _body(st, task)
        except StimsteerError as exc:
            out = {"error": f"{type(exc).__name__}: {exc}"}
    out["warnings"] = sorted({str(w.message) for w in caught})[:5]
    out["total_s"] = time.perf_counter() - t0
    # the process's CPU time: the fits hand their Gram passes and ridge strengths to helper threads (one with
    # single-threaded BLAS), which a thread clock misses (~13 ms a task here); a worker runs one task at a time, so
    # the rest is its background work over the task (~0.005 of a core with local_cluster's configuration)
    out["cpu_s"] = time.process_time() - c0  # below total_s when the task waited for a core (a loaded machine)
    return out


def _body(st: StudySettings, task: StudyTask) -> dict:
    spec = st.methods[task.method_index]
    split = session_split(task.test, task.split, st)
    if task.kind == "sessions":
        train = _centred(_load(task.test, st.channels), split.train, st).select_trials(split.train)
    else:
        train = _pool(task, st)
    t0 = time.perf_counter()
    predictor = make_estimator(spec.route, spec.method, spec.settings, past_steps=st.past_steps,
                               horizon_steps=st.horizon_steps).fit(train)
    fit_s = time.perf_counter() - t0
    n_train = train.n_trials
    del train  # before the held-out trials are read: one session's worth at a time
    session = _centred(_load(task.test, st.channels), split.train, st)
    test = session.select_trials(split.test)
    H = st.horizon_steps
    ks = kstep_scores(predictor, test, horizon_steps=H,
                      stride_steps=window_stride(test, int(predictor.past_steps_), H, st.max_windows)).kstep
    out = {"r2_mean": float(ks["r2"].mean()), "r2_step1": float(ks.loc[ks["step"] == 1, "r2"].mean()),
           "r2_last": float(ks.loc[ks["step"] == H, "r2"].mean()), "nrmse_mean": float(ks["nrmse"].mean()),
           "n_train_trials": int(n_train), "n_test_trials": len(split.test), "fit_s": fit_s,
           "sites": list(test.input_names), "site_energy": None}
    if task.kind == "sessions" and isinstance(predictor, StateSpaceForm):
        out["site_energy"] = _site_energy(predictor, st)
    if task.kind == "sessions" and st.control is not None:
        seed = _seed(st.seed, 13, task.split, int(task.test.content_hash[:12], 16))
        out.update(session_loop(st, task, predictor, session, split, seed))
    return out


def _site_energy(predictor, st: StudySettings):
    """Output energy of each site's impulse response over the horizon: ``Σ_k ‖C A^(k−1) b_j‖²``.

    The Markov parameters do not depend on the state coordinates, so neither does this figure (unlike a
    controllability Gramian of an identified model, whose state basis is arbitrary).
    """
    h = impulse_responses(predictor.state_space_model(), st.horizon_steps + 1)
    return [float(v) for v in np.sum(h[1:] ** 2, axis=(0, 1))]
