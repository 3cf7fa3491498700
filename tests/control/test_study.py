"""Running a study: the analyses, identical numbers wherever tasks run, the cache, dead workers, the page."""

import os
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import main
from stimsteer.control.study import StudySettings, TaskCache, describe_study, run_study, study_tasks
from stimsteer.control.study import execute as study_execute
from stimsteer.control.study import table as study_table
from stimsteer.demo_data.make_study import StudyScenario, make_study

pytestmark = pytest.mark.slow

SCENARIO = StudyScenario(n_subjects=3, n_sessions=2, n_trials=6, trial_samples=80)
SETTINGS = StudySettings.quick(past_steps=4, horizon_steps=4, max_windows=150)
NUMBERS = ["r2_mean", "r2_step1", "r2_last", "nrmse_mean", "n_train_trials", "n_test_trials", "tracking_rms",
           "energy_ua2", "violations"]


def _numbers(result) -> pd.DataFrame:
    cols = ["analysis", "subject", "session", "label", "split", "status", *NUMBERS]
    return result.tasks[cols].sort_values(cols[:5], ignore_index=True)


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("study")
    make_study(root, SCENARIO)
    return root


@pytest.fixture(scope="module")
def first(study, tmp_path_factory):
    cache = tmp_path_factory.mktemp("cache")
    return run_study(study, SETTINGS, cache=cache, n_workers=1), cache


def test_every_analysis_gives_one_row_per_task_and_no_failures(first):
    result, _cache = first
    t = result.tasks
    per = 2 * SETTINGS.n_splits  # methods x splits
    assert (t["analysis"] == "sessions").sum() == 6 * per
    assert (t["analysis"] == "days").sum() == 3 * per  # day 2 of each subject
    assert (t["analysis"] == "subjects").sum() == 6 * per
    assert (t["status"] == "ok").all() and not t.duplicated(["analysis", "subject", "session", "label", "split"]).any()
    assert (t.loc[t["analysis"] == "sessions", "r2_mean"] > 0.5).all()  # the simulated plants are identifiable


def test_transfer_fits_see_as_many_training_trials_as_the_within_session_fit(first):
    # a difference between analyses measures transfer, not the amount of training data
    t = first[0].tasks
    wide = t.pivot_table(index=["subject", "session", "label", "split"], columns="analysis",
                         values="n_train_trials")
    days = wide.dropna(subset=["days"])
    assert (days["days"] == days["sessions"]).all() and (wide["subjects"] == wide["sessions"]).all()


def test_verdicts_pool_per_subject_effects_with_the_between_subject_spread(first):
    result = first[0]
    v = result.verdicts.set_index("comparison")
    assert set(v.index) == {"route", "days", "subjects", "loop_tracking", "loop_energy"}
    assert (v["n_subjects"] == 3).all() and v["tau"].notna().all() and (v["ci_low"] <= v["ci_high"]).all()
    e = result.effects[result.effects["comparison"] == "route"]
    wide = result.tasks[result.tasks["analysis"] == "sessions"].pivot_table(
        index=["subject", "session", "split"], columns="label", values="r2_mean")
    d = (wide["direct (lsq)"] - wide["indirect (subspace)"]).groupby("subject").mean()
    assert np.allclose(e.set_index("subject")["effect"].loc[d.index], d, rtol=1e-12)
    assert result.cohort_sites["kendall_w"].between(0, 1).all() and len(result.cohort_sites) == 3


def test_a_rerun_takes_every_task_from_the_cache_with_the_same_numbers(study, first):
    result, cache = first
    again = run_study(study, SETTINGS, cache=cache, n_workers=1)
    assert again.n_computed == 0 and again.tasks["cached"].all()
    pd.testing.assert_frame_equal(_numbers(again), _numbers(result))
    pd.testing.assert_frame_equal(again.verdicts, result.verdicts)


def test_a_new_session_recomputes_only_the_tasks_whose_data_it_changes(study, first, tmp_path):
    _result, cache = first
    root = tmp_path / "grown"
    shutil.copytree(study, root)
    extra = StudyScenario(n_subjects=1, n_sessions=3, n_trials=6, trial_samples=80)
    make_study(tmp_path / "extra", extra)
    shutil.copy(tmp_path / "extra" / "s01" / "day3.h5", root / "s01" / "day3.h5")
    cache_copy = tmp_path / "cache"
    shutil.copytree(cache, cache_copy)
    table = describe_study(root)
    new_hash = table.sessions.set_index(["subject", "session"]).loc[("s01", "day3"), "content_hash"]
    tasks, _notes = study_tasks(table, SETTINGS)
    touched = {t.key for t in tasks if t.test.content_hash == new_hash
               or new_hash in {r.content_hash for r in t.train}}
    grown = run_study(table, SETTINGS, cache=cache_copy, n_workers=1)
    assert grown.n_computed == len(touched)
    assert set(grown.tasks.loc[~grown.tasks["cached"], "key"]) == touched
    # what the new session does not touch (within-session fits, days of the other subjects) came from the cache
    assert grown.tasks.loc[grown.tasks["analysis"] == "sessions", "cached"].sum() == 6 * 2 * SETTINGS.n_splits
    # pooled tasks of other subjects whose bottom-k draw does not take the new session's trials stay cached
    others = grown.tasks[(grown.tasks["analysis"] == "subjects") & (grown.tasks["subject"] != "s01")]
    assert others["cached"].any()


