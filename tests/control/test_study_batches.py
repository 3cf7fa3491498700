"""A study's tasks travel in batches (one per analysis and scored session): fewer reads, the same numbers."""

import os

import pandas as pd
import pytest

from stimsteer.control.study import StudySettings, describe_study, local_cluster, run_study, study_tasks
from stimsteer.control.study import execute as study_execute
from stimsteer.control.study import tasks as study_tasks_module
from stimsteer.demo_data.make_study import StudyScenario, make_study

pytestmark = pytest.mark.slow

SETTINGS = StudySettings.quick(past_steps=4, horizon_steps=4, max_windows=100, analyses=("sessions", "subjects"),
                               control=None)
COLS = ["analysis", "subject", "session", "label", "split", "status", "r2_mean", "r2_last", "n_train_trials"]


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("batch_study")
    make_study(root, StudyScenario(n_subjects=3, n_sessions=2, n_trials=6, trial_samples=60))
    return root


def test_batches_group_the_tasks_of_one_analysis_and_scored_session(study):
    tasks, _ = study_tasks(describe_study(study), SETTINGS)
    batches = study_execute.batches(tasks)
    assert len(batches) == 2 * 6  # two analyses x six sessions
    assert sorted(t.key for b in batches for t in b) == sorted(t.key for t in tasks)
    for b in batches:
        assert len({(t.kind, t.test.content_hash) for t in b}) == 1 and len(b) == 2 * SETTINGS.n_splits
        assert [(t.split, t.method_index) for t in b] == sorted((t.split, t.method_index) for t in b)


@pytest.fixture(scope="module")
def local(study):
    """A sequential run (in this process), with every session file read counted."""
    reads, original = [], study_tasks_module.load_session
    study_tasks_module.load_session = lambda f: reads.append(f) or original(f)
    try:
        study_tasks_module._LAST.clear()
        study_tasks_module._POOLED.clear()
        result = run_study(study, SETTINGS, n_workers=1)
    finally:
        study_tasks_module.load_session = original
    return result, reads


def test_a_batch_reads_its_scored_session_once_and_each_pool_once(study, local):
    result, reads = local
    tasks, _ = study_tasks(describe_study(study), SETTINGS)
    # per batch: its scored session, and the pooled sessions of each split (the methods of a split share its draw);
    # task by task it was the pooled sessions and the scored one again for every task
    bound = sum(1 + sum(len(t.train) for t in b if t.method_index == 0) for b in study_execute.batches(tasks))
    per_task = sum(len(t.train) + 1 for t in tasks)
    assert len(reads) <= bound < per_task
    assert result.provenance["execution"]["n_batches"] == 12


def test_batched_results_equal_tasks_run_alone_in_any_order(study):
    tasks, _ = study_tasks(describe_study(study), SETTINGS)
    some = [t for b in study_execute.batches(tasks)[5:7] for t in b]  # a per-session and a pooled batch
    alone = {t.key: study_tasks_module.run_task(SETTINGS, t) for t in reversed(some)}
    batched = {k: r for b in study_execute.batches(some) for k, r in study_execute.run_batch(SETTINGS, b)}
    timing = {"total_s", "cpu_s", "fit_s", "control_s"}
    assert alone.keys() == batched.keys() and len(alone) == 2 * 2 * SETTINGS.n_splits
    for k in alone:
        assert {a: v for a, v in alone[k].items() if a not in timing} == \
               {a: v for a, v in batched[k].items() if a not in timing}


def _worker_state():
    import dask

    return (dask.config.get("distributed.worker.profile.enabled"), dask.config.get("distributed.admin.tick.interval"),
            os.environ.get("MALLOC_TRIM_THRESHOLD_"))


def test_a_dask_cluster_runs_batches_with_the_numbers_of_a_local_run(study, local, monkeypatch):
    distributed = pytest.importorskip("distributed")
    # a default cluster made earlier in this process (test_study.py) leaves Dask's value in os.environ
    monkeypatch.delenv("MALLOC_TRIM_THRESHOLD_", raising=False)
    with local_cluster(2) as cluster:  # the study's quiet configuration (test_study.py runs Dask's defaults)
        with distributed.Client(cluster.scheduler_address, set_as_default=False) as client:
            states = list(client.run(_worker_state).values())
        on_dask = run_study(study, SETTINGS, scheduler=cluster.scheduler_address)
    # no profiler, a slow event-loop check, glibc's adaptive malloc (Dask's defaults: True, "20ms", "65536")
    assert states == [(False, "1s", None)] * 2
    assert on_dask.provenance["execution"]["n_batches"] == 12
    pd.testing.assert_frame_equal(on_dask.tasks[COLS].sort_values(COLS[:5], ignore_index=True),
                                  local[0].tasks[COLS].sort_values(COLS[:5], ignore_index=True))


def test_the_longest_batches_go_first_so_no_long_batch_is_left_for_the_end(study):
    from stimsteer.control.study import SessionRef, StudyTask

    def task(kind, name, n_samples, method):
        ref = SessionRef(file=f"{name}.h5", content_hash=name, subject="s", session=name, n_trials=6,
                         n_samples=n_samples)
        return StudyTask(kind=kind, subject="s", session=name, method_index=method, split=0, test=ref, train=(),
                         key=f"{kind}{name}{method}")

    tasks = [task(kind, name, n, m) for kind in ("subjects", "sessions") for name, n in (("a", 100), ("b", 900),
                                                                                           ("c", 400)) for m in (1, 0)]
    order = [(b[0].kind, b[0].session, [t.method_index for t in b]) for b in study_execute.batches(tasks)]
    assert order == [("sessions", "b", [0, 1]), ("sessions", "c", [0, 1]), ("sessions", "a", [0, 1]),
                     ("subjects", "b", [0, 1]), ("subjects", "c", [0, 1]), ("subjects", "a", [0, 1])]
    # on the real grid too: per-session batches (they also steer) before the transfer ones
    kinds = [b[0].kind for b in study_execute.batches(study_tasks(describe_study(study), SETTINGS)[0])]
    assert kinds == sorted(kinds, key=lambda k: k != "sessions")
