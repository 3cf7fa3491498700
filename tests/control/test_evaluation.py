"""Tests of the route benchmark (control/evaluation/) on tiny simulated sessions.

Sessions are a 3-node linear network with 2 inputs and 2 outputs (spectral radius 0.7, chosen for a fast, stable
response), recorded in 6 trials of 80 samples; settings are small so that each run takes well under a second.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from stimsteer.control.evaluation import (
    MIN_TRAIN_TRIALS,
    BenchSettings,
    ControlSettings,
    MethodSpec,
    paired_verdict,
    recorded_limits,
    run_bench,
    t_interval,
)
from stimsteer.control.limits import StimLimits
from stimsteer.control.plants import InnovationPlant, LinearNetworkPlant, record_session
from stimsteer.control.report import summarize
from stimsteer.sysid import Session
from stimsteer.sysid.exceptions import InvalidParameterError, SessionError, StimsteerError

_TIMING = ("fit_s", "predict_s", "control_s", "total_s", "predict_ms_per_window", "solve_ms_median", "solve_ms_p95",
           "solve_ms_max", "solve_ms_first", "warnings")


def _plant(seed, noise=True):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((3, 3))
    A *= 0.7 / np.max(np.abs(np.linalg.eigvals(A)))
    return LinearNetworkPlant(A, rng.standard_normal((3, 2)), rng.standard_normal((2, 3)),
                              process_noise_std=0.02 if noise else 0.0, measurement_noise_std=0.05 if noise else 0.0,
                              sample_rate_hz=100.0, input_names=("site_a", "site_b"), output_names=("ch_1", "ch_2"),
                              seed=seed)


def _session(seed, n_trials=6, length=80, noise=True):
    plant = _plant(seed, noise)
    u = np.random.default_rng(seed + 1).uniform(-1.0, 1.0, (n_trials * length, 2))
    trials = [(i * length, (i + 1) * length) for i in range(n_trials)]
    return record_session(plant, u, trials=trials), plant


def _settings(**changes):
    base = dict(methods=(MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3, 1.0)}),
                         MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)})),
                past_steps=3, horizon_steps=5, n_splits=2, control=ControlSettings(n_steps=30), train_trials=(),
                noise_scales=(), horizons=(), max_windows=100)
    return BenchSettings(**{**base, **changes})


def _numbers(result):
    """Every result table without the wall-time columns (which legitimately differ between runs)."""
    out = {}
    for name in ("prediction", "control", "fits", "tasks"):
        t = result.tables()[name]
        out[name] = t.drop(columns=[c for c in _TIMING if c in t.columns]).reset_index(drop=True)
    s = result.sweeps
    out["sweeps"] = s[~s["metric"].isin(["fit_s", "predict_ms_per_window", "solve_ms_median"])].reset_index(drop=True)
    c = result.comparison
    out["comparison"] = c[~c["metric"].isin(["fit_s", "predict_ms_per_window", "solve_ms_median"])
                          ].reset_index(drop=True)
    out["references"] = result.references.reset_index(drop=True)  # on a local pool: computed by the workers
    return out


# ------------------------------------------------------------------------------------------------ settings
def test_default_settings_compare_both_routes():
    st = BenchSettings()
    assert {m.route for m in st.methods} == {"indirect", "direct"}
    assert st.n_splits >= 2 and st.control is not None
    q = BenchSettings.quick(seed=3)
    assert q.seed == 3 and q.n_splits == 2 and q.control.n_steps < st.control.n_steps


@pytest.mark.parametrize("kwargs, match", [
    ({"methods": (MethodSpec("indirect", "arx"),)}, "no method given for \\['direct'\\]"),
    ({"methods": ()}, "non-empty tuple of MethodSpec"),
    ({"methods": (MethodSpec("indirect", "arx"), MethodSpec("direct", "lsq"), MethodSpec("direct", "lsq"))},
     "may appear once"),
    ({"n_splits": 0}, "n_splits must be an integer >= 1"),
    ({"past_steps": 2.5}, "past_steps must be an integer"),
    ({"test_fraction": 1.0}, "strictly between 0 and 1"),
    ({"control": "fast"}, "ControlSettings or None"),
    ({"train_trials": (1,)}, f"integers >= {MIN_TRAIN_TRIALS}"),
    ({"horizons": (0,)}, "horizons must hold integers >= 1"),
    ({"noise_scales": (-1.0,)}, "noise_scales must be finite numbers >= 0"),
    ({"seed": -1}, "seed must be an integer >= 0"),
    ({"scheduler_timeout_s": 0}, "positive number of seconds"),
])
def test_bad_settings_are_refused(kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        BenchSettings(**kwargs)


@pytest.mark.parametrize("kwargs, match", [
    ({"n_steps": 2}, "n_steps must be an integer >= 4"),
    ({"pulse_fraction": (0.8, 0.2)}, "0 <= start < stop <= 1"),
    ({"input_weight": -1.0}, "input_weight must be a finite number >= 0"),
    ({"target_level_std": float("nan")}, "target_level_std must be a finite number"),
])
def test_bad_control_settings_are_refused(kwargs, match):
    with pytest.raises(InvalidParameterError, match=match):
        ControlSettings(**kwargs)


def test_method_spec_checks_route_method_and_settings():
    assert MethodSpec("direct", "hankel").label == "direct (hankel)"
    with pytest.raises(InvalidParameterError, match="unknown route/method indirect/kalman"):
        MethodSpec("indirect", "kalman")
    with pytest.raises(InvalidParameterError, match="must be a mapping"):
        MethodSpec("direct", "lsq", settings=[("alphas", 1.0)])
    # the benchmark sets every method's horizon (its horizon and the sweep's); a method's own would be overridden
    with pytest.raises(InvalidParameterError, match="remove it and use BenchSettings\\(horizon_steps="):
        MethodSpec("direct", "lsq", settings={"horizon_steps": 7})


# ------------------------------------------------------------------------------------------------ statistics
def test_t_interval_matches_scipy(rng):
    # Outside check: scipy.stats.t.interval gives the same Student-t interval (scipy documentation).
    v = rng.normal(3.0, 2.0, 7)
    mean, lo, hi = t_interval(v)
    ref = stats.t.interval(0.95, v.size - 1, loc=v.mean(), scale=stats.sem(v))
    assert mean == pytest.approx(v.mean()) and (lo, hi) == pytest.approx(ref)
    m1, lo1, hi1 = t_interval([2.0, np.nan])
    assert m1 == 2.0 and np.isnan(lo1) and np.isnan(hi1)
    assert all(np.isnan(t_interval([])))


def test_t_quantile_is_scipy_stats_bit_for_bit():
    # Outside check: scipy.stats.t.ppf (scipy documentation); the benchmark reads it through scipy.special.stdtrit
    # without importing scipy.stats (1 s of CPU), and the golden demo's intervals must not move
    from stimsteer.control.evaluation.stats import _t_quantile

    for q in (0.9, 0.95, 0.975, 0.995):
        for dof in (1, 2, 3, 4, 7, 29, 120):
            assert _t_quantile(q, dof) == float(stats.t.ppf(q, dof))


def test_comparison_tables_are_the_per_metric_pivot_tables():
    # _wides groups every metric at once; it must give what pandas' pivot_table gives metric by metric (a label
    # without any value left out, NaN kept where a split lacks one)
    from stimsteer.control.evaluation.tables import _wides

    part = pd.DataFrame({"split": [0, 0, 1, 1, 2, 2, 2], "label": ["a", "b", "a", "b", "a", "b", "c"],
                         "r2_mean": [0.5, 0.7, 0.4, np.nan, 0.6, 0.8, np.nan],
                         "tracking_rms": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0]})
    wides = _wides(part)
    for metric in ("r2_mean", "tracking_rms"):
        pivot = part.pivot_table(index="split", columns="label", values=metric, aggfunc="mean")
        assert sorted(wides[metric]) == sorted(pivot.columns)
        for label in pivot.columns:
            np.testing.assert_array_equal(wides[metric][label], pivot[label].reindex([0, 1, 2]).to_numpy())


def test_prediction_table_is_the_per_task_pandas_construction(seed):
    # _prediction_table builds the table from column arrays at once; it must be the frame the per-task pandas
    # calls gave (kstep rows, then free-run rows with step 0, keys assigned, concatenated in task order)
    from stimsteer.control.evaluation.tables import _KEYS, _prediction_table
    from stimsteer.sysid import RidgeArx, freerun_scores, kstep_scores

    session, _plant_ = _session(seed)
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[1e-3]).fit(session)
    parts = []
    for i, (label, H) in enumerate((("indirect (arx)", 5), ("direct (lsq)", 3), ("indirect (arx)", 2))):
        keys = {"task": i, "split": i % 2, "label": label, "route": label.split()[0], "method": label[-4:-1],
                "n_train_trials": 4 + i, "noise_scale": 1.0 + i, "horizon_steps": H}
        parts.append((keys, {"kstep": kstep_scores(est, session, horizon_steps=H).kstep,
                             "freerun": freerun_scores(est, session).freerun}))
    frames = []
    for keys, res in parts:
        ks = res["kstep"].assign(mode="kstep")
        fr = res["freerun"].assign(mode="freerun", step=0)
        frame = pd.concat([ks, fr[ks.columns]], ignore_index=True)
        frames.append(frame.assign(**keys)[[*_KEYS, "mode", "step", "channel", "r2", "vaf", "nrmse", "rmse",
                                            "n_samples"]])
    pd.testing.assert_frame_equal(_prediction_table(parts), pd.concat(frames, ignore_index=True))
    assert _prediction_table([]).empty


def test_task_means_are_pandas_means_to_the_last_bit(rng):
    # the task row's means come from arrays, not Series; they must be Series.mean (NaNs skipped) bit for bit
    from stimsteer.control.evaluation.tables import _mean

    for n in (0, 1, 2, 7, 20, 160, 1001):
        for _ in range(5):
            a = rng.standard_normal(n) * 10 ** rng.uniform(-3, 3)
            a[rng.random(n) < 0.2] = np.nan
            want = float(pd.Series(a, dtype=float).mean())
            assert _mean(a) == want or (np.isnan(want) and np.isnan(_mean(a)))


def test_paired_verdict_names_a_route_only_when_the_interval_excludes_zero():
    assert paired_verdict([0.1, 0.2, 0.15], higher_is_better=True)[3] == "direct"
    assert paired_verdict([0.1, 0.2, 0.15], higher_is_better=False)[3] == "indirect"
    assert paired_verdict([-0.1, 0.2, 0.05], higher_is_better=True)[3] == "neither"
    assert paired_verdict([0.1], higher_is_better=True)[3] == "neither"  # no interval from one split


def test_a_difference_below_the_practical_margin_is_equivalent_not_a_win():
    # issue 13: "indirect better" on a difference of R² 3e-15 because the interval excluded zero
    from stimsteer.control.evaluation.stats import practical_margin

    d = [-3e-15, -3.1e-15, -2.9e-15]
    assert paired_verdict(d, higher_is_better=True)[3] == "indirect"  # without a margin: the old verdict
    assert paired_verdict(d, True, practical_margin("r2_last", 0.93))[3] == "equivalent"
    assert practical_margin("r2_last", 0.5) == 1e-3 and practical_margin("vaf_mean", 93.0) == pytest.approx(0.1)
    assert practical_margin("tracking_rms", 2.0) == pytest.approx(0.02)  # 1 % of the reference value
    assert paired_verdict([0.1, 0.2, 0.15], True, practical_margin("r2_last", 0.8))[3] == "direct"


def test_every_method_is_fitted_and_each_route_is_represented_by_its_best_on_training(seed):
    session, plant = _session(seed)
    methods = (MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3)}), MethodSpec("indirect", "subspace"),
               MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)}), MethodSpec("direct", "hankel"))
    r = run_bench(session, _settings(methods=methods, control=None), plant=plant, n_workers=1, progress=False)
    assert set(r.tasks["label"]) == {m.label for m in methods} and r.failures.empty
    base = r.tasks[r.tasks["full_train"]]
    assert base["inner_r2"].notna().all()
    comp = r.comparison
    best = comp[(comp["indirect"] == "indirect (best on training)") & (comp["direct"] == "direct (best on training)")]
    assert not best.empty and set(best["better"]) <= {"direct", "indirect", "equivalent", "neither"}
    # the best method of each split is the one with the highest inner (training-only) score; its held-out score
    # is what represents the route
    sw = r.sweeps[(r.sweeps["sweep"] == "base") & (r.sweeps["metric"] == "r2_last")].set_index("label")["mean"]
    for route in ("indirect", "direct"):
        picks = []
        for split, g in base[base["route"] == route].groupby("split"):
            picks.append(g.loc[g["inner_r2"].idxmax(), "r2_last"])
        assert sw[f"{route} (best on training)"] == pytest.approx(np.mean(picks), rel=1e-12)


def test_the_default_benchmark_fits_every_registered_method():
    from stimsteer.sysid import METHODS

    opt_in = {k for k, e in METHODS.items() if not getattr(e.cls(), "in_default_bench", True)}
    assert {(m.route, m.method) for m in BenchSettings().methods} == set(METHODS) - opt_in
    assert ("indirect", "pbsid") in opt_in  # closed-loop identification is for data recorded under feedback


# ------------------------------------------------------------------------------------------------ bad input
def test_too_few_trials_say_how_many_are_needed(seed):
    session, plant = _session(seed, n_trials=2)
    with pytest.raises(SessionError, match="needs at least 3 trials; this session has 2"):
        run_bench(session, _settings(), plant=plant, n_workers=1, progress=False)


def test_trials_too_short_for_the_windows(seed):
    session, plant = _session(seed, n_trials=4, length=8)
    with pytest.raises(SessionError, match="horizon \\+ 1 = 9 samples inside a trial; the longest has 8"):
        run_bench(session, _settings(), plant=plant, n_workers=1, progress=False)


def test_plant_must_match_the_session(seed):
    session, _ = _session(seed)
    other = LinearNetworkPlant([[0.5]], [[1.0]], [[1.0]], sample_rate_hz=100.0)
    with pytest.raises(SessionError, match="the plant has 1 inputs and 1 outputs; the session 2 and 2"):
        run_bench(session, _settings(), plant=other, n_workers=1, progress=False)
    slow = _plant(seed).with_params(sample_rate_hz=50.0)
    with pytest.raises(SessionError, match="runs at 50 Hz but the session at 100 Hz"):
        run_bench(session, _settings(), plant=slow, n_workers=1, progress=False)
    with pytest.raises(InvalidParameterError, match="the plant lacks 'n_inputs'"):
        run_bench(session, _settings(), plant=object(), n_workers=1, progress=False)


def test_bad_arguments_are_refused(seed):
    session, plant = _session(seed)
    with pytest.raises(InvalidParameterError, match="settings must be a BenchSettings"):
        run_bench(session, {"n_splits": 2}, progress=False)
    with pytest.raises(SessionError, match="needs a stimsteer Session"):
        run_bench(np.zeros((10, 2)), _settings(), progress=False)
    with pytest.raises(InvalidParameterError, match="limits must be a StimLimits"):
        run_bench(session, _settings(), limits={"amplitude_max_ua": 1.0}, progress=False)
    with pytest.raises(InvalidParameterError, match="n_workers must be at least 1"):
        run_bench(session, _settings(), plant=plant, n_workers=0, progress=False)


def test_unknown_target_channel_fails_every_split_with_the_reason(seed):
    session, plant = _session(seed)
    st = _settings(control=ControlSettings(n_steps=30, target_channel="ch_9"))
    with pytest.raises(StimsteerError, match="failed on every split.*InvalidParameterError: target channel 'ch_9' is "
                                             "not an output"):
        run_bench(session, st, plant=plant, n_workers=1, progress=False)


def test_run_bench_writes_nothing(seed, tmp_path, monkeypatch):
    # the report is written by the bench command (stimsteer.control.commands.bench), never by the benchmark itself
    session, plant = _session(seed)
    monkeypatch.chdir(tmp_path)
    run_bench(session, _settings(n_splits=1, control=ControlSettings(n_steps=10)), plant=plant, n_workers=1,
              progress=False)
    assert list(tmp_path.iterdir()) == []


# ------------------------------------------------------------------------------------------------ splits and selection
def test_splits_are_seeded_by_whole_trials_and_shared_by_the_routes(seed):
    session, plant = _session(seed)
    a = run_bench(session, _settings(seed=5, train_trials=(2,)), plant=plant, n_workers=1, progress=False)
    b = run_bench(session, _settings(seed=5, train_trials=(2,)), plant=plant, n_workers=1, progress=False)
    c = run_bench(session, _settings(seed=6, train_trials=(2,)), plant=plant, n_workers=1, progress=False)
    assert a.splits == b.splits and a.splits != c.splits
    for split in a.splits:
        assert not set(split.train) & set(split.test) and len(split.test) == 2  # round(0.25 * 6)
        assert sorted(split.train + split.test) == list(range(session.n_trials))
    assert a.provenance["splits"] == [s.as_dict() for s in a.splits]
    # both routes see the same training subset in every task pair
    fits = a.fits.merge(a.tasks[["task", "n_train_trials"]], on=["task", "n_train_trials"])
    assert set(fits.groupby(["split", "n_train_trials"])["label"].nunique()) == {2}


def test_corrupting_held_out_outputs_leaves_every_fit_unchanged(seed, rng):
    session, _ = _session(seed)
    methods = (MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3, 1.0)}),
               MethodSpec("indirect", "subspace", {"past_steps": 3, "future_steps": 4}),
               MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)}),
               MethodSpec("direct", "hankel", {"lambdas_g": (1e-4, 1e-2)}))
    st = _settings(methods=methods, n_splits=1, train_trials=(3,))
    clean = run_bench(session, st, n_workers=1, progress=False)
    y = np.array(session.y)
    for t in clean.splits[0].test:
        a, b = session.trials[t]
        y[a:b] = 100.0 * rng.standard_normal((b - a, session.n_outputs))
    dirty = run_bench(session.replace(y=y), st, n_workers=1, progress=False)
    assert dirty.splits == clean.splits
    cols = ["task", "label", "n_train_trials", "selection", "fingerprint"]
    assert clean.fits["selection"].str.len().min() > 0
    pd.testing.assert_frame_equal(clean.fits[cols], dirty.fits[cols])
    # ... while the held-out scores do see the corruption
    assert not np.allclose(clean.prediction["rmse"], dirty.prediction["rmse"])
    # the nested choice of each route's best method reads training trials only
    np.testing.assert_array_equal(clean.tasks["inner_r2"].to_numpy(), dirty.tasks["inner_r2"].to_numpy())
    # four methods give every indirect/direct pair a comparison, plus the routes' best methods: 3 x 3 pairs
    pairs = set(zip(clean.comparison["indirect"], clean.comparison["direct"]))
    assert len(pairs) == 9
    # the summary's recommendation names the method each route chose on its training trials
    first = summarize(clean)[0]
    assert any(m in first for m in ("(arx on", "(subspace on")) and any(m in first for m in ("(lsq on", "(hankel on"))


# ------------------------------------------------------------------------------------------------ contents
def test_result_tables_cover_prediction_control_sweeps_and_timings(seed):
    session, plant = _session(seed)
    st = _settings(train_trials=(2,), noise_scales=(0.5,), horizons=(3,))
    r = run_bench(session, st, plant=plant, n_workers=1, progress=False)
    assert r.plant == "ground truth" and r.failures.empty and r.surrogate.empty
    p = r.prediction
    base = p[(p["split"] == 0) & (p["label"] == "direct (lsq)") & (p["n_train_trials"] == 4)
             & (p["noise_scale"] == 1.0) & (p["horizon_steps"] == 5)]
    assert sorted(base.loc[base["mode"] == "kstep", "step"].unique()) == [1, 2, 3, 4, 5]
    assert set(base["channel"]) == {"ch_1", "ch_2"} and (base["mode"] == "freerun").sum() == 2
    assert set(r.sweeps["sweep"]) == {"base", "train_trials", "noise_scale", "horizon_steps"}
    tr = r.sweeps[(r.sweeps["sweep"] == "train_trials") & (r.sweeps["metric"] == "r2_last")]
    assert sorted(tr["value"].unique()) == [2.0, 4.0]
    assert set(r.sweeps.loc[r.sweeps["sweep"] == "noise_scale", "value"]) == {0.5, 1.0}
    # every sweep figure has n = n_splits and an interval around its mean
    row = r.sweeps[(r.sweeps["sweep"] == "base") & (r.sweeps["metric"] == "tracking_rms")].iloc[0]
    assert row["n"] == 2 and row["ci_low"] <= row["mean"] <= row["ci_high"]
    assert len(r.control) == len(r.tasks) and (r.timings["fit_s"] > 0).all()
    assert {"tracking_rms", "energy_ua2", "violations_amplitude", "use_slew", "solve_ms_median"} <= set(r.control)
    assert {"sweep", "indirect", "direct", "better"} <= set(r.comparison)
    assert set(r.traces["closed_loop"]["signal"]) == {"input", "output", "target"}
    assert set(r.traces["prediction"]["label"]) == {"indirect (arx)", "direct (lsq)"}
    prov = r.provenance
    assert prov["session"]["content_hash"] == session.content_hash() and prov["seed"] == st.seed
    assert prov["versions"]["numpy"] == np.__version__ and prov["settings"]["horizon_steps"] == 5


def test_prediction_only_when_control_is_off(seed):
    session, plant = _session(seed)
    r = run_bench(session, _settings(control=None, train_trials=(2,)), plant=plant, n_workers=1, progress=False)
    assert r.control.empty and r.traces["closed_loop"].empty and not r.prediction.empty
    assert "tracking_rms" not in set(r.sweeps["metric"]) and "r2_last" in set(r.sweeps["metric"])
    assert not any("Closed-loop" in line for line in summarize(r))


def test_noise_sweep_rerecords_from_the_plant_with_scaled_noise(seed):
    session, plant = _session(seed)
    r = run_bench(session, _settings(noise_scales=(0.0, 3.0)), plant=plant, n_workers=1, progress=False)
    rmse = r.tasks.groupby("noise_scale")["r2_last"].mean()
    assert rmse[0.0] > rmse[1.0] > rmse[3.0]  # more noise, less predictable held-out outputs
    quiet = r.tasks[r.tasks["noise_scale"] == 0.0]
    assert (quiet["r2_last"] > 0.999).all()  # noise-free re-recording: both routes predict (nearly) exactly


def test_recordings_use_a_surrogate_fitted_on_held_out_trials(seed):
    session, _ = _session(seed)
    r = run_bench(session, _settings(noise_scales=(2.0,)), n_workers=1, progress=False)
    assert r.plant == "surrogate" and "noise_scale" not in set(r.sweeps["sweep"])
    assert list(r.surrogate["split"]) == [0, 1]
    assert (r.surrogate["r2_freerun"] > 0.5).all() and "held-out trials" in r.surrogate["surrogate"].iloc[0]
    assert (r.control["plant"] == "surrogate").all() and "surrogate" in r.provenance["plant"]


def test_declared_limits_are_never_exceeded_in_closed_loop(seed):
    session, plant = _session(seed)
    limits = StimLimits(amplitude_min_ua=[-0.2, 0.0], amplitude_max_ua=[0.2, 0.3], slew_max_ua=[0.05, 0.1],
                        input_names=("site_a", "site_b"))
    st = _settings(control=ControlSettings(n_steps=30, target_level_std=3.0))
    r = run_bench(session, st, plant=plant, limits=limits, n_workers=1, progress=False)
    c = r.control
    assert (c[["violations_amplitude", "violations_slew", "violations_energy_budget"]].to_numpy() == 0).all()
    assert (c["use_amplitude_max"] + c["use_amplitude_min"] + c["use_slew"] > 0).all()  # the limits bind
    inputs = r.traces["closed_loop"]
    inputs = inputs[inputs["signal"] == "input"]
    for name, lo, hi in (("site_a", -0.2, 0.2), ("site_b", 0.0, 0.3)):
        v = inputs.loc[inputs["channel"] == name, "value"]
        assert v.min() >= lo and v.max() <= hi
    assert r.limits["source"] == "declared"


def test_failed_tasks_are_recorded_and_left_out(seed):
    session, plant = _session(seed, length=40)
    # ARX with 14 output and input lags has 14 * 2 + 14 * 2 + 1 = 57 coefficients per output; 2 training trials
    # of 40 samples give 2 * (40 - 14) = 52 rows (too few), the 4 of a full split 104 (enough).
    st = _settings(methods=(MethodSpec("indirect", "arx", {"past_steps": 14, "alphas": (1e-3,)}),
                            MethodSpec("direct", "lsq", {"alphas": (1e-3,)})), train_trials=(2,), horizon_steps=3)
    r = run_bench(session, st, plant=plant, n_workers=1, progress=False)
    failed = r.failures
    assert set(failed["label"]) == {"indirect (arx)"} and set(failed["n_train_trials"]) == {2}
    assert failed["error"].str.contains("usable rows").all()
    assert not r.prediction.merge(failed[["task"]], on="task").shape[0]


def test_noise_sweep_needs_a_plant_that_can_rescale_its_noise(seed):
    session, plant = _session(seed)
    true = plant.to_state_space()
    surrogate_like = InnovationPlant(true.replace(input_names=plant.input_names, output_names=plant.output_names),
                                     noise=False)
    r = run_bench(session, _settings(noise_scales=(2.0,)), plant=surrogate_like, n_workers=1, progress=False)
    assert set(r.failures["noise_scale"]) == {2.0}
    assert r.failures["error"].str.contains("with_params").all()


def test_local_processes_give_the_sequential_numbers(seed):
    session, plant = _session(seed)
    st = _settings(train_trials=(2,), noise_scales=(2.0,))
    one = run_bench(session, st, plant=plant, n_workers=1, progress=False)
    two = run_bench(session, st, plant=plant, n_workers=2, progress=False)
    assert one.provenance["execution"]["mode"] == "sequential"
    assert two.provenance["execution"] == {"mode": "local processes", "n_workers": 2}
    a, b = _numbers(one), _numbers(two)
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], check_exact=True)


def test_a_pool_that_chooses_each_routes_method_first_gives_the_sequential_numbers(seed):
    # with several methods per route the local pool scores every method on each split's inner trials once, before
    # the tasks, and decides the skipped ones itself; the numbers (choices, skips, closed loops) stay the sequential
    # run's, where every task computes the choice of its split
    session, plant = _session(seed)
    methods = (MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3)}), MethodSpec("indirect", "subspace"),
               MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)}), MethodSpec("direct", "hankel"))
    st = _settings(methods=methods, train_trials=(3,), control=ControlSettings(n_steps=12))
    one = run_bench(session, st, plant=plant, n_workers=1, progress=False)
    two = run_bench(session, st, plant=plant, n_workers=2, progress=False)
    assert (one.tasks["status"] == "skipped").any()  # the choice is exercised
    a, b = _numbers(one), _numbers(two)
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], check_exact=True)


def _same(a, b, path="") -> list:
    """Where two task results differ, timing figures aside (seconds, milliseconds)."""
    if isinstance(a, dict):
        keys = {k for k in set(a) | set(b) if not (k.endswith("_s") or "_ms" in k)}
        return [d for k in sorted(keys) for d in _same(a.get(k), b.get(k), f"{path}.{k}")]
    if isinstance(a, pd.DataFrame):
        try:
            pd.testing.assert_frame_equal(a, b, check_exact=True)
        except AssertionError:
            return [path]
        return []
    if isinstance(a, np.ndarray):
        return [] if np.array_equal(a, b, equal_nan=True) else [path]
    return [] if a == b or (a != a and b != b) else [path]


def test_tasks_that_fit_the_same_model_share_one_fit_and_give_the_numbers_they_give_alone(seed, monkeypatch):
    # ridge ARX takes no horizon: its horizon-sweep task fits the base task's model on the same trials (one fit);
    # least squares takes the horizon: a model of its own at each horizon
    from stimsteer.control.evaluation import task_body, tasks as task_module

    session, plant = _session(seed)
    st = _settings(n_splits=1, horizons=(3,), control=ControlSettings(n_steps=12))
    tasks = task_module._tasks(st, task_module._splits(session, st), task_module._grid(st, 4, True))
    groups = task_module.fit_groups(st, tasks)
    assert [[(st.methods[t.method_index].method, t.setting.horizon_steps) for t in g] for g in groups] == \
        [[("arx", 5), ("arx", 3)], [("lsq", 5)], [("lsq", 3)]]
    ctx = task_module._Context("t", session, plant, None, st)
    fits = []
    monkeypatch.setattr(task_body, "_fit", lambda *a: fits.append(a[0].method) or task_module._fit(*a))
    together = task_body.run_group(ctx, groups[0])
    assert fits == ["arx"]
    alone = [task_body._run_task(ctx, t) for t in groups[0]]
    assert fits == ["arx"] * 3
    assert together[1]["fingerprint"] == together[0]["fingerprint"] and "loop" in together[1]
    assert [_same(a, b) for a, b in zip(together, alone)] == [[], []]


def test_a_group_fits_once_and_hands_each_task_its_own_copy(monkeypatch):
    # three tasks of a group: one fit; the first task uses the fit, the second a copy, the last the kept copy
    # itself (no third copy); no two tasks share an object. A group of one keeps no copy at all.
    import copy as copy_module

    from stimsteer.control.evaluation import task_body

    fits, copies = [], []
    monkeypatch.setattr(task_body, "_fit", lambda *a: fits.append(1) or {"coef_": np.arange(3.0)})
    real = copy_module.deepcopy
    monkeypatch.setattr(task_body.copy, "deepcopy", lambda x: copies.append(1) or real(x))
    shared = {}
    got = [task_body._fitted(None, None, _settings(), 5, shared)[0] for _ in range(2)]
    shared["last"] = True
    got.append(task_body._fitted(None, None, _settings(), 5, shared)[0])
    assert len(fits) == 1 and len(copies) == 2 and "predictor" not in shared
    assert len({id(g) for g in got}) == 3 and len({id(g["coef_"]) for g in got}) == 3
    assert all(np.array_equal(g["coef_"], np.arange(3.0)) for g in got)
    task_body._fitted(None, None, _settings(), 5, None)
    assert len(fits) == 2 and len(copies) == 2


def test_the_pool_re_records_a_noise_level_once_for_every_worker(seed, tmp_path, monkeypatch):
    # the re-recorded session of the noise sweep is made by one job and sent to the tasks that need it, not made
    # again by every worker that meets a task at that noise level
    from stimsteer.control.evaluation import task_body

    calls = tmp_path / "calls.txt"

    def counted(*args):
        with open(calls, "a", encoding="utf-8") as fh:
            fh.write(f"{args[2]}\n")
        return rerecord(*args)

    rerecord = task_body._rerecord
    monkeypatch.setattr(task_body, "_rerecord", counted)  # forked workers inherit the patch
    session, plant = _session(seed)
    st = _settings(n_splits=3, test_fraction=0.34, noise_scales=(2.0,), control=ControlSettings(n_steps=12))
    run_bench(session, st, plant=plant, n_workers=2, progress=False)
    assert calls.read_text().split() == ["2.0"]


# ------------------------------------------------------------------------------------------------ plants and limits
def test_recorded_limits_span_the_recorded_inputs_and_zero():
    u = np.array([[0.5, 1.0], [2.0, 3.0], [1.0, 4.0]])
    s = Session(u=u, y=np.zeros((3, 1)), sample_rate_hz=10.0, input_names=("a", "b"))
    lim = recorded_limits(s)
    assert lim.amplitude_min_ua.tolist() == [0.0, 0.0] and lim.amplitude_max_ua.tolist() == [2.0, 4.0]
    assert lim.input_names == ("a", "b")


def test_sweeps_run_only_each_routes_best_method_and_the_base_point_runs_every_method(seed):
    session, plant = _session(seed)
    methods = (MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3)}), MethodSpec("indirect", "subspace"),
               MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)}), MethodSpec("direct", "hankel"))
    r = run_bench(session, _settings(methods=methods, control=None, train_trials=(2,)), plant=plant, n_workers=1,
                  progress=False)
    t = r.tasks
    assert (t.loc[t["full_train"], "status"] == "ok").all()  # every method fitted and scored at the base point
    sweep = t[~t["full_train"]]
    assert set(sweep["status"]) == {"ok", "skipped"} and r.failures.empty
    for split, g in sweep.groupby("split"):
        base = t[t["full_train"] & (t["split"] == split)]
        chosen = {base.loc[b["inner_r2"].idxmax(), "label"] for _, b in base.groupby("route")}
        assert set(g.loc[g["status"] == "ok", "label"]) == chosen


def test_t_interval_is_numpys_mean_and_std_bit_for_bit():
    # t_interval repeats NumPy's mean and std(ddof=1) operations without their dispatch; the golden demo's
    # intervals must not move (reference: numpy's own mean and std)
    import math

    from stimsteer.control.evaluation.stats import _t_quantile

    rng = np.random.default_rng(5)
    for n in (1, 2, 3, 5, 9, 17, 40):
        for scale in (1e-9, 1.0, 1e7):
            v = rng.standard_normal(n) * scale + rng.uniform(-5, 5)
            v[rng.random(n) < 0.1] = np.nan
            w = v[np.isfinite(v)]
            mean, lo, hi = t_interval(v)
            if w.size == 0:
                assert np.isnan(mean)
                continue
            assert mean == float(w.mean())
            if w.size > 1:
                half = float(_t_quantile(0.975, w.size - 1) * w.std(ddof=1) / math.sqrt(w.size))
                assert (lo, hi) == (float(w.mean()) - half, float(w.mean()) + half)


def test_group_rows_are_pandas_groups_in_order():
    # the sweeps group the task table by arrays; the groups, their order and their rows must be pandas' groupby's
    from stimsteer.control.evaluation.tables import _group_rows

    frame = pd.DataFrame({"label": ["b", "a", "b", "a", "c", "a"], "route": ["x", "y", "x", "y", "x", "x"],
                          "n": [3, 9, 3, 3, 9, 9], "v": np.arange(6.0)})
    ours = _group_rows(frame, ["label", "route", "n"])
    theirs = [(k, g.index.to_numpy()) for k, g in frame.groupby(["label", "route", "n"], sort=True)]
    assert [k for k, _ in ours] == [tuple(k) for k, _ in theirs]
    for (_, a), (_, b) in zip(ours, theirs):
        np.testing.assert_array_equal(a, b)


def test_the_first_closed_loop_step_is_reported_apart_from_the_per_step_solve_times():
    # the first plan also sets the controller up (a live run does that in its warm-up, control/_live_setup.py): its
    # time is its own column, and the per-step statistics are those of the steps after it (numpy's median,
    # percentile and max of the rest, the reference)
    from types import SimpleNamespace

    from stimsteer.control.evaluation.closed_loop import _loop_row

    times = np.array([5.9, 0.004, 0.002, 0.003, 0.010, 0.001])
    loop = SimpleNamespace(solve_time_s=times, rms_tracking_error=np.array([1.0]), tracking_error=np.zeros((6, 1)),
                           energy_ua2=0.0, limit_use={}, violations={}, n_fallback=0)
    row = _loop_row(loop, 0, None)
    assert row["solve_ms_first"] == pytest.approx(5900.0)
    assert row["solve_ms_max"] == pytest.approx(10.0)
    assert row["solve_ms_median"] == pytest.approx(np.median(times[1:]) * 1e3)
    assert row["solve_ms_p95"] == pytest.approx(np.percentile(times[1:], 95) * 1e3)
    one = _loop_row(SimpleNamespace(**{**vars(loop), "solve_time_s": times[:1]}), 0, None)
    assert one["solve_ms_first"] == one["solve_ms_max"] == pytest.approx(5900.0)  # a loop of one step
