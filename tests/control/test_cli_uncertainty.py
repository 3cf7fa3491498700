"""`fit --bootstrap N` (an ensemble, its held-out interval coverage), `fit --conditions` and `predict` intervals."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control import LinearNetworkPlant, record_session
from stimsteer.control.cli import main
from stimsteer.sysid import save_session


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("uncertainty")
    plant = LinearNetworkPlant(np.array([[0.9, 0.2], [-0.15, 0.75]]), np.array([[1.0], [0.5]]),
                               np.array([[1.0, 0.0]]), sample_rate_hz=100.0, process_noise_std=0.05,
                               measurement_noise_std=0.1, input_names=["site"])
    u = np.random.default_rng(1).normal(size=(12 * 200, 1))
    s = record_session(plant, u, trials=[(k * 200, (k + 1) * 200) for k in range(12)], seed=1)
    save_session(s.replace(metadata={**s.metadata, "trial_conditions": ["a", "b"] * 6}), d / "s.h5")
    pd.DataFrame({"time [s] @ 100 Hz": np.arange(30) / 100.0, "in:site [uA]": np.sin(np.arange(30) / 5.0)}) \
        .to_csv(d / "p.csv", index=False)
    return d


@pytest.mark.slow
def test_a_bootstrapped_fit_reports_coverage_and_conditions_and_predict_writes_intervals(files, capsys):
    d = files
    assert main(["fit", str(d / "s.h5"), "--route", "indirect", "--method", "arx", "--past-steps", "2",
                 "--bootstrap", "6", "--conditions", "--out", str(d / "m.h5")]) == 0
    out = capsys.readouterr().out
    cov = float(out.split("coverage per output y0 ")[1].split(" %")[0])
    assert 85.0 <= cov <= 99.5
    assert "model change across conditions" in out and "step_gain" in out
    assert main(["predict", str(d / "m.h5"), "--pattern", str(d / "p.csv"), "--out", str(d / "pred")]) == 0
    table = pd.read_csv(d / "pred" / "prediction.csv", comment="#")
    lo, y, hi = (table[f"{k}:y0 [uV]"].to_numpy() for k in ("lo95", "out", "hi95"))
    assert np.all(lo <= y) and np.all(y <= hi) and np.all(hi - lo > 0)


def test_conditions_without_labels_fail_with_one_line(files, tmp_path, capsys):
    plant = LinearNetworkPlant(np.array([[0.5]]), np.array([[1.0]]), np.array([[1.0]]), sample_rate_hz=100.0)
    s = record_session(plant, np.random.default_rng(0).normal(size=(400, 1)),
                       trials=[(k * 100, (k + 1) * 100) for k in range(4)], seed=0)
    save_session(s, tmp_path / "plain.h5")
    code = main(["fit", str(tmp_path / "plain.h5"), "--route", "indirect", "--method", "arx", "--past-steps", "1",
                 "--conditions", "--out", str(tmp_path / "m.h5")])
    err = capsys.readouterr().err
    assert code == 2 and "no condition labels" in err and "Traceback" not in err


@pytest.mark.slow
@pytest.mark.parametrize("mode", ["worst", "average"])
def test_plan_robust_over_the_ensemble_keeps_the_limits(files, mode, capsys):
    d = files
    model = d / "m.h5"
    if not model.exists():
        assert main(["fit", str(d / "s.h5"), "--route", "indirect", "--method", "arx", "--past-steps", "2",
                     "--bootstrap", "6", "--out", str(model)]) == 0
    limits = d / "limits.toml"
    limits.write_text("[inputs.site]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.2\nslew_max_ua = 0.5\n")
    out = d / f"plan_{mode}"
    assert main(["plan", str(model), "--target", "y0=2.0", "--limits", str(limits), "--horizon-steps", "10",
                 "--robust", mode, "--out", str(out)]) == 0
    plan = pd.read_csv(out / "plan.csv", comment="#")
    u = plan["in:site [uA]"].to_numpy()
    assert np.all(u <= 1.2 + 1e-9) and np.all(u >= -1.0 - 1e-9) and np.all(np.abs(np.diff(np.r_[0.0, u])) <= 0.5 + 1e-9)
    assert f"robust-{mode}" in capsys.readouterr().out


@pytest.mark.slow
def test_plan_robust_keeps_an_energy_budget_and_output_bounds_from_the_limits_file(files, tmp_path, capsys):
    # before issue 19's follow-up, `plan --robust` refused limits that declare an energy budget or output bounds
    d = files
    model = d / "m.h5"
    if not model.exists():
        assert main(["fit", str(d / "s.h5"), "--route", "indirect", "--method", "arx", "--past-steps", "2",
                     "--bootstrap", "6", "--out", str(model)]) == 0
    limits = tmp_path / "limits.toml"
    limits.write_text("[energy]\nbudget_ua2 = 2.0\nwindow_steps = 4\n[inputs.site]\namplitude_min_ua = -1.0\n"
                      "amplitude_max_ua = 1.2\nslew_max_ua = 0.5\n[outputs.y0]\nmax = 3.0\n")
    assert main(["plan", str(model), "--target", "y0=5.0", "--limits", str(limits), "--horizon-steps", "12",
                 "--robust", "worst", "--out", str(tmp_path / "p")]) == 0
    out = capsys.readouterr().out
    u = pd.read_csv(tmp_path / "p" / "plan.csv", comment="#")["in:site [uA]"].to_numpy()
    windows = np.convolve(np.r_[np.zeros(3), u] ** 2, np.ones(4), mode="valid")  # every 4-sample window, from rest
    assert windows.max() <= 2.0 * (1 + 1e-9) and windows.max() >= 0.99 * 2.0
    assert "energy_budget over a window of 4 samples" in out and "robust-worst" in out
    assert "output bound on y0" in out and "output bounds exceeded" not in out  # kept for every member


def test_plan_robust_refuses_a_single_model(files, tmp_path, capsys):
    d = files
    assert main(["fit", str(d / "s.h5"), "--route", "indirect", "--method", "arx", "--past-steps", "2",
                 "--out", str(tmp_path / "one.h5")]) == 0
    (tmp_path / "limits.toml").write_text("[inputs.site]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.0\n")
    capsys.readouterr()
    code = main(["plan", str(tmp_path / "one.h5"), "--target", "y0=1.0", "--limits", str(tmp_path / "limits.toml"),
                 "--horizon-steps", "5", "--robust", "worst", "--out", str(tmp_path / "p")])
    assert code == 2 and "--bootstrap N" in capsys.readouterr().err
