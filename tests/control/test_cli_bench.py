"""`stimsteer bench`: the command (control/cli.py) and its file workflow (control/commands/bench.py) on small
session files, and their refusals (exit code 2, one clear line)."""

import json
import time

import numpy as np
import pytest

from stimsteer.control.cli import CAUTION, main
from stimsteer.control.commands.bench import bench_files
from stimsteer.control.plants import LinearNetworkPlant, record_session, save_plant
from stimsteer.sysid.exceptions import StimsteerError
from stimsteer.sysid.io import save_session


def _files(tmp_path, seed, n_trials=8, length=120):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((3, 3))
    A *= 0.7 / np.max(np.abs(np.linalg.eigvals(A)))
    plant = LinearNetworkPlant(A, rng.standard_normal((3, 2)), rng.standard_normal((2, 3)), process_noise_std=0.02,
                               measurement_noise_std=0.05, sample_rate_hz=100.0, input_names=("site_a", "site_b"),
                               output_names=("ch_1", "ch_2"), seed=seed)
    u = rng.uniform(-1, 1, (n_trials * length, 2))
    session = record_session(plant, u, trials=[(i * length, (i + 1) * length) for i in range(n_trials)])
    session_path = save_session(session, tmp_path / "session.h5")
    plant_path = save_plant(plant, tmp_path / "plant.h5")
    return str(session_path), str(plant_path)


@pytest.mark.slow
def test_bench_writes_the_report_and_prints_the_summary(tmp_path, seed, capsys):
    session, plant = _files(tmp_path, seed)
    out = tmp_path / "report"
    code = main(["bench", session, "--out", str(out), "--plant", plant, "--quick", "--workers", "1", "--seed", "4"])
    printed = capsys.readouterr().out
    assert code == 0
    assert (out / "report.html").is_file() and (out / "tables" / "prediction.csv").is_file()
    assert f"report written to {out / 'report.html'}" in printed and CAUTION in printed
    assert "ground-truth plant" in printed
    payload = json.loads((out / "results.json").read_text())
    # issue 18: without --past/--horizon the windows come from the data, as on every command, and the line says so
    horizon = payload["provenance"]["settings"]["horizon_steps"]
    assert "windows (default, from the data)" in printed and f"Prediction {horizon} steps" in printed
    assert payload["provenance"]["seed"] == 4 and payload["provenance"]["source"]["plant_file"] == plant
    assert payload["provenance"]["settings"]["n_splits"] == 2  # --quick


def test_bench_refuses_a_session_with_too_few_trials(tmp_path, seed, capsys):
    session, plant = _files(tmp_path, seed, n_trials=2)
    code = main(["bench", session, "--out", str(tmp_path / "report"), "--workers", "1"])
    err = capsys.readouterr().err
    assert code == 2 and "needs at least 3 trials; this session has 2" in err
    assert not (tmp_path / "report").exists()


def test_bench_refuses_an_output_folder_holding_another_run(tmp_path, seed, capsys):
    session, _plant = _files(tmp_path, seed)
    out = tmp_path / "report"
    out.mkdir()
    (out / "results.json").write_text(json.dumps({"run_id": "0123abcd"}))
    code = main(["bench", session, "--out", str(out), "--workers", "1"])
    err = capsys.readouterr().err
    assert code == 2 and "already holds another run (benchmark run 0123abcd)" in err and "--force" in err
    assert [p.name for p in out.iterdir()] == ["results.json"]


def test_the_output_folder_is_refused_before_any_work(tmp_path, seed):
    session, plant = _files(tmp_path, seed)
    out = tmp_path / "report"
    out.mkdir()
    (out / "old.txt").write_text("another run")
    t0 = time.perf_counter()
    with pytest.raises(StimsteerError, match="already holds another run"):
        bench_files(session, out, plant_path=plant, n_workers=1)
    assert time.perf_counter() - t0 < 1.0
    assert [p.name for p in out.iterdir()] == ["old.txt"]


@pytest.mark.parametrize("extra, message", [
    (["--workers", "0"], "--workers must be at least 1; got 0"),
    (["--seed", "-3"], "seed must be an integer >= 0"),
    (["--plant", "missing_plant.h5"], "no such plant file"),
])
def test_bench_refuses_bad_options(tmp_path, seed, capsys, extra, message):
    session, _plant = _files(tmp_path, seed)
    code = main(["bench", session, "--out", str(tmp_path / "report"), *extra])
    assert code == 2 and message in capsys.readouterr().err
    assert not (tmp_path / "report").exists()


def test_bench_refuses_limits_for_other_inputs(tmp_path, seed, capsys):
    session, plant = _files(tmp_path, seed)
    limits = tmp_path / "limits.toml"
    limits.write_text("[inputs.site_x]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.0\n")
    code = main(["bench", session, "--out", str(tmp_path / "report"), "--plant", plant, "--limits", str(limits),
                 "--quick", "--workers", "1"])
    err = capsys.readouterr().err
    assert code == 2 and "the limits' inputs ['site_x'] do not match the model's inputs ['site_a', 'site_b']" in err
    assert "failed on every split" not in err  # refused before any task ran
    assert not (tmp_path / "report").exists()