def test_local_processes_give_the_numbers_of_a_sequential_run(study, first):
    pd.testing.assert_frame_equal(_numbers(run_study(study, SETTINGS, n_workers=2)), _numbers(first[0]))


def test_a_dask_cluster_gives_the_numbers_of_a_local_run(study, first):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        on_dask = run_study(study, SETTINGS, scheduler=cluster.scheduler_address)
    assert on_dask.provenance["execution"]["mode"] == "dask"
    pd.testing.assert_frame_equal(_numbers(on_dask), _numbers(first[0]))


def test_a_worker_killed_mid_study_is_replaced_and_no_row_is_lost_or_doubled(study, first, tmp_path, monkeypatch):
    marker = tmp_path / "killed"
    original = study_execute.run_task
    victim = sorted(t.key for t in study_tasks(describe_study(study), SETTINGS)[0])[4]

    def dies_once(st, task):
        # this task kills its worker process the first time (the pool's workers are forked from here)
        if task.key == victim:
            try:
                fd = os.open(marker, os.O_CREAT | os.O_EXCL)
                os.close(fd)
                os._exit(1)
            except FileExistsError:
                pass
        return original(st, task)

    monkeypatch.setattr(study_execute, "run_task", dies_once)
    cache = tmp_path / "cache"
    result = run_study(study, SETTINGS, cache=cache, n_workers=2)
    assert marker.exists() and result.provenance["execution"]["n_retries"] >= 1
    pd.testing.assert_frame_equal(_numbers(result), _numbers(first[0]))
    assert len(TaskCache(cache)) == len(result.tasks)


def test_offsets_between_sessions_are_removed_explicitly(study, first):
    # each simulated day adds a per-channel baseline offset of ~5 µV: a model from day 1 applied to day 2 is charged
    # for it unless the study removes each session's own offset (estimated on its training trials only)
    kept = run_study(study, SETTINGS.replace(offsets="none", analyses=("sessions", "days")), n_workers=1)
    def days(r):
        return r.tasks.loc[r.tasks["analysis"] == "days", "r2_mean"].mean()
    assert days(first[0]) > days(kept) + 0.02


def test_the_command_writes_one_page_with_tables_and_session_pages(study, tmp_path, capsys, monkeypatch):
    out = tmp_path / "report"
    args = ["study", str(study), "--out", str(out), "--quick", "--past-steps", "4", "--horizon-steps", "4",
            "--workers", "1", "--no-progress", "--analyses", "sessions,days,sites"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "pooled difference of held-out R²" in printed and "Kendall's W" in printed
    page = (out / "study.html").read_text()
    assert "Forest plots" in page and "sessions/s01__day1.html" in page and "DerSimonian" in page
    assert (out / "sessions" / "s02__day2.html").is_file()
    tasks = pd.read_parquet(out / "tables" / "tasks.parquet")
    pd.testing.assert_frame_equal(tasks[NUMBERS], pd.read_csv(out / "tables" / "tasks.csv")[NUMBERS],
                                  check_dtype=False)
    assert (Path(f"{out}.tasks")).is_dir()
    assert main(args) == 2  # the same --out again: refused before computing
    # a rerun is a new process: it knows only the cache folder, and opens no session file again
    monkeypatch.setattr(study_table, "_INFO", {})
    opened = []
    for name in ("open_session_file", "load_session"):
        original = getattr(study_table, name)
        monkeypatch.setattr(study_table, name, lambda f, _o=original: opened.append(f) or _o(f))
    assert main(args + ["--force"]) == 0
    assert "0 task(s) computed" in capsys.readouterr().out  # every task from OUT.tasks
    assert opened == [] and (Path(f"{out}.tasks") / "session_descriptions.json").is_file()


def test_across_subject_transfer_equals_within_subject_accuracy_when_every_plant_is_the_same(tmp_path):
    # Outside check (a fact of the trade, no source): when every subject's plant is the same, a model pooled over
    # other subjects sees data of the same system as the subject's own model (with as many training trials), so
    # the pooled difference of held-out R² must be zero within its stated 95 % interval.
    make_study(tmp_path, StudyScenario(n_subjects=6, n_sessions=1, n_trials=6, trial_samples=80, identical=True))
    result = run_study(tmp_path, SETTINGS.replace(analyses=("sessions", "subjects")), n_workers=2)
    v = result.verdicts[result.verdicts["comparison"] == "subjects"]
    assert len(v) == 2
    for row in v.itertuples():
        assert row.ci_low <= 0.0 <= row.ci_high, row
        assert abs(row.estimate) < 0.01
