"""Issue 18 (a newcomer's afternoon): windows in time with defaults from the data, channel selection, empty cells as
masked samples, the network console, schedules that use the declared window. Each test reproduces one of the
issue's "What was measured" findings on a small 1 kHz session of 3 sites and 20 channels (a dead channel, a NaN gap
without a `valid` column) and shows the fix."""

import argparse

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import build_parser, main
from stimsteer.sysid import Session, load_session
from stimsteer.sysid.exceptions import InvalidParameterError, SessionError
from stimsteer.sysid.io import save_session
from stimsteer.sysid.statespace import StateSpaceModel
from stimsteer.sysid.storage import save_predictor
from stimsteer.sysid.window_defaults import default_windows, parse_window

RATE = 1000.0
SITES = ("site_a", "site_b", "site_c")
CHANNELS = tuple(f"ch_{i:02d}" for i in range(20))
DEAD = "ch_07"


def _newcomer_session(seed=18, n_trials=6, trial_s=0.6):
    """3 sites, 20 channels at 1 kHz: a stable network with a slow mode (|λ| = 0.98), one dead channel."""
    rng = np.random.default_rng(seed)
    n = 4
    A = np.diag([0.98, 0.9, 0.8, 0.6])
    B, C = rng.standard_normal((n, 3)), rng.standard_normal((20, n))
    C[CHANNELS.index(DEAD)] = 0.0
    length = int(trial_s * RATE)
    u = np.zeros((n_trials * length, 3))
    for k in range(n_trials):  # pulses of a few ms, as a stimulator gives
        for j in range(3):
            on = rng.choice(length - 5, size=12, replace=False)
            for t in on:
                u[k * length + t:k * length + t + 3, j] = rng.uniform(-20, 20)
    x, y = np.zeros(n), np.empty((u.shape[0], 20))
    for t in range(u.shape[0]):
        y[t] = C @ x
        x = A @ x + 0.05 * B @ u[t]
    y += 0.01 * rng.standard_normal(y.shape)
    y[:, CHANNELS.index(DEAD)] = 0.0
    trials = [(k * length, (k + 1) * length) for k in range(n_trials)]
    return Session(u=u, y=y, sample_rate_hz=RATE, trials=trials, input_names=SITES, output_names=CHANNELS,
                   input_units=("uA",) * 3, output_units=("uV",) * 20)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("newcomer")
    session = _newcomer_session()
    h5 = save_session(session, folder / "session.h5")
    # the CSV as a newcomer exports it: no `valid` column, and a gap of empty cells in one channel
    csv = folder / "session_gap.csv"
    save_session(session, csv)
    frame = pd.read_csv(csv, comment="#")
    frame = frame.drop(columns=["valid"])
    col = [c for c in frame.columns if c.startswith("out:ch_03")][0]
    frame.loc[1200:1249, col] = np.nan  # 50 ms without samples, from t = 1.2 s
    frame.to_csv(csv, index=False)
    return {"h5": str(h5), "csv": str(csv), "folder": folder, "session": session}


# ------------------------------------------------------------------------------------------------ windows
@pytest.mark.parametrize("text, unit, value", [("100ms", "s", 0.1), ("0.25s", "s", 0.25), ("40samples", "samples", 40),
                                               ("1sample", "samples", 1)])
def test_a_window_is_a_time_or_samples_with_their_suffix(text, unit, value):
    w = parse_window(text)
    assert (w.unit, w.value) == (unit, pytest.approx(value))
    assert parse_window("100ms").steps(1000.0) == 100 and parse_window("100ms").steps(250.0) == 25


@pytest.mark.parametrize("text, message", [("10", "a bare number is ambiguous"), ("10 parsecs", "unknown unit"),
                                           ("0ms", "longer than zero"), ("2.5samples", "whole number")])
def test_a_bad_window_is_refused_with_the_accepted_spellings(text, message):
    with pytest.raises(InvalidParameterError, match=message):
        parse_window(text, option="--past")


def test_a_window_shorter_than_a_sample_is_refused_naming_the_rate():
    with pytest.raises(InvalidParameterError, match=r"--past 1ms is shorter than one sample at 250 Hz"):
        parse_window("1ms").steps(250.0, option="--past")


