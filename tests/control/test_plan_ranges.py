"""Plans show everything they move (issue 18, item 4): every output's predicted range, the flag on untargeted outputs
that move beyond a stated fraction of their recorded range, in the console, the figure and ``plan.json``."""

import json
from types import SimpleNamespace

import numpy as np
import pytest

from stimsteer.control.cli import main
from stimsteer.control.mpc.output_ranges import (FLAG_FRACTION, RANGE_PERCENTILES, output_ranges,
                                                 recorded_output_range)
from stimsteer.demo_data import demo_file
from stimsteer.sysid import InvalidParameterError, Session, StateSpaceModel
from stimsteer.sysid.storage import save_predictor


def _plan(y, names=("a", "b", "c")):
    return SimpleNamespace(predicted_outputs=np.asarray(y, float), output_names=names)


def test_an_untargeted_output_moving_beyond_the_fraction_is_flagged_and_a_targeted_one_is_not():
    # answers by construction: recorded ranges of width 100 each; moves of 40, 20 and 60 from a start of 0
    y = np.array([[0.0, 0.0, 0.0], [40.0, -20.0, 60.0], [10.0, 5.0, 30.0]])
    r = output_ranges(_plan(y), np.zeros(3), units=("uV",) * 3, targeted=[False, False, True],
                      recorded=(np.full(3, -50.0), np.full(3, 50.0)), recorded_from="a test")
    np.testing.assert_allclose(r.largest_move, [40.0, 20.0, 60.0])
    np.testing.assert_allclose(r.move_share, [0.4, 0.2, 0.6])
    np.testing.assert_allclose(r.predicted_min, [0.0, -20.0, 0.0])
    np.testing.assert_allclose(r.predicted_max, [40.0, 5.0, 60.0])
    assert r.flagged.tolist() == [True, False, False]  # c moves most but is targeted
    d = r.to_dict()
    assert d["flagged"] == ["a"] and d["flag_fraction"] == FLAG_FRACTION and len(d["outputs"]) == 3
    lines = r.lines()
    assert sum("FLAGGED" in ln for ln in lines) == 1 and lines[-1].startswith("warning: 1 untargeted output(s)")
    assert all(any(ln.lstrip().startswith(f"{n} [uV]") for ln in lines) for n in "abc")
    # a larger fraction clears the flag; the move is measured from the start, not from zero
    assert not output_ranges(_plan(y), np.zeros(3), recorded=(np.full(3, -50.0), np.full(3, 50.0)),
                             flag_fraction=0.7).flagged.any()
    moved = output_ranges(_plan(y), [40.0, 0.0, 0.0], recorded=(np.full(3, -50.0), np.full(3, 50.0)))
    assert moved.largest_move[0] == 40.0 and moved.flagged[0]  # 0 → 40 from a start of 40 is still 40


def test_without_a_recorded_range_every_output_is_listed_and_none_is_flagged():
    r = output_ranges(_plan([[0.0, 0, 0], [500.0, 0, 0]]), np.zeros(3), recorded_from="nowhere: no session")
    assert not r.flagged.any() and r.to_dict()["outputs"][0]["recorded_low"] is None
    assert "nowhere: no session" in r.lines()[0]


@pytest.mark.parametrize("bad", [0.0, -0.1, float("nan"), "x"])
def test_a_flag_fraction_that_is_not_positive_is_refused(bad):
    with pytest.raises(InvalidParameterError, match=r"--flag-fraction.*positive"):
        output_ranges(_plan([[0.0, 0, 0]]), np.zeros(3), flag_fraction=bad)


def test_the_recorded_range_is_the_percentile_span_of_the_valid_in_trial_samples(rng):
    # outside check: numpy.percentile (linear interpolation, Hyndman & Fan 1996 definition 7) over the same samples
    y = rng.normal(size=(300, 2)) * [1.0, 10.0]
    y[50:60] = 1e6  # masked samples must not count
    mask = np.ones(300, bool)
    mask[50:60] = False
    s = Session(u=np.zeros((300, 1)), y=y, sample_rate_hz=100.0, trials=[(0, 120), (150, 300)], mask=mask)
    keep = np.zeros(300, bool)
    keep[0:120], keep[150:300] = True, True
    keep &= mask
    low, high = recorded_output_range(s)
    expect = np.percentile(y[keep], RANGE_PERCENTILES, axis=0)
    np.testing.assert_allclose(low, expect[0])
    np.testing.assert_allclose(high, expect[1])
    # a bounded read: every k-th valid sample of each segment
    low2, _ = recorded_output_range(s, max_samples=100)
    assert np.all(np.abs(low2 - low) < 0.5 * (high - low))


