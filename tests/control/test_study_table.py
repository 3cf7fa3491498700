"""The study description: folder and study file to a study table, and the bad inputs the issue names."""

import os
import shutil
import warnings

import numpy as np
import pytest

from stimsteer.control.cli import main
from stimsteer.control.study import StudySettings, describe_study
from stimsteer.control.study import table as study_table
from stimsteer.demo_data.make_study import StudyScenario, make_study
from stimsteer.sysid import InvalidParameterError, SessionError, StimsteerWarning, load_session, save_session

SMALL = StudyScenario(n_subjects=2, n_sessions=2, n_trials=5, trial_samples=60)


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("study")
    make_study(root, SMALL)
    return root


def _copy(study, tmp_path):
    dst = tmp_path / "copy"
    shutil.copytree(study, dst)
    return dst


def test_a_folder_becomes_one_row_per_session_with_the_hash_of_its_data(study):
    table = describe_study(study)
    s = table.sessions
    assert list(s["subject"]) == ["s01", "s01", "s02", "s02"]
    assert list(s["session"]) == ["day1", "day2", "day1", "day2"] and list(s["order"]) == [1, 2, 1, 2]
    for r in s.itertuples():
        assert r.content_hash == load_session(r.file).content_hash()  # the lazily streamed hash is the data's
    assert table.excluded.empty and table.subjects == ["s01", "s02"]


def test_a_study_file_names_sessions_groups_conditions_and_settings(study, tmp_path):
    (tmp_path / "study.toml").write_text(f"""
[study]
name = "invented"
[settings]
past_steps = 4
methods = ["indirect/arx", "direct/lsq"]
[groups]
s01 = "sham"
[[sessions]]
file = "{study}/s01/day2.h5"
subject = "s01"
session = "thursday"
condition = "rest"
[[sessions]]
file = "{study}/s01/day1.h5"
subject = "s01"
session = "monday"
order = 0
""")
    table = describe_study(tmp_path)
    assert table.name == "invented" and table.settings["past_steps"] == 4
    assert list(table.sessions["session"]) == ["monday", "thursday"]  # the given order wins over the listing
    assert list(table.sessions["group"]) == ["sham", "sham"]
    assert table.sessions.set_index("session").loc["thursday", "condition"] == "rest"


def test_sessions_of_a_subject_with_different_channels_are_named_and_a_common_subset_accepted(study, tmp_path):
    root = _copy(study, tmp_path)
    s = load_session(root / "s01" / "day2.h5")
    (root / "s01" / "day2.h5").unlink()
    save_session(s.replace(y=s.y[:, :2], output_names=s.output_names[:2], output_units=s.output_units[:2]),
                 root / "s01" / "day2.h5")
    with pytest.raises(SessionError, match=r"subject s01 record different channels.*'ch3'.*common subset"):
        describe_study(root)
    table = describe_study(root, channels=["site1", "site2", "site3", "ch1", "ch2"])
    assert len(table) == 4
    with pytest.raises(SessionError, match=r"lacks the channels \['ch3'\]"):
        describe_study(root, channels=["site1", "ch3"])


def test_duplicate_sessions_are_refused_naming_both(study, tmp_path):
    root = _copy(study, tmp_path)
    shutil.copy(root / "s01" / "day1.h5", root / "s02" / "day3.h5")
    with pytest.raises(SessionError, match=r"identical data.*s01/day1.*s02/day3"):
        describe_study(root)


def test_a_session_with_too_few_trials_is_excluded_by_name_never_silently(study, tmp_path):
    root = _copy(study, tmp_path)
    s = load_session(root / "s02" / "day2.h5")
    (root / "s02" / "day2.h5").unlink()
    save_session(s.select_trials([0, 1]), root / "s02" / "day2.h5")
    with pytest.warns(StimsteerWarning, match=r"excluded for too few trials.*s02/day2"):
        table = describe_study(root, min_trials=4)
    assert list(table.excluded["session"]) == ["day2"] and "2 trials" in table.excluded["reason"].iloc[0]
    assert len(table) == 3


