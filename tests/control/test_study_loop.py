"""The closed-loop part of the per-session analysis: every per-session fit steers its session's surrogate plant
(the single-session benchmark's closed-loop task), and the routes' tracking error and energy are pooled over
subjects by random effects."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import main
from stimsteer.control.evaluation import ControlSettings
from stimsteer.control.evaluation import closed_loop as bench_loop
from stimsteer.control.study import StudySettings, describe_study, run_study, study_tasks
from stimsteer.control.study.grid import _ref
from stimsteer.control.study.tasks import _centred, _load, session_split
from stimsteer.demo_data.make_study import StudyScenario, make_study
from stimsteer.sysid import InvalidParameterError

pytestmark = pytest.mark.slow

SCENARIO = StudyScenario(n_subjects=3, n_sessions=2, n_trials=6, trial_samples=80)
SETTINGS = StudySettings.quick(past_steps=4, horizon_steps=4, max_windows=150, analyses=("sessions", "days"),
                               control=ControlSettings(n_steps=40))


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    root = tmp_path_factory.mktemp("loop_study")
    make_study(root, SCENARIO)
    return root


@pytest.fixture(scope="module")
def result(study):
    return run_study(study, SETTINGS, n_workers=1)


def test_every_per_session_fit_steers_and_transfer_fits_do_not(result):
    t = result.tasks
    own = t[t["analysis"] == "sessions"]
    assert own["tracking_rms"].notna().all() and (own["energy_ua2"] > 0).all()
    assert (own["violations"] == 0).all() and (own["n_fallback"] == 0).all()
    assert t.loc[t["analysis"] == "days", "tracking_rms"].isna().all()
    loops = result.closed_loop
    assert set(loops["label"]) == {"indirect (subspace)", "direct (lsq)"} and len(loops) == 2 * 3
    assert (loops["n_loops"] == 2 * SETTINGS.n_splits).all() and (loops["violations"] == 0).all()


def test_the_loops_track_the_pulse_better_than_leaving_the_input_at_rest(study, result):
    # Outside check (common practice, no source): the target is a pulse of target_level_std training standard
    # deviations on half of the run, so an input left at rest misses it by at least std * sqrt(0.5) in RMS (plus the
    # plant's noise); a loop that steers must do better, on every session, split and route.
    cs = SETTINGS.control
    width = cs.pulse_fraction[1] - cs.pulse_fraction[0]
    for r in describe_study(study).sessions.itertuples():
        for split in range(SETTINGS.n_splits):
            sp = session_split(_ref(r), split, SETTINGS)
            train = _centred(_load(_ref(r), None), sp.train, SETTINGS).select_trials(sp.train)
            ys = np.concatenate([train.y[a:b] for a, b in train.segments()])
            at_rest = cs.target_level_std * ys.std(axis=0)[0] * np.sqrt(width)
            t = result.tasks
            rows = t[(t["analysis"] == "sessions") & (t["subject"] == r.subject) & (t["session"] == r.session)
                     & (t["split"] == split)]
            assert len(rows) == 2 and (rows["tracking_rms"] < 0.8 * at_rest).all(), (r.subject, r.session, split)


def test_the_study_reuses_the_benchmark_closed_loop_task(study, result, monkeypatch):
    # the per-session loop is the benchmark's own steer(): replacing it changes the study's numbers
    calls = []
    original = bench_loop.steer

    def spy(*args, **kwargs):
        calls.append(kwargs["control"])
        return original(*args, **kwargs)

    from stimsteer.control.study import loop as study_loop
    monkeypatch.setattr(study_loop, "steer", spy)
    again = run_study(study, SETTINGS.replace(analyses=("sessions",)), n_workers=1)
    assert len(calls) == 6 * 2 * SETTINGS.n_splits and all(c == SETTINGS.control for c in calls)
    pd.testing.assert_series_equal(again.tasks["tracking_rms"],
                                   result.tasks.loc[result.tasks["analysis"] == "sessions", "tracking_rms"]
                                   .reset_index(drop=True))


def test_loop_verdicts_pool_relative_differences_like_statsmodels_dl(result):
    sm = pytest.importorskip("statsmodels.stats.meta_analysis")
    t = result.tasks[result.tasks["analysis"] == "sessions"]
    for comparison, column in (("loop_tracking", "tracking_rms"), ("loop_energy", "energy_ua2")):
        wide = t.pivot_table(index=["subject", "session", "split"], columns="label", values=column)
        rel = (wide["direct (lsq)"] - wide["indirect (subspace)"]) / wide["indirect (subspace)"].abs()
        g = rel.groupby("subject")
        eff, var = g.mean(), g.var(ddof=1) / g.size()
        e = result.effects[result.effects["comparison"] == comparison].set_index("subject")
        assert np.allclose(e.loc[eff.index, "effect"], eff, rtol=1e-12)
        v = result.verdicts.set_index("comparison").loc[comparison]
        # Outside check: statsmodels.stats.meta_analysis.combine_effects(method_re="dl") (Seabold & Perktold 2010,
        # statsmodels), DerSimonian & Laird (1986), on the same per-subject effects and variances.
        ref = sm.combine_effects(eff.to_numpy(), var.to_numpy(), method_re="dl", use_t=False)
        lo, hi = ref.conf_int(use_t=False)[1] if ref.tau2 > 0 else ref.conf_int(use_t=False)[0]
        assert v["estimate"] == pytest.approx(ref.mean_effect_re if ref.tau2 > 0 else ref.mean_effect_fe, rel=1e-9)
        assert (v["ci_low"], v["ci_high"]) == pytest.approx((lo, hi), rel=1e-9)
        # the single-session benchmark's practical margin: 1 % of the reference, i.e. 0.01 on the relative scale
        assert v["margin"] == pytest.approx(SETTINGS.margin_rel) and v["n_subjects"] == 3


def test_without_control_only_the_per_session_cache_keys_change(study, result):
    table = describe_study(study)
    on = {(t.kind, t.subject, t.session, t.method_index, t.split): t.key for t in study_tasks(table, SETTINGS)[0]}
    off = {(t.kind, t.subject, t.session, t.method_index, t.split): t.key
           for t in study_tasks(table, SETTINGS.replace(control=None))[0]}
    assert on.keys() == off.keys()
    assert all((on[k] == off[k]) == (k[0] != "sessions") for k in on)
    plain = run_study(study, SETTINGS.replace(control=None, analyses=("sessions",)), n_workers=1)
    assert plain.closed_loop.empty and not plain.verdicts["comparison"].str.startswith("loop").any()
    assert plain.tasks["tracking_rms"].isna().all()
    pd.testing.assert_series_equal(plain.tasks["r2_mean"], result.tasks.loc[result.tasks["analysis"] == "sessions",
                                                                             "r2_mean"].reset_index(drop=True))


def test_control_settings_come_from_a_mapping_and_bad_ones_are_named():
    assert StudySettings(control={"n_steps": 30}).control == ControlSettings(n_steps=30)
    assert StudySettings(control=False).control is None
    with pytest.raises(InvalidParameterError, match="ControlSettings"):
        StudySettings(control={"steps": 30})
    with pytest.raises(InvalidParameterError, match="None/false"):
        StudySettings(control="yes")


def test_the_page_and_tables_show_the_closed_loop(study, tmp_path, capsys):
    out = tmp_path / "report"
    args = ["study", str(study), "--out", str(out), "--quick", "--past-steps", "4", "--horizon-steps", "4",
            "--workers", "1", "--no-progress", "--analyses", "sessions", "--no-cache"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "closed-loop tracking error" in printed and "0 limit violations" in printed
    page = (out / "study.html").read_text()
    assert "<h2>Closed loop</h2>" in page and 'alt="forest_loop_tracking' in page
    loops = pd.read_parquet(out / "tables" / "closed_loop.parquet")
    pd.testing.assert_frame_equal(loops, pd.read_csv(out / "tables" / "closed_loop.csv"), check_dtype=False)
    assert (loops["violations"] == 0).all() and len(loops) == 2 * 3
    tasks = pd.read_parquet(out / "tables" / "tasks.parquet")
    assert tasks["tracking_rms"].notna().all()
    assert any((out / "figures").glob("forest_loop_tracking_*.png"))
    assert any((out / "figures").glob("forest_loop_energy_*.png"))


def test_the_command_scores_prediction_only_when_asked(study, tmp_path, capsys):
    out = tmp_path / "plain"
    assert main(["study", str(study), "--out", str(out), "--quick", "--past-steps", "4", "--horizon-steps", "4",
                 "--workers", "1", "--no-progress", "--analyses", "sessions", "--no-cache", "--no-control"]) == 0
    assert "closed-loop" not in capsys.readouterr().out
    assert "<h2>Closed loop</h2>" not in (out / "study.html").read_text()
    assert pd.read_parquet(out / "tables" / "tasks.parquet")["tracking_rms"].isna().all()