@pytest.fixture(scope="module")
def demo_direct(tmp_path_factory):
    d = tmp_path_factory.mktemp("demo_plan")
    model = d / "direct.h5"
    assert main(["fit", str(demo_file("demo_session.h5")), "--route", "direct", "--method", "hankel", "--out",
                 str(model), "--past-steps", "10", "--horizon-steps", "20"]) == 0
    return d, model


def test_the_demo_direct_plan_lists_every_output_and_flags_the_untargeted_swing(demo_direct, capsys):
    # issue 18: in the demo's direct plan an untargeted channel swings by ~100 µV while the targets are 15 and −10 µV
    d, model = demo_direct
    capsys.readouterr()
    assert main(["plan", str(model), "--target", "rec_01=15,rec_04=-10", "--limits",
                 str(demo_file("demo_limits.toml")), "--horizon-steps", "20", "--out", str(d / "plan")]) == 0
    out = capsys.readouterr().out
    ranges = json.loads((d / "plan" / "plan.json").read_text())["output_ranges"]
    names = [f"rec_{k:02d}" for k in range(1, 9)]
    assert [o["name"] for o in ranges["outputs"]] == names
    assert all(f"{n} [uV]" in out for n in names)
    assert "demo_session.h5" in ranges["recorded_range_from"]
    rows = {o["name"]: o for o in ranges["outputs"]}
    assert not rows["rec_01"]["flagged"] and not rows["rec_04"]["flagged"]  # targeted
    swing = max(rows, key=lambda n: rows[n]["largest_move"])
    assert not rows[swing]["targeted"] and rows[swing]["largest_move"] > 50.0 and rows[swing]["flagged"]
    assert swing in ranges["flagged"] and f"{swing} (" in out and "warning:" in out
    for o in ranges["outputs"]:  # the flag follows the stated rule
        width = o["recorded_high"] - o["recorded_low"]
        assert o["flagged"] == (not o["targeted"] and o["largest_move"] > FLAG_FRACTION * width)


def test_the_plan_figure_names_every_output_and_the_route(demo_direct, saved_figures):
    import matplotlib.text

    d, model = demo_direct
    assert main(["plan", str(model), "--target", "rec_01=15,rec_04=-10", "--limits",
                 str(demo_file("demo_limits.toml")), "--horizon-steps", "20", "--out", str(d / "plan_fig")]) == 0
    joined = "\n".join(t.get_text() for fig in saved_figures for t in fig.findobj(matplotlib.text.Text))
    assert all(f"rec_{k:02d}" in joined for k in range(1, 9))
    assert "direct route, hankel" in joined and "flagged" in joined


def test_a_plan_without_its_session_lists_ranges_flags_nothing_and_says_why(tmp_path, rng, capsys):
    A = np.diag([0.5, 0.7])
    model = StateSpaceModel(A=A, B=np.eye(2), C=np.eye(2), sample_rate_hz=100.0, input_names=("s0", "s1"),
                            output_names=("y0", "y1"), past_steps=2)
    save_predictor(model, tmp_path / "m.h5", provenance={"session_file": str(tmp_path / "gone.h5")})
    (tmp_path / "limits.toml").write_text("[inputs.s0]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.0\n"
                                          "[inputs.s1]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.0\n")
    assert main(["plan", str(tmp_path / "m.h5"), "--target", "y0=0.5", "--limits", str(tmp_path / "limits.toml"),
                 "--horizon-steps", "5", "--out", str(tmp_path / "p")]) == 0
    out = capsys.readouterr().out
    ranges = json.loads((tmp_path / "p" / "plan.json").read_text())["output_ranges"]
    assert ranges["flagged"] == [] and "not readable here" in ranges["recorded_range_from"]
    assert "y1 [" in out and "--from-trial" in out
    assert main(["plan", str(tmp_path / "m.h5"), "--target", "y0=0.5", "--limits", str(tmp_path / "limits.toml"),
                 "--horizon-steps", "5", "--out", str(tmp_path / "q"), "--flag-fraction", "0"]) == 2
    assert "--flag-fraction" in capsys.readouterr().err and not (tmp_path / "q").exists()
