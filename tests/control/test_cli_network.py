"""The `stimsteer network` and `stimsteer schedule` commands, end to end through main()."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import CAUTION, main
from stimsteer.sysid.network import rank_sites_by_output
from stimsteer.sysid.session import Session
from stimsteer.sysid.statespace import StateSpaceModel
from stimsteer.sysid.storage import load_predictor, save_predictor


def _model(rng, rho=0.85, n=5, m=3, p=4):
    A = rng.standard_normal((n, n))
    A *= rho / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)), sample_rate_hz=50.0,
                           input_names=("site_a", "site_b", "site_c"), output_names=("ch1", "ch2", "ch3", "ch4"))


@pytest.fixture
def model_file(tmp_path, rng):
    path = tmp_path / "model.h5"
    save_predictor(_model(rng), path, provenance={"origin": "test model (random stable network)"})
    return path


def _session(rng, n=600):
    """A small noise-free recording of a random stable model (inputs white, 4 trials)."""
    model = _model(rng, n=3, m=1, p=1).replace(input_names=("site_a",), output_names=("ch1",),
                                                B=rng.standard_normal((3, 1)), C=rng.standard_normal((1, 3)))
    u = rng.standard_normal((n, 1))
    return Session(u=u, y=model.simulate(u), sample_rate_hz=50.0, trials=[(0, 150), (150, 300), (300, 450),
                                                                            (450, 600)])


# ------------------------------------------------------------------------------------------------ network
def test_network_writes_tables_and_figures(model_file, tmp_path, capsys):
    out = tmp_path / "net"
    assert main(["network", str(model_file), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "Kalman rank 5 of 5" in printed and CAUTION in printed
    for name in ("controllability.csv", "gramian_spectrum.csv", "gramian_spectrum.png", "site_controllability.csv",
                 "impulse_responses.csv", "impulse_responses.png", "site_ranking.png"):
        assert (out / name).stat().st_size > 0
    table = pd.read_csv(out / "controllability.csv").set_index("quantity")["value"]
    assert table["normalisation"] == "none" and table["gramian_horizon_steps"] == "infinite"
    assert "independent of the state coordinates" in table["coordinates"]
    assert table["output_rank"] == "4" and table["output_controllable"] == "True"
    sites = pd.read_csv(out / "site_controllability.csv")
    assert np.all(np.diff(sites["h2_squared_to_channels"]) <= 0)
    # a fitted model's states are arbitrary: no state-coordinate figure by default
    assert "average_controllability" not in sites.columns and not (out / "state_controllability.csv").exists()
    assert len(pd.read_csv(out / "site_sets.csv")) == 3 + 3  # singles and pairs of 3 sites
    impulses = pd.read_csv(out / "impulse_responses.csv")
    # issue 18: the default length lets the slowest mode decay to 1 % (ln 0.01 / ln rho samples, at least 20)
    rho = float(table["spectral_radius"])
    steps = max(20, int(np.ceil(np.log(0.01) / np.log(rho))) + 1)
    assert len(impulses) == steps * 4 * 3 and int(table["impulse_response_steps"]) == steps
    assert f"impulse responses: {steps} samples" in printed


def test_network_shows_its_stages_on_a_terminal_and_nothing_off_one(model_file, tmp_path, capsys, monkeypatch):
    # a ridge ARX at 1 kHz takes about 30 s here: a bar of its six stages on standard error (STIMSTEER_PROGRESS=1
    # stands for a terminal), standard output as without it, and no bar where standard error is not a terminal
    monkeypatch.setenv("STIMSTEER_PROGRESS", "1")
    assert main(["network", str(model_file), "--out", str(tmp_path / "a")]) == 0
    shown = capsys.readouterr()
    assert "stimsteer network figures" in shown.err and "/6 [" in shown.err  # redrawn at most every 0.1 s
    monkeypatch.delenv("STIMSTEER_PROGRESS")
    assert main(["network", str(model_file), "--out", str(tmp_path / "b")]) == 0
    quiet = capsys.readouterr()
    assert "network figures" not in quiet.err and quiet.out.replace(str(tmp_path / "b"), "") == \
        shown.out.replace(str(tmp_path / "a"), "")


def test_network_labels_impulse_responses_with_the_recorded_units(tmp_path, rng, capsys):
    path = tmp_path / "model.h5"
    session = {"input_names": ["site_a", "site_b", "site_c"], "input_units": ["uA", "uA", "mW"],
               "output_names": ["ch1", "ch2", "ch3", "ch4"], "output_units": ["mV", "mV", "uV", "mV"]}
    save_predictor(_model(rng), path, provenance={"origin": "test model", "session": session})
    out = tmp_path / "net"
    assert main(["network", str(path), "--out", str(out)]) == 0
    impulses = pd.read_csv(out / "impulse_responses.csv")
    units = impulses.set_index(["channel", "site"])["response unit"]
    assert units[("ch3", "site_c")].iloc[0] == "uV/mW" and units[("ch1", "site_a")].iloc[0] == "mV/uA"
    assert set(impulses["response unit"]) == {f"{o}/{i}" for o in ("mV", "uV") for i in ("uA", "mW")}


def test_network_without_recorded_units_leaves_the_unit_column_out(model_file, tmp_path, capsys):
    out = tmp_path / "net"
    assert main(["network", str(model_file), "--out", str(out)]) == 0
    assert "response unit" not in pd.read_csv(out / "impulse_responses.csv").columns


def test_network_with_a_target_ranks_sites_like_the_api(model_file, tmp_path, capsys):
    out = tmp_path / "net"
    code = main(["network", str(model_file), "--out", str(out), "--target", "1,0,0.5,-1", "--horizon-steps", "8"])
    assert code == 0
    printed = capsys.readouterr().out
    assert "best site sets (least energy, input units² x samples)" in printed  # issue 18: energies with a unit
    assert "not a stimulation plan: no declared limit was applied" in printed  # a figure, not a plan
    ranking = pd.read_csv(out / "site_ranking.csv")
    model, _ = load_predictor(model_file)
    expected = rank_sites_by_output(model, [1, 0, 0.5, -1], horizon_steps=8)
    assert ranking["sites"].tolist() == list(expected.names)
    np.testing.assert_allclose(ranking["energy"], expected.energy, rtol=1e-8)
    transition = pd.read_csv(out / "transition.csv")
    assert transition.shape == (8, 2 + 3)


def test_network_reads_a_target_file_with_channel_names(model_file, tmp_path):
    target = tmp_path / "target.csv"
    target.write_text("out:ch4 [mV],ch3,ch2,out:ch1 [mV]\n-1,0.5,0,1\n")
    out_file, out_text = tmp_path / "a", tmp_path / "b"
    assert main(["network", str(model_file), "--out", str(out_file), "--target", str(target)]) == 0
    assert main(["network", str(model_file), "--out", str(out_text), "--target", "1,0,0.5,-1"]) == 0
    pd.testing.assert_frame_equal(pd.read_csv(out_file / "site_ranking.csv"),
                                  pd.read_csv(out_text / "site_ranking.csv"))


def test_network_accepts_a_fitted_indirect_predictor(tmp_path, rng, capsys):
    from stimsteer.sysid.arx import RidgeArx

    est = RidgeArx(output_lags=2, input_lags=2).fit(_session(rng))
    path = tmp_path / "arx.h5"
    save_predictor(est, path, provenance={"origin": "test"})
    assert main(["network", str(path), "--out", str(tmp_path / "net"), "--target", "0.3"]) == 0
    assert "Kalman rank" in capsys.readouterr().out


def test_network_refuses_a_direct_route_predictor(tmp_path, rng, capsys):
    from stimsteer.sysid.datadriven import LsqPredictor

    est = LsqPredictor(past_steps=3, horizon_steps=4).fit(_session(rng))
    path = tmp_path / "lsq.h5"
    save_predictor(est, path, provenance={"origin": "test"})
    assert main(["network", str(path), "--out", str(tmp_path / "net")]) == 2
    err = capsys.readouterr().err
    assert "direct-route data predictor" in err and "--route indirect" in err
    assert not (tmp_path / "net").exists()


def test_network_on_an_unstable_fitted_model_needs_a_finite_gramian_horizon_never_a_rescaling(tmp_path, rng, capsys):
    path = tmp_path / "unstable.h5"
    save_predictor(_model(rng, rho=1.3), path, provenance={"origin": "test"})
    assert main(["network", str(path), "--out", str(tmp_path / "a")]) == 2
    err = capsys.readouterr().err
    assert "spectral radius 1.3000 >= 1" in err and "--gramian-steps" in err and not (tmp_path / "a").exists()
    # the issue: --normalise divided a fitted A by 1 + sigma_max, changing every time constant; now refused
    assert main(["network", str(path), "--out", str(tmp_path / "b"), "--normalise"]) == 2
    assert "applies to a network map (--map) only" in capsys.readouterr().err and not (tmp_path / "b").exists()
    assert main(["network", str(path), "--out", str(tmp_path / "c"), "--gramian-steps", "10"]) == 0
    table = pd.read_csv(tmp_path / "c" / "controllability.csv").set_index("quantity")["value"]
    assert table["normalisation"] == "none" and table["gramian_horizon_steps"] == "10"
    # its Kalman test: a random 5-state model reaches and sees all its states; balanced as A / 2.6 (twice its
    # spectral radius) it keeps all five, and the console says what the bound is of
    printed = capsys.readouterr().out
    assert "minimal realisation: 5 of 5 states" in printed and "of A / 2.6 (the model is unstable" in printed
    assert "x 2.6^(k-1)" in printed and "Kalman rank 5 of 5" in printed


@pytest.mark.parametrize("extra, match", [
    (["--start", "1,2,3,4"], "--start needs --target"),
    (["--target", "1,2"], "expected 4 finite values"),
    (["--target", "1,x,3,4"], "expected numbers separated by commas"),
    (["--target", "1,nan,0,2"], "every value must be finite, but ch2 = nan"),  # issue 12: name the entry
    (["--target", "1,0,0,2", "--free", "ch9"], "unknown free channel 'ch9'"),
    (["--stimulated", "a"], "--stimulated applies to a network map (--map) only"),
    (["--state-figures", "--gramian-steps", "0"], "gramian_steps must be a whole number"),
])
def test_network_bad_arguments_exit_2_with_one_line(model_file, tmp_path, capsys, extra, match):
    assert main(["network", str(model_file), "--out", str(tmp_path / "n"), *extra]) == 2
    err = capsys.readouterr().err
    assert match in err and err.count("\n") == 1
    assert not (tmp_path / "n").exists()


def test_a_zero_horizon_is_refused_naming_the_flag(model_file, tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["network", str(model_file), "--out", str(tmp_path / "n"), "--target", "1,2,3,4", "--horizon-steps", "0"])
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert "argument --horizon-steps: expected a whole number >= 1; got 0" in err and err.count("\n") == 1
    assert not (tmp_path / "n").exists()


def test_network_target_file_with_wrong_names(model_file, tmp_path, capsys):
    target = tmp_path / "t.csv"
    target.write_text("a,b,c,d\n1,2,3,4\n")
    assert main(["network", str(model_file), "--out", str(tmp_path / "n"), "--target", str(target)]) == 2
    assert "must be the model's outputs" in capsys.readouterr().err


def test_network_keeps_an_existing_folder_unless_forced(model_file, tmp_path, capsys):
    out = tmp_path / "net"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    assert main(["network", str(model_file), "--out", str(out)]) == 2
    assert "already holds files" in capsys.readouterr().err and (out / "keep.txt").exists()  # claimed before computing
    assert main(["network", str(model_file), "--out", str(out), "--force"]) == 0
    assert not (out / "keep.txt").exists()


def test_network_missing_model_file(tmp_path, capsys):
    assert main(["network", str(tmp_path / "nope.h5"), "--out", str(tmp_path / "n")]) == 2
    assert "nope.h5" in capsys.readouterr().err


# ------------------------------------------------------------------------------------------------ schedule
LIMITS = """
[charge_density]
pulse_width_us = 200.0
electrode_area_cm2 = 0.000007

