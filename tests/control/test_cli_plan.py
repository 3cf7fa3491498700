"""Tests of the `stimsteer plan` command (files, printed caution, error lines) and its helpers."""

import hashlib
import json
import os

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import CAUTION, main
from stimsteer.control.mpc import parse_target
from stimsteer.sysid import Session, StateSpaceModel
from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.io import save_session
from stimsteer.sysid.storage import save_predictor
from stimsteer.sysid import load_pattern
from stimsteer.sysid._records import versions

LIMITS = """
[energy]
budget_ua2 = 50.0

[inputs.site_b]
amplitude_min_ua = -2.0
amplitude_max_ua = 2.0
slew_max_ua = 1.0

[inputs.site_a]
amplitude_min_ua = 0.0
amplitude_max_ua = 3.0

[outputs.lfp_1]
max = 0.5
"""


@pytest.fixture
def files(tmp_path, rng):
    A = rng.normal(size=(3, 3))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.normal(size=(3, 2)), C=rng.normal(size=(2, 3)), sample_rate_hz=200.0,
                            input_names=("site_a", "site_b"), output_names=("lfp_0", "lfp_1"), past_steps=3)
    prov = {"session": {"input_names": ["site_a", "site_b"], "input_units": ["uA", "uA"],
                        "output_names": ["lfp_0", "lfp_1"], "output_units": ["uV", "uV"], "sample_rate_hz": 200.0}}
    save_predictor(model, tmp_path / "model.h5", provenance=prov)
    (tmp_path / "limits.toml").write_text(LIMITS)
    u = rng.uniform(0, 1, size=(40, 2))
    session = Session(u=u, y=model.simulate(u), sample_rate_hz=200.0, trials=[(0, 20), (20, 40)],
                      input_names=model.input_names, output_names=model.output_names,
                      input_units=("uA", "uA"), output_units=("uV", "uV"))
    save_session(session, tmp_path / "session.h5")
    return tmp_path, model


def test_plan_writes_table_pattern_figure_and_summary(files, capsys):
    d, model = files
    rc = main(["plan", str(d / "model.h5"), "--target", "lfp_0=1.5", "--limits", str(d / "limits.toml"),
               "--out", str(d / "out"), "--horizon-steps", "8"])
    out = capsys.readouterr().out
    assert rc == 0 and CAUTION in out and "status optimal" in out
    assert (d / "out" / "plan.csv").read_text().startswith("# status: optimal (optimised plan)\n")
    table = pd.read_csv(d / "out" / "plan.csv", comment="#")
    assert table.shape[0] == 8
    assert list(table.columns[:3]) == ["time [s] @ 200 Hz", "in:site_a [uA]", "in:site_b [uA]"]
    assert "target:lfp_0 [uV]" in table.columns and "target:lfp_1 [uV]" not in table.columns
    assert table["in:site_a [uA]"].between(0.0, 3.0).all() and table["in:site_b [uA]"].between(-2, 2).all()
    assert np.abs(np.diff(np.r_[0.0, table["in:site_b [uA]"]])).max() <= 1.0 + 1e-9
    summary = json.loads((d / "out" / "plan.json").read_text())
    assert summary["caution"] == CAUTION and summary["status"] == "optimal"
    assert summary["tracked_outputs"] == ["lfp_0"] and "energy_budget" in summary["active_counts"]
    assert (d / "out" / "plan.png").stat().st_size > 1000
    pattern = pd.read_csv(d / "out" / "plan_pattern.csv", comment="#")
    assert list(pattern.columns) == ["time [s] @ 200 Hz", "in:site_a [uA]", "in:site_b [uA]"]


