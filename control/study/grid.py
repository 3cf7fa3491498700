"""The study's grid of tasks from its table: which sessions each analysis fits on and scores on."""

from __future__ import annotations

import pandas as pd

from ...sysid import SessionError
from .settings import StudySettings
from .table import StudyTable
from .tasks import SessionRef, StudyTask, draw_trials, task_key

__all__ = ["study_tasks"]


def _ref(row) -> SessionRef:
    return SessionRef(file=str(row.file), content_hash=str(row.content_hash), subject=str(row.subject),
                      session=str(row.session), n_trials=int(row.n_trials),
                      n_samples=int(row.n_samples))


def study_tasks(table: StudyTable, st: StudySettings) -> tuple[list, list]:
    """Every task of the study's analyses, and notes on what could not be run (and why).

    Raises
    ------
    SessionError
        Pooled analyses (``subjects``, ``sites``) over subjects whose channel sets differ, without a common subset.
    """
    sessions = table.sessions
    refs = {(r.subject, r.session): _ref(r) for r in sessions.itertuples()}
    by_subject = {s: [refs[(s, x)] for x in g.sort_values("order")["session"]]
                  for s, g in sessions.groupby("subject", sort=True)}
    notes = []
    if any(a in st.analyses for a in ("subjects", "sites")) and st.channels is None:
        _check_same_channels(sessions)
    tasks = []
    for subject, subject_refs in by_subject.items():
        for k, ref in enumerate(subject_refs):
            sources = {"sessions": (ref,)}
            if "days" in st.analyses and k > 0:
                sources["days"] = tuple(subject_refs[:k])
            if "subjects" in st.analyses and len(by_subject) > 1:
                sources["subjects"] = tuple(r for s, rr in by_subject.items() if s != subject for r in rr)
            for kind, pool in sources.items():
                for i in range(st.n_splits):
                    train, trials = ((), ()) if kind == "sessions" else draw_trials(ref, pool, i, st)
                    tasks += [_task(kind, ref, train, trials, m, i, st) for m in range(len(st.methods))]
    if "days" in st.analyses and all(len(r) < 2 for r in by_subject.values()):
        notes.append("across days: no subject has two sessions; nothing to transfer.")
    if "subjects" in st.analyses and len(by_subject) < 2:
        notes.append("across subjects: the study has one subject; nothing to leave out.")
    return tasks, notes


def _task(kind, ref, train, trials, method_index, split, st) -> StudyTask:
    return StudyTask(kind=kind, subject=ref.subject, session=ref.session, method_index=method_index, split=split,
                     test=ref, train=train, train_trials=trials,
                     key=task_key(kind, ref, train, trials, method_index, split, st))


def _check_same_channels(sessions: pd.DataFrame) -> None:
    sets = sessions.groupby(["input_names", "output_names"])["subject"].unique()
    if len(sets) > 1:
        desc = "; ".join(f"{', '.join(sorted(subjects))}: inputs {i.split('|')}, outputs {o.split('|')}"
                         for (i, o), subjects in sets.items())
        raise SessionError(f"pooling across subjects needs the same channels in every subject; the study has "
                           f"{len(sets)} channel sets ({desc}). Name a common subset (--channels), or leave out the "
                           "analyses 'subjects' and 'sites'.")
