"""`fit --conditions` and `fit --trial-windows K`: per-condition models fitted on the training trials and saved,
scored against the pooled model on the held-out trials, window tables written as CSV, and the step-gain horizon
set by `--gain-after` or from the data (issue 19's follow-up)."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import main
from stimsteer.sysid import Session, load_predictor, save_session
from stimsteer.sysid.conditions import step_gains

N_TRIALS, LEN = 12, 150
SYSTEMS = {"A": (0.8, 0.5), "B/x": (0.5, 1.5)}  # y[t] = a y[t-1] + b u[t] per condition (known by construction)
TEST = [2, 7, 9]  # the held-out trials of 12 at --seed 0 and --test-fraction 0.25 (fit prints them)


def _gain(label, steps):
    # step response from rest after `steps` samples: b (1 - a^steps) / (1 - a) (geometric sum; common practice,
    # no source)
    a, b = SYSTEMS[label]
    return b * (1 - a ** steps) / (1 - a)


def _session(labels):
    rng = np.random.default_rng(5)
    u = rng.normal(size=(N_TRIALS * LEN, 1))
    y = np.zeros_like(u)
    for k, c in enumerate(labels):
        a, b = SYSTEMS.get(c, SYSTEMS["A"])
        for t in range(k * LEN + 1, (k + 1) * LEN):
            y[t] = a * y[t - 1] + b * u[t]
    y = y + 0.01 * rng.standard_normal(y.shape)
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=[(k * LEN, (k + 1) * LEN) for k in range(N_TRIALS)],
                   metadata={"trial_conditions": list(labels)}, input_names=["site"], input_units=["uA"])


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    d = tmp_path_factory.mktemp("conditions")
    save_session(_session(["A" if k % 2 == 0 else "B/x" for k in range(N_TRIALS)]), d / "s.h5")
    pd.DataFrame({"time [s] @ 100 Hz": np.arange(30) / 100.0, "in:site [uA]": np.ones(30)}) \
        .to_csv(d / "step.csv", index=False)
    (d / "limits.toml").write_text("[inputs.site]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.0\n")
    return d


def _fit(folder, *extra, out="m.h5"):
    return main(["fit", str(folder / "s.h5"), "--route", "indirect", "--method", "arx", "--past", "2samples",
                 "--out", str(folder / out), *extra])


@pytest.mark.slow
def test_per_condition_models_are_saved_fitted_on_training_trials_and_beat_the_pooled_model(folder, capsys):
    assert _fit(folder, "--conditions", "--bootstrap", "4") == 0
    out = capsys.readouterr().out
    assert "one model per condition fitted on its training trials, 9 of 12" in out
    files = folder / "m_conditions"
    assert sorted(p.name for p in files.iterdir()) == ["condition_A.h5", "condition_B_x.h5", "conditions.csv",
                                                      "step_gains.csv"]
    table = pd.read_csv(files / "conditions.csv")
    labels = ["A" if k % 2 == 0 else "B/x" for k in range(N_TRIALS)]
    for _, row in table.iterrows():
        train = [int(t) for t in row["train_trials"].split()]
        assert not set(train) & set(TEST)  # fitted on training trials only
        assert train == [k for k in range(N_TRIALS) if labels[k] == row["condition"] and k not in TEST]
        assert row["n_test"] == sum(labels[k] == row["condition"] for k in TEST)
        # two different systems: each condition's own model predicts its held-out trials far better
        assert row["vaf_condition_model"] > 99.0 and row["vaf_condition_model"] > row["vaf_pooled_model"] + 5.0
    for label, name in (("A", "condition_A.h5"), ("B/x", "condition_B_x.h5")):
        model, provenance = load_predictor(files / name)
        assert provenance["condition"] == label and provenance["method"] == "arx"
        assert step_gains(model, 200)[0, 0] == pytest.approx(_gain(label, 200), rel=0.02)
    # each is an ordinary model file: predict and plan take it
    assert main(["predict", str(files / "condition_A.h5"), "--pattern", str(folder / "step.csv"),
                 "--out", str(folder / "pred")]) == 0
    pred = pd.read_csv(folder / "pred" / "prediction.csv", comment="#")
    assert pred.filter(like="out:").to_numpy()[-1, 0] == pytest.approx(_gain("A", 30), rel=0.03)
    assert main(["plan", str(files / "condition_B_x.h5"), "--target", "y0=1.0", "--limits",
                 str(folder / "limits.toml"), "--horizon-steps", "10", "--out", str(folder / "plan")]) == 0


@pytest.mark.slow
def test_gain_after_sets_when_the_gains_are_read_and_the_window_table_is_written_as_csv(folder, capsys):
    assert _fit(folder, "--conditions", "--trial-windows", "3", "--gain-after", "50ms", out="g.h5") == 0
    out = capsys.readouterr().out
    assert out.count("step gain after 5 samples (50 ms, --gain-after 50ms)") == 2
    gains = pd.read_csv(folder / "g_conditions" / "step_gains.csv")
    for _, row in gains.iterrows():  # after 5 samples, well short of the settled gains 2.5 and 3.0
        assert row["step_gain"] == pytest.approx(_gain(row["condition"], 5), rel=0.03)
    windows = pd.read_csv(folder / "g_trial_windows.csv")
    assert list(windows.columns) == ["window", "trials", "n_trials", "output", "input", "step_gain", "low", "high"]
    printed = out.split("model change over the session")[1].splitlines()[2:2 + len(windows)]
    assert [float(line.split()[5]) for line in printed] == pytest.approx(windows["step_gain"].tolist(), rel=1e-3)
    assert "window table written to" in out


def test_the_default_gain_horizon_comes_from_the_data_and_is_printed(folder, capsys):
    assert _fit(folder, "--trial-windows", "9", out="d.h5") == 0
    out = capsys.readouterr().out
    assert "from the data: 3 x the recording's memory of" in out
    table = pd.read_csv(folder / "d_trial_windows.csv")
    assert len(table) == 1  # one window of all 9 training trials


@pytest.mark.parametrize("argv, words", [
    (["--gain-after", "50ms"], "--gain-after sets when the step gains"),
    (["--conditions", "--gain-after", "5"], "--gain-after"),
])
def test_gain_after_alone_or_without_a_unit_is_refused(folder, tmp_path, capsys, argv, words):
    try:
        code = main(["fit", str(folder / "s.h5"), "--route", "indirect", "--method", "arx", "--past", "2samples",
                     "--out", str(tmp_path / "m.h5"), *argv])
    except SystemExit as exc:  # argparse's refusal, as a user's shell sees it
        code = exc.code
    err = capsys.readouterr().err
    assert code == 2 and words in err and len(err.strip().splitlines()) == 1
    assert list(tmp_path.iterdir()) == []


def test_a_condition_with_too_few_training_trials_is_refused_before_the_fit(tmp_path, capsys):
    labels = ["A"] * N_TRIALS
    labels[7], labels[0] = "B/x", "B/x"  # trial 7 is held out: one training trial of B/x is left
    save_session(_session(labels), tmp_path / "s.h5")
    code = main(["fit", str(tmp_path / "s.h5"), "--route", "indirect", "--method", "arx", "--past", "2samples",
                 "--conditions", "--out", str(tmp_path / "m.h5")])
    err = capsys.readouterr().err
    assert code == 2 and "'B/x' has 1; each condition needs at least 2 trials" in err
    assert "Counted in the 9 training trials" in err and len(err.strip().splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.h5"]


def test_a_hand_written_table_with_a_condition_column_is_fitted_per_condition(tmp_path, capsys):
    # a lab's own CSV, no stimsteer metadata line: the 'condition' column alone labels the trials
    labels = ["A" if k % 2 == 0 else "B/x" for k in range(N_TRIALS)]
    s = _session(labels)
    rows = np.arange(s.n_samples)
    pd.DataFrame({"time [s] @ 100 Hz": rows / 100.0, "trial": rows // LEN,
                  "condition": [labels[k] for k in rows // LEN], "in:site [uA]": s.u[:, 0],
                  "out:y0 [a.u.]": s.y[:, 0]}).to_csv(tmp_path / "s.csv", index=False)
    assert main(["fit", str(tmp_path / "s.csv"), "--route", "indirect", "--method", "arx", "--past", "2samples",
                 "--out", str(tmp_path / "m.h5"), "--conditions", "--bootstrap", "4"]) == 0
    assert "one model per condition fitted on its training trials, 9 of 12" in capsys.readouterr().out
    table = pd.read_csv(tmp_path / "m_conditions" / "conditions.csv")
    assert sorted(table["condition"]) == ["A", "B/x"]
    assert (table["vaf_condition_model"] > table["vaf_pooled_model"] + 5.0).all()