def test_plan_from_a_recorded_trial_with_a_target_table(files, capsys):
    d, model = files
    pd.DataFrame({"step": range(6), "target:lfp_1 [uV]": np.linspace(0, 0.4, 6)}).to_csv(d / "t.csv", index=False)
    rc = main(["plan", str(d / "model.h5"), "--target", str(d / "t.csv"), "--limits", str(d / "limits.toml"),
               "--out", str(d / "out"), "--from-trial", f"{d / 'session.h5'}:1"])
    out = capsys.readouterr().out
    assert rc == 0 and "planned 6 steps" in out and "end of trial 1" in out
    assert main(["plan", str(d / "model.h5"), "--target", str(d / "t.csv"), "--limits", str(d / "limits.toml"),
                 "--out", str(d / "out")]) == 2  # refuses to overwrite without --force
    assert "--force" in capsys.readouterr().err


@pytest.mark.parametrize(
    "target, extra, match",
    [
        ("lfp_9=1", ["--horizon-steps", "5"], "must be <output>=<value>"),
        ("lfp_0=1", [], "give the horizon"),
        ("lfp_0=big", ["--horizon-steps", "5"], "is not a number"),
    ],
)
def test_plan_errors_are_one_line_with_exit_code_2(files, capsys, target, extra, match):
    d, _ = files
    rc = main(["plan", str(d / "model.h5"), "--target", target, "--limits", str(d / "limits.toml"),
               "--out", str(d / "out"), *extra])
    err = capsys.readouterr().err
    assert rc == 2 and match in err and err.count("\n") == 1


def test_plan_refuses_limits_for_other_inputs(files, capsys):
    d, _ = files
    (d / "other.toml").write_text("[inputs.site_x]\namplitude_min_ua = 0\namplitude_max_ua = 1\n")
    rc = main(["plan", str(d / "model.h5"), "--target", "lfp_0=1", "--limits", str(d / "other.toml"),
               "--out", str(d / "out"), "--horizon-steps", "4"])
    assert rc == 2 and "do not match the model's inputs" in capsys.readouterr().err


def test_parse_target_table_and_constant(tmp_path):
    names = ("a", "b", "c")
    tgt, tracked = parse_target("c=2, a=-1", names, 3)
    np.testing.assert_array_equal(tgt, [[-1, 0, 2]] * 3)
    np.testing.assert_array_equal(tracked, [True, False, True])
    pd.DataFrame({"time [s]": [0, 1, 2], "b [mV]": [1.0, 2.0, 3.0]}).to_csv(tmp_path / "t.csv", index=False)
    tgt, tracked = parse_target(tmp_path / "t.csv", names, 2)
    np.testing.assert_array_equal(tgt[:, 1], [1.0, 2.0])
    assert tracked.tolist() == [False, True, False]


@pytest.mark.parametrize(
    "frame, horizon, match",
    [
        ({"z": [1.0]}, None, "are no outputs of the predictor"),
        ({"a": [1.0]}, 3, "holds 1 target rows; the horizon needs 3"),
        ({"a": [1.0, None]}, 2, "empty or non-numeric"),
        ({"a": [1.0], "target:a": [2.0]}, 1, "two columns for output 'a'"),
    ],
)
def test_parse_target_refuses_bad_tables(tmp_path, frame, horizon, match):
    pd.DataFrame(frame).to_csv(tmp_path / "t.csv", index=False)
    with pytest.raises(SessionError, match=match):
        parse_target(tmp_path / "t.csv", ("a", "b"), horizon)


def test_parse_target_refuses_duplicates_and_missing_files(tmp_path):
    with pytest.raises(SessionError, match="twice"):
        parse_target("a=1,a=2", ("a",), 2)
    with pytest.raises(SessionError, match="must be finite"):
        parse_target("a=inf", ("a",), 2)
    with pytest.raises(FileNotFoundError):
        parse_target(tmp_path / "missing.csv", ("a",), 2)


def test_parse_target_refuses_an_empty_table(tmp_path):
    (tmp_path / "empty.csv").write_text("")
    with pytest.raises(SessionError, match="not a readable CSV table"):
        parse_target(tmp_path / "empty.csv", ("a",), 2)


