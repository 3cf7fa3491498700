"""`fit --trial-windows K [--window-step S]` (the model's change over the session) and the method settings from the
command line (`--forgetting`, `--dictionary`, `--dictionary-size`, `--knots`), run as a user runs them."""

import numpy as np
import pytest

from stimsteer.control import LinearNetworkPlant, record_session
from stimsteer.control.cli import main
from stimsteer.sysid import load_predictor, save_session
from stimsteer.sysid.conditions import step_gains, window_change_table

N_TRIALS, LEN = 12, 200
A, B = 0.8, 0.5  # first-order plant: step gain after 50 samples = B (1 - A^50) / (1 - A) ~ 2.5


def _drifting_session():
    """The gain doubles halfway through: the plant is driven by u, but over the second half of the trials the
    recording holds u / 2, so a model of the recorded input has twice the gain there (known by construction)."""
    plant = LinearNetworkPlant(np.array([[A]]), np.array([[B]]), np.array([[1.0]]), sample_rate_hz=100.0,
                               process_noise_std=0.0, measurement_noise_std=0.02, input_names=["site"])
    u = np.random.default_rng(3).normal(size=(N_TRIALS * LEN, 1))
    s = record_session(plant, u, trials=[(k * LEN, (k + 1) * LEN) for k in range(N_TRIALS)], seed=3)
    recorded = s.u.copy()
    recorded[N_TRIALS * LEN // 2:] /= 2.0
    return s.replace(u=recorded)


@pytest.fixture(scope="module")
def session_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("windows")
    save_session(_drifting_session(), d / "s.h5")
    return d / "s.h5"


def _exit_code(argv):
    """`main`'s exit code; argparse's refusals leave by SystemExit(2), as they do for a user's shell."""
    try:
        return main(argv)
    except SystemExit as exc:
        return exc.code


def _table(out):
    """The window table printed by `fit` as rows (window, trials, step_gain, low, high)."""
    lines = out.split("model change over the session")[1].splitlines()[2:]
    rows = []
    for line in lines:
        parts = line.split()
        if len(parts) != 8 or not parts[0].isdigit():
            break
        rows.append((int(parts[0]), parts[1], float(parts[5]), float(parts[6]), float(parts[7])))
    return rows


@pytest.mark.slow
def test_window_gains_follow_a_gain_that_doubles_halfway(session_file, tmp_path, capsys):
    # Outside check: the true step gain is known by construction, B (1 - A^50) / (1 - A) before the change and
    # twice that after (geometric sum of the impulse response; common practice, no source).
    true = B * (1 - A ** 50) / (1 - A)
    code = main(["fit", str(session_file), "--route", "indirect", "--method", "arx", "--past-steps", "2",
                 "--test-fraction", "0.01", "--trial-windows", "3", "--bootstrap", "8",
                 "--out", str(tmp_path / "m.h5")])
    out = capsys.readouterr().out
    assert code == 0, out
    rows = _table(out)
    # test fraction 0.01 holds out 1 of 12 trials: 11 training trials, windows of 3 not overlapping -> 3 windows
    assert [r[0] for r in rows] == [0, 1, 2]
    for _, trials, gain, low, high in rows:
        first, last = (int(t) for t in trials.split("-"))
        expected = true if last < N_TRIALS // 2 else 2 * true if first >= N_TRIALS // 2 else None
        if expected is not None:
            assert gain == pytest.approx(expected, rel=0.08)
            assert low <= gain <= high
    assert rows[-1][2] / rows[0][2] == pytest.approx(2.0, rel=0.1)
    assert rows[0][4] < rows[-1][3]  # the intervals of the first and the last window do not overlap
    assert (tmp_path / "m.h5").exists()


def test_window_table_with_a_step_and_its_intervals(session_file):
    from stimsteer.sysid import load_session

    s = load_session(session_file)
    table = window_change_table(s, method="arx", method_settings={"output_lags": 1, "input_lags": 1},
                                window_trials=4, step_trials=2, n_members=6, seed=0)
    assert list(table["trials"]) == ["0-3", "2-5", "4-7", "6-9", "8-11"]
    assert np.all(table["low"] <= table["high"])
    true = B * (1 - A ** 50) / (1 - A)
    assert table["step_gain"].iloc[0] == pytest.approx(true, rel=0.08)
    assert table["step_gain"].iloc[-1] == pytest.approx(2 * true, rel=0.08)


@pytest.mark.parametrize("argv, words", [
    (["--trial-windows", "1"], "--trial-windows"),
    (["--trial-windows", "10"], "more than the 9 training trials"),
    (["--window-step", "2"], "--window-step needs --trial-windows"),
    (["--trial-windows", "3", "--window-step", "0"], "--window-step"),
])
def test_bad_windows_are_refused_with_one_line_and_nothing_written(session_file, tmp_path, capsys, argv, words):
    out = tmp_path / "m.h5"
    code = _exit_code(["fit", str(session_file), "--route", "indirect", "--method", "arx", "--past-steps", "2",
                       *argv, "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2 and words in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not out.exists() and list(tmp_path.iterdir()) == []


def test_forgetting_reaches_the_recursive_model(session_file, tmp_path, capsys):
    out = tmp_path / "r.h5"
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "recursive", "--forgetting", "0.97",
                 "--out", str(out)]) == 0
    pred, _ = load_predictor(out)
    assert pred.forgetting == pytest.approx(0.97)
    # forgetting ~0.97 remembers ~33 samples: the model ends on the doubled gain of the last trials (by construction)
    assert step_gains(pred)[0, 0] == pytest.approx(2 * B * (1 - A ** 50) / (1 - A), rel=0.15)


def test_dictionary_settings_reach_the_lifted_model(session_file, tmp_path, capsys):
    out = tmp_path / "l.h5"
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "lifted", "--past-steps", "1",
                 "--dictionary", "rbf", "--dictionary-size", "10", "--out", str(out)]) == 0
    pred, _ = load_predictor(out)
    assert pred.dictionary == "rbf" and pred.n_features_ == 10


@pytest.mark.parametrize("argv, words", [
    (["--method", "arx", "--forgetting", "0.9"], "--forgetting is for the recursive method"),
    (["--method", "arx", "--dictionary", "rbf"], "--dictionary is for the lifted method"),
    (["--method", "recursive", "--dictionary-size", "5"], "--dictionary-size is for the lifted method"),
    (["--method", "lifted", "--knots", "5"], "--knots is for the hammerstein method"),
    (["--method", "recursive", "--forgetting", "1.5"], "--forgetting"),
    (["--method", "recursive", "--forgetting", "0"], "in (0, 1]"),
    (["--method", "hammerstein", "--knots", "2"], "--knots"),
])
def test_method_settings_given_to_the_wrong_method_or_out_of_range_are_refused(session_file, tmp_path, capsys,
                                                                              argv, words):
    code = _exit_code(["fit", str(session_file), "--route", "indirect", *argv, "--out", str(tmp_path / "m.h5")])
    err = capsys.readouterr().err
    assert code == 2 and words in err and len(err.strip().splitlines()) == 1
    assert list(tmp_path.iterdir()) == []


def test_windows_are_in_the_help(capsys):
    with pytest.raises(SystemExit):
        main(["fit", "--help"])
    text = capsys.readouterr().out
    assert all(o in text for o in ("--trial-windows", "--window-step", "--forgetting", "--dictionary-size"))