def test_a_bids_folder_without_stimulation_information_is_refused(tmp_path):
    (tmp_path / "dataset_description.json").write_text('{"Name": "x", "BIDSVersion": "1.8.0"}')
    (tmp_path / "sub-01" / "ses-1" / "ieeg").mkdir(parents=True)
    with pytest.raises(SessionError, match="no stimulation information"):
        describe_study(tmp_path)


def test_the_cli_reports_a_bad_study_in_one_line_with_exit_code_2(tmp_path, capsys):
    (tmp_path / "empty").mkdir()
    code = main(["study", str(tmp_path / "empty"), "--out", str(tmp_path / "out"), "--no-progress"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "holds no session files" in err
    assert not (tmp_path / "out").exists()


def test_study_file_settings_with_an_unknown_key_are_refused(study, tmp_path):
    (tmp_path / "study.toml").write_text(f'[settings]\nhorizon = 3\n[[sessions]]\nfile = "{study}/s01/day1.h5"\n'
                                         'subject = "s01"\nsession = "a"\n')
    code = main(["study", str(tmp_path), "--out", str(tmp_path / "out"), "--no-progress"])
    assert code == 2


@pytest.mark.parametrize("change, match", [(dict(offsets="maybe"), "offsets"), (dict(methods=["arx"]), "route/method"),
                                           (dict(analyses=("sessions", "weeks")), "unknown analyses"),
                                           (dict(n_splits=0), "n_splits")])
def test_bad_study_settings_name_the_setting(change, match):
    with pytest.raises(InvalidParameterError, match=match):
        StudySettings(**change)


def test_the_study_generator_is_seeded_and_subjects_differ(tmp_path):
    a, b = make_study(tmp_path / "a", SMALL), make_study(tmp_path / "b", SMALL)
    sa, sb = load_session(a[0]), load_session(b[0])
    assert np.array_equal(sa.y, sb.y)
    assert not np.allclose(load_session(a[0]).y, load_session(a[2]).y)


def test_an_unreachable_scheduler_is_one_clear_error(study):
    pytest.importorskip("distributed")
    from stimsteer.control.study import run_study
    from stimsteer.sysid import StimsteerError

    with pytest.raises(StimsteerError, match=r"could not use a Dask scheduler at 'tcp://127.0.0.1:9'.*run locally"):
        run_study(study, StudySettings.quick(scheduler_timeout_s=1.0, analyses=("sessions",)),
                  scheduler="tcp://127.0.0.1:9")


def test_an_unreadable_cache_entry_counts_as_missing(tmp_path):
    from stimsteer.control.study import TaskCache

    cache = TaskCache(tmp_path / "c")
    cache.put("k1", {"r2_mean": 0.5})
    cache.put("k2", {"error": "SessionError: x"})  # failed tasks are tried again, never cached
    (tmp_path / "c" / "k3.json").write_text("{half")
    assert cache.get("k1") == {"r2_mean": 0.5} and cache.get("k2") is None and cache.get("k3") is None


def test_describing_a_study_again_opens_only_new_or_rewritten_files(study, tmp_path, monkeypatch):
    study = _copy(study, tmp_path)
    first = describe_study(study)
    opened, original = [], study_table.open_session_file
    monkeypatch.setattr(study_table, "open_session_file", lambda f: opened.append(f) or original(f))
    assert describe_study(study).sessions.equals(first.sessions) and opened == []
    # rewritten with other data (trials reversed in time): read again, a new hash; the other three files are not
    f = study / "s02" / "day1.h5"
    s = load_session(f)
    save_session(s.replace(u=s.u[::-1].copy(), y=s.y[::-1].copy()), f, overwrite=True)
    again = describe_study(study).sessions
    assert [os.path.basename(str(p)) for p in opened] == ["day1.h5"]
    changed = again["content_hash"] != first.sessions["content_hash"]
    assert list(again.loc[changed, "file"]) == [str(f)]


def _count_opens(monkeypatch):
    """Every session file the description reads, by any route (our HDF5 layout, or whole)."""
    opened = []
    for name in ("open_session_file", "load_session"):
        original = getattr(study_table, name)
        monkeypatch.setattr(study_table, name, lambda f, _o=original: opened.append(os.path.basename(str(f))) or _o(f))
    return opened


def test_a_rerun_in_a_new_process_opens_no_session_file_when_the_cache_folder_keeps_them(study, tmp_path,
                                                                                      monkeypatch):
    study, cache = _copy(study, tmp_path), tmp_path / "tasks"
    first = describe_study(study, cache=cache)
    assert (cache / study_table.DESCRIPTIONS_FILE).is_file()
    monkeypatch.setattr(study_table, "_INFO", {})  # what a new process knows: nothing but the cache folder
    opened = _count_opens(monkeypatch)
    assert describe_study(study, cache=cache).sessions.equals(first.sessions) and opened == []
    # without the folder, the new process opens every file again
    monkeypatch.setattr(study_table, "_INFO", {})
    assert describe_study(study).sessions.equals(first.sessions) and len(opened) == 4


def test_a_file_changed_since_the_cache_folder_kept_it_is_read_again(study, tmp_path, monkeypatch):
    study, cache = _copy(study, tmp_path), tmp_path / "tasks"
    first = describe_study(study, cache=cache).sessions
    f = study / "s01" / "day2.h5"
    s = load_session(f)
    save_session(s.replace(u=s.u[::-1].copy(), y=s.y[::-1].copy()), f, overwrite=True)
    monkeypatch.setattr(study_table, "_INFO", {})
    opened = _count_opens(monkeypatch)
    again = describe_study(study, cache=cache).sessions
    assert opened == ["day2.h5"]
    changed = again["content_hash"] != first["content_hash"]
    assert list(again.loc[changed, "file"]) == [str(f)] and again.loc[changed, "content_hash"].iloc[0] == s.replace(
        u=s.u[::-1].copy(), y=s.y[::-1].copy()).content_hash()
    # the record now holds the new file's figures only (the old ones left with it)
    monkeypatch.setattr(study_table, "_INFO", {})
    opened.clear()
    assert describe_study(study, cache=cache).sessions.equals(again) and opened == []


def test_an_unreadable_record_of_session_files_reads_every_file_again(study, tmp_path, monkeypatch):
    study, cache = _copy(study, tmp_path), tmp_path / "tasks"
    first = describe_study(study, cache=cache).sessions
    (cache / study_table.DESCRIPTIONS_FILE).write_text('{"format": 1, "files": {"half')
    monkeypatch.setattr(study_table, "_INFO", {})
    opened = _count_opens(monkeypatch)
    assert describe_study(study, cache=cache).sessions.equals(first) and len(opened) == 4


@pytest.mark.parametrize("env, flag, shown", [(None, False, False), ("1", False, True), ("1", True, False),
                                              ("0", False, False)])
def test_the_study_bar_follows_the_rule_of_every_command(study, tmp_path, monkeypatch, env, flag, shown):
    # off a terminal (as here) no bar unless STIMSTEER_PROGRESS=1 asks for one; --no-progress always wins (the run
    # itself is replaced: only the flag it is given is looked at)
    from stimsteer.control.commands import study as command

    seen = []

    def run_study(*args, progress, **kwargs):
        seen.append(progress)
        raise InvalidParameterError("stopped here by the test")

    monkeypatch.setattr(command, "run_study", run_study)
    if env is None:
        monkeypatch.delenv("STIMSTEER_PROGRESS", raising=False)
    else:
        monkeypatch.setenv("STIMSTEER_PROGRESS", env)
    argv = ["study", str(study), "--out", str(tmp_path / "out"), "--no-cache"] + (["--no-progress"] if flag else [])
    assert main(argv) == 2 and seen == [shown]