def test_the_plan_figure_carries_the_caution(files, capsys, saved_figures):
    # a figure travels without its folder, so the caution is drawn into it (project rule: every plan carries it)
    import matplotlib.text

    d, _model = files
    assert main(["plan", str(d / "model.h5"), "--target", "lfp_0=1", "--limits", str(d / "limits.toml"),
                 "--out", str(d / "out"), "--horizon-steps", "8"]) == 0
    texts = [" ".join(t.get_text().split()) for fig in saved_figures for t in fig.findobj(matplotlib.text.Text)]
    assert CAUTION in texts


def test_parse_target_takes_one_number_per_output_like_network(tmp_path):
    names = ("a", "b", "c")
    tgt, tracked = parse_target("0.5, 0, -1.25", names, 2)
    np.testing.assert_array_equal(tgt, [[0.5, 0.0, -1.25]] * 2)
    assert tracked.all()
    with pytest.raises(SessionError, match=r"gives 2 value\(s\); a constant target as a plain list needs one per "
                                           r"output \(3"):
        parse_target("1,2", names, 2)
    with pytest.raises(SessionError, match="give the horizon"):
        parse_target("1,2,3", names, None)
    with pytest.raises(SessionError, match="must be finite"):
        parse_target("1,nan,3", names, 2)
    with pytest.raises(FileNotFoundError, match="nor one number per output"):
        parse_target(tmp_path / "missing.csv", names, 2)