[energy]
budget_ua2 = 5.0e4

[inputs.site_a]
amplitude_min_ua = -60.0
amplitude_max_ua = 60.0
slew_max_ua = 30.0

[inputs.site_b]
amplitude_min_ua = 0.0
amplitude_max_ua = 200.0
"""


@pytest.fixture
def limits_file(tmp_path):
    path = tmp_path / "limits.toml"
    path.write_text(LIMITS)
    return path


@pytest.mark.parametrize("kind", ["pulses", "prbs", "multilevel", "multisine"])
def test_schedule_command_writes_a_schedule_inside_the_limits(limits_file, tmp_path, capsys, kind):
    from stimsteer.control.limits import load_limits
    from stimsteer.control.schedule import load_schedule
    from stimsteer.sysid import verify_excitation

    out = tmp_path / "next.csv"
    args = ["schedule", "--limits", str(limits_file), "--inputs", "2", "--order", "10", "--out", str(out),
            "--kind", kind, "--rate-hz", "100", "--trial-s", "2", "--rest-s", "0.5", "--seed", "7"]
    if kind == "multilevel":
        args += ["--levels", "9"]
    assert main(args) == 0
    printed = capsys.readouterr().out
    assert "expected session length" in printed and CAUTION in printed
    u, trials, names, units, rate = load_schedule(out)
    assert names == ("site_a", "site_b") and units == ("uA", "uA") and rate == 100.0
    limits = load_limits(limits_file)
    # the limits' own check (StimLimits.violations): amplitude (incl. the charge-density bound) and slew
    v = limits.violations(u, last_input=np.zeros(2))
    assert v["amplitude"] == 0 and v["slew"] == 0
    lo, hi = limits.input_bounds()
    # Shannon (1992) bound with k = 1.75, 200 us, 7e-6 cm2: sqrt(10**1.75 * 7e-6) uC / 200 us = 99.2 uA (derived)
    assert hi[1] == pytest.approx(99.2, abs=0.1) and u[:, 1].max() <= hi[1]
    c = np.concatenate([[0.0], np.cumsum(np.sum(u ** 2, axis=1))])
    assert np.all(c[10:] - c[:-10] <= 5.0e4)  # energy budget on every window of --order steps
    assert verify_excitation(u, trials, 10).exciting


def test_schedule_command_refuses_a_mismatched_input_count(limits_file, tmp_path, capsys):
    code = main(["schedule", "--limits", str(limits_file), "--inputs", "3", "--order", "5", "--out",
                 str(tmp_path / "s.csv")])
    assert code == 2
    assert "declares limits for 2 input(s) but --inputs is 3" in capsys.readouterr().err
    assert not (tmp_path / "s.csv").exists()


def test_schedule_command_reports_an_unexciting_design(limits_file, tmp_path, capsys):
    code = main(["schedule", "--limits", str(limits_file), "--inputs", "2", "--order", "50", "--out",
                 str(tmp_path / "s.csv"), "--rate-hz", "100", "--trial-s", "0.2"])
    assert code == 2
    assert "shorter than the excitation order 50" in capsys.readouterr().err


def test_schedule_command_keeps_an_existing_file_unless_forced(limits_file, tmp_path, capsys):
    out = tmp_path / "s.csv"
    out.write_text("keep")
    base = ["schedule", "--limits", str(limits_file), "--inputs", "2", "--order", "5", "--out", str(out),
            "--rate-hz", "50", "--trial-s", "1", "--rest-s", "0.2"]
    assert main(base) == 2
    assert "already exists" in capsys.readouterr().err and out.read_text() == "keep"
    assert main(base + ["--force"]) == 0
    caution, header = out.read_text().splitlines()[:2]
    assert caution == f"# {CAUTION}" and header.startswith("time [s] @ 50 Hz")  # a schedule carries the caution


def test_schedule_command_bad_limits_file(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("this is = = not toml")
    assert main(["schedule", "--limits", str(bad), "--inputs", "1", "--order", "3", "--out",
                 str(tmp_path / "s.csv")]) == 2
    assert "not a valid TOML limits file" in capsys.readouterr().err


def test_schedule_order_from_past_window_horizon_and_states(limits_file, tmp_path, capsys):
    from stimsteer.control.schedule import load_schedule
    from stimsteer.sysid import verify_excitation

    out = tmp_path / "s.csv"
    assert main(["schedule", "--limits", str(limits_file), "--inputs", "2", "--past-steps", "3", "--horizon-steps",
                 "5", "--states", "4", "--out", str(out), "--rate-hz", "50", "--trial-s", "2", "--rest-s", "0"]) == 0
    assert "order 12 = past window 3 + horizon 5 + states 4" in capsys.readouterr().out
    u, trials, *_ = load_schedule(out)
    assert verify_excitation(u, trials, 12).exciting


def test_schedule_needs_an_order_or_a_window(limits_file, tmp_path, capsys):
    assert main(["schedule", "--limits", str(limits_file), "--inputs", "2", "--past-steps", "3", "--out",
                 str(tmp_path / "s.csv")]) == 2
    assert "give --order K, or --past and --horizon (e.g. 40ms or 10samples" in capsys.readouterr().err


def test_network_reports_an_unreachable_target(tmp_path, capsys):
    # by construction: only node 0 is actuated in a diagonal network, so no site reaches a pattern on node 1
    model = StateSpaceModel(A=np.diag([0.5, 0.3]), B=np.array([[1.0], [0.0]]), C=np.eye(2))
    path = tmp_path / "m.h5"
    save_predictor(model, path, provenance={"origin": "test"})
    assert main(["network", str(path), "--out", str(tmp_path / "n"), "--target", "0,1"]) == 0
    printed = capsys.readouterr().out
    # issue 18: the Kalman test runs on the minimal realisation (node 1 is neither reached nor needed: 1 state),
    # which is controllable by construction (Kalman 1963); what is out of reach is a pattern of the channels
    assert "minimal realisation: 1 of 2 states" in printed and "Kalman rank 1 of 1" in printed
    assert "NOT every pattern of the recorded channels can be produced" in printed
    assert "target: NOT reachable" in printed and "none reaches the target" in printed
    assert "REACHABLE" not in printed.replace("NOT reachable", "")  # one statement, not two that disagree
    ranking = pd.read_csv(tmp_path / "n" / "site_ranking.csv")
    assert np.isinf(ranking["energy"]).all() and (tmp_path / "n" / "site_ranking.png").exists()


@pytest.mark.parametrize("text, match", [("", "is an empty file"), ("ch1,ch2,ch3,ch4\n", "header but no row")])
def test_network_target_files_without_values(model_file, tmp_path, capsys, text, match):
    target = tmp_path / "t.csv"
    target.write_text(text)
    assert main(["network", str(model_file), "--out", str(tmp_path / "n"), "--target", str(target)]) == 2
    assert match in capsys.readouterr().err


def test_state_space_of_dispatches_on_the_contract(rng):
    from stimsteer.control.commands.network import state_space_of
    from stimsteer.sysid.exceptions import InvalidParameterError

    model = _model(rng)
    assert state_space_of(model) is model  # a StateSpaceModel is its own state-space form
    with pytest.raises(InvalidParameterError, match="network figures need a state-space model"):
        state_space_of(object(), "m.h5")


def test_network_figures_leave_the_plotting_state_alone(model_file, tmp_path):
    # importing stimsteer and drawing the network figures must not load pyplot or switch the backend
    import subprocess
    import sys

    script = (
        "import sys, matplotlib\n"
        "backend = lambda: dict.__getitem__(matplotlib.rcParams, 'backend')  # read without resolving it\n"
        "before = backend()\n"
        "from stimsteer.control.cli import main\n"
        f"assert main(['network', {str(model_file)!r}, '--out', {str(tmp_path / 'net')!r}]) == 0\n"
        "assert 'matplotlib.pyplot' not in sys.modules, 'pyplot was imported'\n"
        "assert backend() == before, 'the backend was switched'\n"
    )
    run = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=120)
    assert run.returncode == 0, run.stderr


def test_a_fitted_model_is_refitted_per_condition_with_bootstrap_intervals(tmp_path, rng, capsys):
    from stimsteer.sysid import save_session
    from stimsteer.sysid.arx import RidgeArx

    session = _session(rng, n=1200).replace(trials=[(150 * i, 150 * i + 150) for i in range(8)],
                                            metadata={"trial_conditions": ["on", "off"] * 4})
    save_session(session, tmp_path / "s.h5")
    est = RidgeArx(output_lags=2, input_lags=2).fit(session)
    save_predictor(est, tmp_path / "arx.h5", provenance={"origin": "test"})
    out = tmp_path / "net"
    assert main(["network", str(tmp_path / "arx.h5"), "--session", str(tmp_path / "s.h5"), "--bootstrap", "12",
                 "--out", str(out)]) == 0
    cond = pd.read_csv(out / "conditions.csv")
    assert set(cond["condition"]) == {"on", "off", "off - on"} and set(cond["figure"]) == {"h2_squared"}
    # one linear system made both conditions (by construction): the difference is small and its interval holds 0
    diff = cond[cond["condition"] == "off - on"].iloc[0]
    assert diff["ci_low"] <= 0 <= diff["ci_high"] and abs(diff["estimate"]) < 0.05 * cond["estimate"].abs().max()
    on = cond[cond["condition"] == "on"].iloc[0]
    assert on["ci_low"] <= on["estimate"] <= on["ci_high"] and on["n_trials"] == 4


def test_a_bare_state_space_model_cannot_be_refitted_per_condition(model_file, tmp_path, rng, capsys):
    from stimsteer.sysid import save_session

    session = _session(rng).replace(metadata={"trial_conditions": ["a", "b"] * 2})
    save_session(session, tmp_path / "s.h5")
    assert main(["network", str(model_file), "--session", str(tmp_path / "s.h5"), "--out", str(tmp_path / "n")]) == 2
    assert "without a fitting method" in capsys.readouterr().err and not (tmp_path / "n").exists()