@pytest.mark.parametrize("command", ["inspect", "fit", "bench", "plan", "network", "live", "schedule", "study"])
def test_every_command_takes_the_same_window_options(command):
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices[command]
    flags = {s for a in sub._actions for s in a.option_strings}
    assert "--horizon" in flags and "--horizon-steps" in flags  # the older spelling stays an alias
    if command not in ("plan", "network", "live"):  # those take a model's own past window
        assert "--past" in flags and "--past-steps" in flags


def test_a_bare_number_on_the_command_line_is_one_line_and_exit_2(files, tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["fit", files["h5"], "--route", "direct", "--method", "lsq", "--out", str(tmp_path / "m.h5"),
              "--past", "10"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "argument --past" in err[0] and "40samples" in err[0]


def test_default_windows_follow_a_known_first_order_memory():
    # y[k+1] = 0.9 y[k] + u[k]: the impulse response is 0.9^(k-1) from k = 1, above 10 % of its peak up to
    # k = 1 + ln 0.1 / ln 0.9 = 22.9, i.e. 22 samples (a mode decays as |λ|^k; common practice, no source)
    rng = np.random.default_rng(3)
    u = rng.standard_normal((4000, 1))
    y = np.zeros((4000, 1))
    for k in range(3999):
        y[k + 1] = 0.9 * y[k] + u[k]
    s = Session(u=u, y=y + 0.01 * rng.standard_normal(y.shape), sample_rate_hz=500.0,
                trials=[(i * 1000, (i + 1) * 1000) for i in range(4)])
    d = default_windows(s)
    assert d.past_steps == d.horizon_steps and abs(d.past_steps - 22) <= 1
    assert "quick ARX" in d.text() and f"past {d.past_steps} samples ({2 * d.past_steps:g} ms)" in d.text()


def test_windows_default_to_the_data_in_time_and_the_line_says_so(files, capsys):
    # measured: past 10 / horizon 20 samples whatever the rate (10-20 ms at 1 kHz)
    assert main(["inspect", files["h5"], "--drop", DEAD]) == 0
    printed = capsys.readouterr().out
    line = next(ln for ln in printed.splitlines() if ln.startswith("windows (default, from the data)"))
    d = default_windows(files["session"].select(drop=DEAD))
    assert f"past {d.past_steps} samples ({d.past_steps:g} ms)" in line and "at 1000 Hz" in line
    # the slow mode (0.98: 10 % after 114 samples) is longer than the caps allow with 22 channels: said so
    assert d.capped and "capped at" in line and (d.past_steps + d.horizon_steps) * 22 <= 1200
    assert d.past_steps > 20


def test_fit_takes_a_window_in_milliseconds(files, tmp_path, capsys):
    from stimsteer.sysid import load_predictor

    out = tmp_path / "m.h5"
    assert main(["fit", files["h5"], "--route", "direct", "--method", "lsq", "--out", str(out), "--past", "30ms",
                 "--horizon", "0.02s", "--outputs", "ch_0[0-3]"]) == 0
    predictor, provenance = load_predictor(out)
    assert predictor.past_steps_ == 30 and provenance["horizon_steps"] == 20
    assert "windows (default" not in capsys.readouterr().out  # nothing defaulted, nothing to say


# ------------------------------------------------------------------------------------------------ channels
def test_select_keeps_names_globs_and_drops():
    s = _newcomer_session(n_trials=2, trial_s=0.05)
    t = s.select(outputs="ch_0*", drop=[DEAD, "site_c"])
    assert t.input_names == ("site_a", "site_b") and DEAD not in t.output_names and len(t.output_names) == 9
    np.testing.assert_array_equal(t.y[:, 0], s.y[:, 0])
    assert t.metadata["selected_channels"]["outputs"][0] == "ch_00"
    with pytest.raises(SessionError, match=r"no output named 'lfp_\*'; the session's outputs are: ch_00, ch_01"):
        s.select(outputs="lfp_*")
    with pytest.raises(SessionError, match="leaves no output channel"):
        s.select(drop="ch_*")


def test_an_unknown_channel_on_the_command_line_names_the_known_ones(files, tmp_path, capsys):
    assert main(["inspect", files["h5"], "--drop", "ch_99"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no channel named 'ch_99'" in err[0] and "site_a" in err[0] and "ch_19" in err[0]


@pytest.mark.slow
def test_a_dead_channel_dropped_lets_subspace_fit(files, tmp_path, capsys):
    # measured: subspace refused the session with a dead channel, with no way to leave it out
    out = tmp_path / "s.h5"
    assert main(["fit", files["h5"], "--route", "indirect", "--method", "subspace", "--out", str(out),
                 "--past", "20samples", "--horizon", "20samples", "--drop", DEAD]) == 0
    from stimsteer.sysid import load_predictor
    predictor, _ = load_predictor(out)
    assert DEAD not in predictor.output_names_ and len(predictor.output_names_) == 19


# ------------------------------------------------------------------------------------------------ gaps
def test_empty_cells_without_a_valid_column_are_masked_and_inspect_says_where(files, capsys):
    # measured: inspect refused the session naming "channel 0" and "sample 21200"
    s = load_session(files["csv"])
    assert not s.mask[1200:1250].any() and s.mask[:1200].all() and s.mask[1250:].all()
    assert s.metadata["masked_empty_cells"] == [{"channel": "out:ch_03", "samples": 50, "first_s": 1.2}]
    assert main(["inspect", files["csv"], "--past", "20ms", "--horizon", "20ms"]) == 0
    printed = capsys.readouterr().out
    assert "gap: 50 sample(s) of out:ch_03 are missing (empty cells or a mark such as n/a), first at t = 1.2 s" \
        in printed
    # a masked gap is a note under the verdict; it used to be printed below "No problems found."
    lines = printed.splitlines()
    gap_at = next(i for i, ln in enumerate(lines) if "gap: 50 sample(s)" in ln)
    assert lines[gap_at].startswith("  - gap:") and "Notes:" in lines[:gap_at]


def test_cells_marked_n_a_are_masked_like_empty_ones(files, tmp_path):
    # A spreadsheet export may write "n/a" where a sample is missing: pandas reads it as missing by default (pandas
    # documentation, read_csv, na_values), and the reader masks those rows as it does empty cells.
    frame = pd.read_csv(files["csv"], comment="#", keep_default_na=False, dtype=str)
    col = [c for c in frame.columns if c.startswith("out:ch_03")][0]
    frame.loc[1200:1249, col] = "n/a"  # 50 samples from row 1200: t = 1.2 s at RATE = 1000 Hz, as the empty gap
    path = tmp_path / "session_na.csv"
    frame.to_csv(path, index=False)
    s = load_session(path)
    assert s.metadata["masked_empty_cells"] == [{"channel": "out:ch_03", "samples": 50, "first_s": 1.2}]
    assert not s.mask[1200:1250].any() and s.mask[:1200].all() and s.mask[1250:].all()


def test_a_time_column_without_its_unit_is_named_with_the_spelling_to_use(tmp_path, capsys):
    # found trying it as a newcomer: 'time' without [s] gave "missing ['time']; not recognised ['time']"
    path = tmp_path / "t.csv"
    pd.DataFrame({"time": np.arange(40) / 100.0, "trial": 0, "in:s [uA]": 1.0,
                  "out:c [uV]": np.arange(40.0)}).to_csv(path, index=False)
    assert main(["inspect", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "'time' looks like the time column but has no unit" in err
    assert "write it as 'time [s]'" in err and "not recognised" not in err


def test_the_window_line_says_which_window_was_given(files, capsys):
    # found trying it as a newcomer: "windows (default, from the data)" headed a line whose past was given
    assert main(["inspect", files["h5"], "--drop", DEAD, "--past", "20ms"]) == 0
    assert "windows (past as given, horizon from the data): past 20 samples (20 ms, as given)" in \
        capsys.readouterr().out
    assert main(["inspect", files["h5"], "--drop", DEAD, "--horizon", "10ms"]) == 0
    assert "windows (horizon as given, past from the data)" in capsys.readouterr().out
    assert main(["inspect", files["h5"], "--drop", DEAD, "--past", "20ms", "--horizon", "10ms"]) == 0
    assert "windows (" not in capsys.readouterr().out  # nothing came from the data: no line


def test_a_nan_at_a_valid_sample_names_the_channel_and_the_time():
    y = np.zeros((20, 2))
    y[13, 1] = np.nan
    with pytest.raises(SessionError, match=r"in output 'lfp' at t = 0.13 s \(sample 13\)\. Mark those samples "
                                           r"invalid .*leave the cell empty"):
        Session(u=np.zeros((20, 1)), y=y, sample_rate_hz=100.0, output_names=["emg", "lfp"])


# ------------------------------------------------------------------------------------------------ network
def _slow_model():
    # a mode at 0.9996 at 1 kHz: time constant -1 / (1000 ln 0.9996) = 2.4995 s (the measured model)
    A = np.diag([0.9996, 0.5])
    return StateSpaceModel(A=A, B=np.array([[0.01, 0.0], [0.0, 1.0]]), C=np.array([[1.0, 1.0], [0.0, 1.0]]),
                           sample_rate_hz=1000.0, input_names=("s1", "s2"), output_names=("c1", "c2"),
                           input_units=("uA", "uA"), output_units=("uV", "uV"))


def test_network_flags_a_slow_mode_and_states_the_impulse_cap(tmp_path, capsys):
    # measured: responses cut at 27 ms while a mode had a time constant of ~2.5 s, unflagged
    path = tmp_path / "slow.h5"
    save_predictor(_slow_model(), path, provenance={"session": {"input_units": ["uA", "uA"],
                                                                "output_units": ["uV", "uV"]}})
    assert main(["network", str(path), "--out", str(tmp_path / "n")]) == 0
    printed = capsys.readouterr().out
    assert "warning: slow (near-unstable) mode |λ| = 0.999600: time constant 2.499 s" in printed
    assert "impulse responses: 4000 samples (4 s): capped at 4000 samples; the slowest mode (time constant 2.499 s) " \
           "needs 11.51 s to decay to 1%" in printed
    assert pd.read_csv(tmp_path / "n" / "impulse_responses.csv")["step"].max() == 3999


def test_network_takes_name_value_targets_and_gives_energies_with_their_unit(tmp_path, capsys):
    path = tmp_path / "m.h5"
    save_predictor(_slow_model(), path, provenance={"session": {"input_units": ["uA", "uA"],
                                                                "output_units": ["uV", "uV"]}})
    assert main(["network", str(path), "--out", str(tmp_path / "a"), "--target", "c2=1", "--horizon", "5ms"]) == 0
    named = capsys.readouterr().out
    assert main(["network", str(path), "--out", str(tmp_path / "b"), "--target", "0,1", "--free", "c1",
                 "--horizon-steps", "5"]) == 0
    numeric = capsys.readouterr().out
    assert "free channels (not held to the target): c1" in named
    assert "least energy" in named and "uA² x samples" in named
    a = pd.read_csv(tmp_path / "a" / "transition.csv")
    b = pd.read_csv(tmp_path / "b" / "transition.csv")
    pd.testing.assert_frame_equal(a, b)  # the same request in two spellings
    assert main(["network", str(path), "--out", str(tmp_path / "c"), "--target", "c9=1"]) == 2
    assert "'c9' is not a recorded channel of the model; its channels are c1, c2" in capsys.readouterr().err


# ------------------------------------------------------------------------------------------------ schedules
def test_schedule_uses_the_declared_window_under_a_slew_limit(tmp_path, capsys):
    # measured: ±7.5 of ±50 µA used (two PRBS levels narrowed to one slew step apart)
    limits = tmp_path / "limits.toml"
    limits.write_text("[inputs.a]\namplitude_min_ua = -50.0\namplitude_max_ua = 50.0\nslew_max_ua = 15.0\n")
    out = tmp_path / "s.csv"
    assert main(["schedule", "--limits", str(limits), "--past", "40ms", "--horizon", "40ms", "--rate-hz", "250",
                 "--trials", "4", "--trial-s", "2", "--rest-s", "0.2", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "order 30 = past window 10 + horizon 10 + states (assumed = past window) (samples at 250 Hz)" in printed
    u = pd.read_csv(out, comment="#").filter(like="in:a").to_numpy()
    assert u.max() == pytest.approx(50.0) and u.min() == pytest.approx(-50.0)
    assert "100 % of the window" in printed and "each bit held 7 sample(s)" in printed


def test_a_budget_that_shrinks_the_schedule_is_a_warning_with_figures_and_the_alternative(tmp_path, capsys):
    limits = tmp_path / "limits.toml"
    limits.write_text("[energy]\nbudget_ua2 = 20000.0\n[inputs.a]\namplitude_min_ua = -50.0\n"
                      "amplitude_max_ua = 50.0\n")
    assert main(["schedule", "--limits", str(limits), "--order", "40", "--rate-hz", "250", "--trials", "4",
                 "--trial-s", "2", "--rest-s", "0.2", "--out", str(tmp_path / "s.csv")]) == 0
    captured = capsys.readouterr()
    # 40 samples of ±50 µA hold 100,000 µA²: the budget of 20,000 allows a gain of sqrt(0.2) = 0.447
    assert "stimsteer schedule: warning: the energy budget (20000 µA² per 40 samples, 0.16 s) scales every " \
           "deviation from rest by 0.447" in captured.err
    assert "--kind pulses with --pulse-rate-hz" in captured.err and "45 % of the amplitude window" in captured.out


def test_the_budget_warning_of_a_non_negative_window_names_its_range_not_plus_minus(tmp_path, capsys):
    # Seen in the demo (non-negative amplitudes, issue 16): "±16.4 of ±50 µA" for a 0 .. 50 µA window
    limits = tmp_path / "limits.toml"
    limits.write_text("[energy]\nbudget_ua2 = 20000.0\n[inputs.a]\namplitude_min_ua = 0.0\namplitude_max_ua = 50.0\n")
    assert main(["schedule", "--limits", str(limits), "--order", "40", "--rate-hz", "250", "--trials", "4",
                 "--trial-s", "2", "--rest-s", "0.2", "--out", str(tmp_path / "s.csv")]) == 0
    err = capsys.readouterr().err
    gain = float(err.split("scales every deviation from rest by ")[1].split(":")[0])
    # deviations from rest (0 µA) are scaled: the window 0 .. 50 becomes 0 .. 50 x gain
    assert f"(e.g. 0 .. {50 * gain:.3g} of 0 .. 50 µA on the first input)" in err and "±" not in err


def test_schedule_shows_progress_on_a_terminal(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("STIMSTEER_PROGRESS", "1")
    limits = tmp_path / "limits.toml"
    limits.write_text("[inputs.a]\namplitude_min_ua = -5.0\namplitude_max_ua = 5.0\n")
    assert main(["schedule", "--limits", str(limits), "--order", "10", "--rate-hz", "100", "--trials", "4",
                 "--trial-s", "1", "--rest-s", "0.2", "--out", str(tmp_path / "s.csv")]) == 0
    assert "stimsteer schedule (prbs, order 10)" in capsys.readouterr().err


def test_a_model_fitted_without_a_dead_channel_predicts_from_a_trial_of_the_whole_session(files, tmp_path, capsys):
    # the session still holds the dropped channel: predict takes the model's channels from it
    model = tmp_path / "m.h5"
    assert main(["fit", files["h5"], "--route", "indirect", "--method", "arx", "--out", str(model),
                 "--past", "5samples", "--horizon", "5samples", "--outputs", "ch_0[0-4]", "--drop", "site_c"]) == 0
    capsys.readouterr()
    assert main(["predict", str(model), "--score-trial", f"{files['h5']}:2"]) == 0
    assert "free-run scores of trial 2" in capsys.readouterr().out


def test_network_channel_options_need_a_session(tmp_path, capsys):
    path = tmp_path / "m.h5"
    save_predictor(_slow_model(), path, provenance={})
    assert main(["network", str(path), "--out", str(tmp_path / "n"), "--drop", "c1"]) == 2
    assert "--inputs, --outputs and --drop choose channels of --session" in capsys.readouterr().err


def test_default_windows_do_not_depend_on_the_units_and_survive_huge_values():
    s = _newcomer_session(n_trials=3, trial_s=0.3)
    a, b = default_windows(s), default_windows(s.replace(u=s.u * 1e150, y=s.y * 1e250))
    assert (a.past_steps, a.horizon_steps) == (b.past_steps, b.horizon_steps)
