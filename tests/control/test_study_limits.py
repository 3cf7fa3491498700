"""Declared limits in a study: every per-session closed loop is planned inside them (the limits file of `plan` and
`bench`), they are recorded in the provenance, and a file that does not match a session's inputs is refused."""

import json

import numpy as np
import pytest

from stimsteer.control.cli import main
from stimsteer.control.evaluation import ControlSettings
from stimsteer.control.evaluation import closed_loop as bench_loop
from stimsteer.control.study import StudySettings, describe_study, run_study
from stimsteer.demo_data.make_study import StudyScenario, make_study
from stimsteer.sysid import LimitsError, load_session

pytestmark = pytest.mark.slow

SCENARIO = StudyScenario(n_subjects=2, n_sessions=2, n_trials=6, trial_samples=80)
SETTINGS = StudySettings.quick(past_steps=4, horizon_steps=4, max_windows=150, analyses=("sessions",),
                               control=ControlSettings(n_steps=40))
SITES = ("site1", "site2", "site3")


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("limits_study")
    make_study(root, SCENARIO)
    return root


def _recorded_max(study) -> np.ndarray:
    """The largest input of each site over every session of the study (what the loops use without limits)."""
    highest = np.zeros(len(SITES))
    for r in describe_study(study).sessions.itertuples():
        s = load_session(r.file)
        assert tuple(s.input_names) == SITES
        highest = np.maximum(highest, s.u[s.mask].max(axis=0))
    return highest


def _limits_file(path, hi, names=SITES):
    text = "".join(f"[inputs.{n}]\namplitude_min_ua = 0.0\namplitude_max_ua = {float(h)!r}\n\n" for n, h in zip(names, hi))
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def delivered(study, tmp_path_factory):
    """`stimsteer study --limits` with a binding limit, run in this process; every loop's applied inputs kept."""
    tmp = tmp_path_factory.mktemp("limits_run")
    hi = 0.3 * _recorded_max(study)  # well inside the recorded range on every site: the limit binds
    limits = _limits_file(tmp / "limits.toml", hi)
    inputs, original = [], bench_loop.run_closed_loop

    def keep(*args, **kwargs):
        loop = original(*args, **kwargs)
        inputs.append(np.array(loop.inputs))
        return loop

    mp = pytest.MonkeyPatch()
    mp.setattr(bench_loop, "run_closed_loop", keep)
    try:
        code = main(["study", str(study), "--out", str(tmp / "out"), "--quick", "--past", "4samples", "--horizon",
                     "4samples", "--analyses", "sessions", "--workers", "1", "--no-cache", "--no-progress",
                     "--limits", str(limits)])
    finally:
        mp.undo()
    assert code == 0
    record = json.loads((tmp / "out" / "results.json").read_text())
    return hi, limits, inputs, record


def test_every_closed_loop_input_stays_inside_a_binding_declared_limit(delivered):
    hi, _limits, inputs, _record = delivered
    # 2 subjects x 2 sessions x 2 splits x 2 methods, each loop of the quick settings' 60 steps
    assert len(inputs) == 2 * 2 * 2 * 2 and all(u.shape == (60, 3) for u in inputs)
    u = np.concatenate(inputs)
    assert (u >= -1e-9).all() and (u <= hi + 1e-9 * hi).all()
    # binding: the loops want more than the declared limit (they reach it on some site), so without the limit
    # (the recorded range, ~3x higher) they would have delivered more
    assert np.isclose(u.max(axis=0), hi, rtol=1e-6).any()


def test_the_declared_limits_and_their_file_are_in_the_study_provenance(delivered):
    hi, limits, _inputs, record = delivered
    prov = record["provenance"]
    assert prov["limits_file"] == str(limits) and prov["limits_source"].startswith("declared")
    declared = prov["settings"]["limits"]
    assert declared["input_names"] == list(SITES) and np.allclose(declared["amplitude_max_ua"], hi)


def test_declared_limits_change_only_the_per_session_cache_keys(study):
    from stimsteer.control.study import study_tasks

    table = describe_study(study)
    both = SETTINGS.replace(analyses=("sessions", "days"))
    limited = both.replace(limits={"inputs": {n: {"amplitude_min_ua": 0.0, "amplitude_max_ua": 1.0} for n in SITES}})
    plain, bound = (study_tasks(table, s)[0] for s in (both, limited))
    for a, b in zip(plain, bound):
        assert (a.key == b.key) == (a.kind == "days"), a.kind


def test_limits_that_do_not_match_a_sessions_inputs_are_refused_naming_the_session(study, tmp_path, capsys):
    wrong = _limits_file(tmp_path / "wrong.toml", [10.0, 10.0, 10.0], names=("site1", "site2", "site9"))
    with pytest.raises(LimitsError, match=r"session s01/day1 \(inputs \['site1', 'site2', 'site3'\].*site9"):
        run_study(study, SETTINGS.replace(limits=str(wrong)), n_workers=1)
    code = main(["study", str(study), "--out", str(tmp_path / "out"), "--quick", "--no-progress",
                 "--limits", str(wrong)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "s01/day1" in err and "site9" in err
    assert not (tmp_path / "out").exists()