def test_plan_notes_inputs_recorded_in_another_unit_than_the_limits(files, capsys):
    d, model = files
    rc = main(["plan", str(d / "model.h5"), "--target", "lfp_0=1.5", "--limits", str(d / "limits.toml"),
               "--out", str(d / "out_ua"), "--horizon-steps", "8"])
    assert rc == 0 and "recorded in" not in capsys.readouterr().out  # µA inputs: nothing to say
    prov = {"session": {"input_names": ["site_a", "site_b"], "input_units": ["mW", "uA"],
                        "output_names": ["lfp_0", "lfp_1"], "output_units": ["uV", "uV"], "sample_rate_hz": 200.0}}
    save_predictor(model, d / "opto.h5", provenance=prov)
    rc = main(["plan", str(d / "opto.h5"), "--target", "lfp_0=1.5", "--limits", str(d / "limits.toml"),
               "--out", str(d / "out_mw"), "--horizon-steps", "8"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "note: the model's inputs were recorded in mW, while the limits file declares µA" in out


# ------------------------------------------------------------------------------------------------ status, exit codes
def _session_ending_at(d, model, last_rows, name="hot.h5"):
    """A session of two trials whose second trial ends with the given input rows (site_a, site_b)."""
    u = np.full((40, 2), 0.5)
    u[40 - len(last_rows):] = last_rows
    session = Session(u=u, y=model.simulate(u), sample_rate_hz=200.0, trials=[(0, 20), (20, 40)],
                      input_names=model.input_names, output_names=model.output_names,
                      input_units=("uA", "uA"), output_units=("uV", "uV"))
    save_session(session, d / name)
    return d / name


def _run_plan(d, session, out):
    return main(["plan", str(d / "model.h5"), "--target", "lfp_0=1.5", "--limits", str(d / "limits.toml"),
                 "--out", str(d / out), "--horizon-steps", "8", "--from-trial", f"{session}:1"])


def test_a_plan_whose_slew_window_misses_the_amplitude_window_exits_3_and_writes_the_obeyed_window(files, capsys):
    # issue 12: this plan exited 0, and plan.csv wrote step 0 with lower 4 > upper 2 beside an input outside it
    d, model = files
    session = _session_ending_at(d, model, [[1.0, 5.0]])  # site_b ends at 5 µA; its window is ±2, slew 1
    assert _run_plan(d, session, "out") == 3
    captured = capsys.readouterr()
    assert "broken limit: slew on site_b at step 0" in captured.out
    assert captured.err.count("\n") == 1 and "exit code 3" in captured.err
    for name in ("plan.csv", "plan_pattern.csv"):
        assert (d / "out" / name).read_text().startswith("# status: infeasible (SAFE FALLBACK")
    table = pd.read_csv(d / "out" / "plan.csv", comment="#")
    for site in ("site_a", "site_b"):
        low, high, u = (table[f"{k}:{site} [uA]"] for k in ("lower", "upper", "in"))
        assert (low <= high).all() and (u >= low).all() and (u <= high).all()
    assert table["lower:site_b [uA]"][0] == -2.0 and table["upper:site_b [uA]"][0] == 2.0
    summary = json.loads((d / "out" / "plan.json").read_text())
    assert summary["status"] == "infeasible" and summary["fallback"] is True
    assert summary["broken_limits"][0].startswith("slew on site_b at step 0")
    pattern = load_pattern(d / "out" / "plan_pattern.csv")  # `predict --pattern` still reads it
    np.testing.assert_allclose(pattern.u, table[["in:site_a [uA]", "in:site_b [uA]"]].to_numpy())


def test_a_plan_after_a_costly_trial_end_is_held_to_the_energy_left_in_the_window(files, capsys):
    # the budget (50 µA² per 8 samples) counts the inputs applied at the end of the trial, further back than the
    # model's past window of 3 samples
    d, model = files
    session = _session_ending_at(d, model, [[3.0, 1.0]] * 4 + [[0.0, 0.0]] * 3)  # 40 µA² in the last 7 samples
    assert _run_plan(d, session, "ok") == 0
    table = pd.read_csv(d / "ok" / "plan.csv", comment="#")
    u = table[["in:site_a [uA]", "in:site_b [uA]"]].to_numpy()
    assert np.sum(u[0] ** 2) <= 10.0 + 1e-6  # the window ending at step 0 holds the 40 µA² already applied
    session = _session_ending_at(d, model, [[3.0, 2.0]] * 7, "hotter.h5")  # 91 µA²: even the ramp to zero cannot fit
    assert _run_plan(d, session, "bad") == 3
    summary = json.loads((d / "bad" / "plan.json").read_text())
    assert summary["status"] == "infeasible" and "energy budget" in summary["message"]
    assert any(b.startswith("energy_budget") for b in summary["broken_limits"])


def test_exit_codes_are_documented_in_the_help(capsys):
    with pytest.raises(SystemExit):
        main(["plan", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "exit codes:" in text
    for code in ("0 an optimal plan", "3 no optimal plan", "2 bad input", "1 internal error"):
        assert code in text


def test_plan_json_records_the_model_hash_session_hash_and_versions(files, capsys):
    d, model = files
    prov = {"session": {"input_names": ["site_a", "site_b"], "input_units": ["uA", "uA"], "content_hash": "abc123",
                        "output_names": ["lfp_0", "lfp_1"], "output_units": ["uV", "uV"], "sample_rate_hz": 200.0}}
    (d / "models").mkdir()
    save_predictor(model, d / "models" / "m.h5", provenance=prov)
    assert main(["plan", str(d / "models" / "m.h5"), "--target", "lfp_0=1", "--limits", str(d / "limits.toml"),
                 "--out", str(d / "plan"), "--horizon-steps", "4"]) == 0
    summary = json.loads((d / "plan" / "plan.json").read_text())
    assert summary["model_sha256"] == hashlib.sha256((d / "models" / "m.h5").read_bytes()).hexdigest()
    assert summary["session_content_hash"] == "abc123"
    assert summary["versions"]["numpy"] == versions()["numpy"]
    # relative to the plan folder: the record survives moving the folder tree (the demo builds it in a temporary one)
    assert summary["model_file"] == os.path.join("..", "models", "m.h5")
