"""Tests of the `stimsteer plan` command (files, printed caution, error lines) and its helpers."""

import json

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import CAUTION, main
from stimsteer.control.mpc import parse_target
from stimsteer.sysid import Session, StateSpaceModel
from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.io import save_session
from stimsteer.sysid.storage import save_predictor

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
    table = pd.read_csv(d / "out" / "plan.csv")
    assert table.shape[0] == 8
    assert list(table.columns[:3]) == ["time [s] @ 200 Hz", "in:site_a [uA]", "in:site_b [uA]"]
    assert "target:lfp_0 [uV]" in table.columns and "target:lfp_1 [uV]" not in table.columns
    assert table["in:site_a [uA]"].between(0.0, 3.0).all() and table["in:site_b [uA]"].between(-2, 2).all()
    assert np.abs(np.diff(np.r_[0.0, table["in:site_b [uA]"]])).max() <= 1.0 + 1e-9
    summary = json.loads((d / "out" / "plan.json").read_text())
    assert summary["caution"] == CAUTION and summary["status"] == "optimal"
    assert summary["tracked_outputs"] == ["lfp_0"] and "energy_budget" in summary["active_counts"]
    assert (d / "out" / "plan.png").stat().st_size > 1000
    pattern = pd.read_csv(d / "out" / "plan_pattern.csv")
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


def test_the_plan_figure_carries_the_caution(files, capsys, monkeypatch):
    # a figure travels without its folder, so the caution is drawn into it (project rule: every plan carries it)
    import matplotlib.figure
    import matplotlib.text

    texts = []
    original = matplotlib.figure.Figure.savefig

    def capture(fig, *args, **kwargs):
        texts.extend(" ".join(t.get_text().split()) for t in fig.findobj(matplotlib.text.Text))
        return original(fig, *args, **kwargs)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", capture)
    d, _model = files
    assert main(["plan", str(d / "model.h5"), "--target", "lfp_0=1", "--limits", str(d / "limits.toml"),
                 "--out", str(d / "out"), "--horizon-steps", "8"]) == 0
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
