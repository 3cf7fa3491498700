"""`stimsteer fit` and `stimsteer predict`: outputs on success, exit code 2 with one line on bad input."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import CAUTION, main
from stimsteer.sysid.session import Session
from stimsteer.sysid.statespace import StateSpaceModel
from stimsteer.sysid.storage import load_predictor

from stimsteer.sysid import io as io

TRUE = StateSpaceModel(A=[[0.85, 0.2], [0.0, 0.6]], B=[[0.0], [1.0]], C=[[1.0, 0.3]])


@pytest.fixture
def session_file(rng, tmp_path):
    n, length = 6, 150
    u = rng.standard_normal((n * length, 1))
    y = np.concatenate([TRUE.simulate(u[i * length:(i + 1) * length]) for i in range(n)])
    y = y + 0.02 * rng.standard_normal(y.shape)
    s = Session(u=u, y=y, sample_rate_hz=200.0, trials=[(i * length, (i + 1) * length) for i in range(n)],
                input_names=["site_a"], input_units=["uA"], output_names=["lfp"], output_units=["mV"])
    return io.save_session(s, tmp_path / "session.h5")


@pytest.fixture
def model_file(session_file, tmp_path):
    out = tmp_path / "arx.h5"
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "arx", "--out", str(out),
                 "--past-steps", "2", "--horizon-steps", "5", "--seed", "3"]) == 0
    return out


def pattern_file(tmp_path, header=("time [s]", "in:site_a [uA]"), n=30):
    rows = [",".join([f"{k / 200.0}"] + ["1" if 5 <= k < 10 else "0"] * (len(header) - 1)) for k in range(n)]
    path = tmp_path / "pattern.csv"
    path.write_text(",".join(header) + "\n" + "\n".join(rows) + "\n")
    return path


def one_error_line(capsys, *phrases):
    err = capsys.readouterr().err
    assert err.count("\n") == 1, err
    for phrase in phrases:
        assert phrase in err, err
    return err


def test_fit_prints_selection_and_heldout_scores(capsys, model_file):  # capsys first: it captures the fit
    out = capsys.readouterr().out
    assert "selection (training trials only):" in out and "mean_error" in out
    assert "held-out scores on trials" in out and "5-step" in out and "free run" in out
    predictor, prov = load_predictor(model_file)
    assert prov["route"] == "indirect" and prov["seed"] == 3 and prov["session_file"].endswith("session.h5")
    assert predictor.past_steps_ == 2


def test_a_method_with_nothing_to_select_says_so(session_file, tmp_path, capsys):
    out_file = tmp_path / "rls.h5"
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "recursive", "--out", str(out_file),
                 "--past-steps", "2", "--horizon-steps", "5"]) == 0
    out = capsys.readouterr().out
    assert "selection (training trials only):\n  none: this method fits its settings as given\n" in out
    assert "Empty DataFrame" not in out


def test_fit_subspace(session_file, tmp_path, capsys):
    out = tmp_path / "sub.h5"
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "subspace", "--out", str(out),
                 "--past-steps", "4"]) == 0
    assert "singular_value" in capsys.readouterr().out
    assert load_predictor(out)[1]["method"] == "subspace"


def test_fit_refuses_to_overwrite_without_force(model_file, session_file, capsys):
    capsys.readouterr()
    args = ["fit", str(session_file), "--route", "indirect", "--method", "arx", "--out", str(model_file)]
    assert main(args) == 2
    one_error_line(capsys, "already exists", "--force")
    assert main(args + ["--force"]) == 0


@pytest.mark.parametrize("extra, phrase", [
    (["--method", "magic"], "invalid choice: 'magic'"),
    (["--method", "lsq", "--route", "sideways"], "invalid choice: 'sideways'"),
    (["--method", "arx", "--test-fraction", "1.5"], "strictly between 0 and 1"),
])
def test_fit_bad_options(session_file, tmp_path, capsys, extra, phrase):
    args = ["fit", str(session_file), "--out", str(tmp_path / "m.h5")]
    if "--route" not in extra:
        args += ["--route", "indirect"]
    with pytest.raises(SystemExit) as exc:
        main(args + extra)
    assert exc.value.code == 2
    one_error_line(capsys, phrase)


def test_fit_wrong_route_method_pair_and_missing_file(session_file, tmp_path, capsys):
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "lsq", "--out",
                 str(tmp_path / "m.h5")]) == 2
    one_error_line(capsys, "no method 'lsq' on route 'indirect'")
    assert main(["fit", str(tmp_path / "none.h5"), "--route", "indirect", "--method", "arx", "--out",
                 str(tmp_path / "m.h5")]) == 2
    one_error_line(capsys, "none.h5")
    assert not (tmp_path / "m.h5").exists()


def test_fit_lags_longer_than_trials(session_file, tmp_path, capsys):
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "arx", "--out",
                 str(tmp_path / "m.h5"), "--past-steps", "400"]) == 2
    one_error_line(capsys, "longest valid run has 150")


def test_predict_from_rest(model_file, tmp_path, capsys):
    capsys.readouterr()
    out = tmp_path / "pred"
    assert main(["predict", str(model_file), "--pattern", str(pattern_file(tmp_path)), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "from rest" in printed and CAUTION in printed
    table = pd.read_csv(out / "prediction.csv")
    assert list(table.columns) == ["time [s] @ 200 Hz", "in:site_a [uA]", "out:lfp [mV]", "rmse:lfp [mV]"]
    assert table.shape[0] == 30 and (table["rmse:lfp [mV]"] > 0).all()
    assert (out / "prediction.png").stat().st_size > 1000


def test_predict_from_a_trial(model_file, session_file, tmp_path):
    predictor, _ = load_predictor(model_file)
    s = io.load_session(session_file)
    out = tmp_path / "pred"
    assert main(["predict", str(model_file), "--pattern", str(pattern_file(tmp_path)), "--out", str(out),
                 "--from-trial", f"{session_file}:4"]) == 0
    pat = pd.read_csv(pattern_file(tmp_path))["in:site_a [uA]"].to_numpy()[:, None]
    expected = predictor.predict(s.u[750 - 2:750], s.y[750 - 2:750], pat)  # trial 4 is [600, 750)
    np.testing.assert_allclose(pd.read_csv(out / "prediction.csv")["out:lfp [mV]"], expected[:, 0], rtol=1e-8)


def test_predict_bad_inputs(model_file, session_file, tmp_path, capsys):
    capsys.readouterr()
    wrong = pattern_file(tmp_path, header=("time [s]", "in:site_a [uA]", "in:site_b [uA]"))
    assert main(["predict", str(model_file), "--pattern", str(wrong), "--out", str(tmp_path / "o1")]) == 2
    one_error_line(capsys, "has 2 input(s)", "the model has 1")
    units = pattern_file(tmp_path, header=("time [s]", "in:site_a [mA]"))
    assert main(["predict", str(model_file), "--pattern", str(units), "--out", str(tmp_path / "o2")]) == 2
    one_error_line(capsys, "'site_a' is in 'mA'")
    good = pattern_file(tmp_path)
    assert main(["predict", str(session_file), "--pattern", str(good), "--out", str(tmp_path / "o3")]) == 2
    one_error_line(capsys, "session file, not a stimsteer model")
    assert main(["predict", str(model_file), "--pattern", str(good), "--out", str(tmp_path / "o4"),
                 "--from-trial", f"{session_file}:99"]) == 2
    one_error_line(capsys, "trial 99 does not exist")
    with pytest.raises(SystemExit) as exc:
        main(["predict", str(model_file), "--pattern", str(good), "--out", str(tmp_path / "o5"),
              "--from-trial", "no-index"])
    assert exc.value.code == 2
    one_error_line(capsys, "expected SESSION:INDEX")
    assert not any((tmp_path / f"o{i}").exists() for i in range(1, 6))


def test_fit_warns_in_one_line_about_an_output_offset_a_subspace_model_cannot_carry(rng, tmp_path, capsys):
    n, length = 6, 150
    u = rng.standard_normal((n * length, 1))
    for i in range(n):
        u[i * length:i * length + 20] = 0.0  # a pre-stimulation baseline shows the resting level
    y = np.concatenate([TRUE.simulate(u[i * length:(i + 1) * length]) for i in range(n)]) + 40.0  # a baseline
    s = Session(u=u, y=y, sample_rate_hz=200.0, trials=[(i * length, (i + 1) * length) for i in range(n)],
                input_names=["site_a"], input_units=["uA"], output_names=["lfp"], output_units=["mV"])
    path = io.save_session(s, tmp_path / "offset.h5")
    assert main(["fit", str(path), "--route", "indirect", "--method", "subspace", "--out", str(tmp_path / "m.h5"),
                 "--past-steps", "4"]) == 0
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if "constant offset" in line]
    assert len(lines) == 1 and lines[0].startswith("stimsteer fit: warning: ") and "'lfp'" in lines[0]
    assert "--centre-outputs" in lines[0]
    # the suggested refit: no warning, and the model predicts from rest at the baseline
    centred = tmp_path / "centred.h5"
    assert main(["fit", str(path), "--route", "indirect", "--method", "subspace", "--out", str(centred),
                 "--past-steps", "4", "--centre-outputs"]) == 0
    assert "constant offset" not in capsys.readouterr().err
    pred_dir = tmp_path / "pred"
    assert main(["predict", str(centred), "--pattern", str(pattern_file(tmp_path)), "--out", str(pred_dir)]) == 0
    table = pd.read_csv(pred_dir / "prediction.csv", comment="#")
    assert abs(table["out:lfp [mV]"].iloc[0] - 40.0) < 1.0  # from rest: the baseline (predicted 0 without centring)
    # refused where it does not apply, in one line
    assert main(["fit", str(path), "--route", "indirect", "--method", "arx", "--out", str(tmp_path / "a.h5"),
                 "--centre-outputs"]) == 2
    one_error_line(capsys, "--centre-outputs is for the subspace, lsq and hankel methods")
    # the direct methods take it too, and predict from rest at the baseline
    direct = tmp_path / "lsq.h5"
    assert main(["fit", str(path), "--route", "direct", "--method", "lsq", "--out", str(direct), "--past-steps", "4",
                 "--horizon-steps", "6", "--centre-outputs"]) == 0
    assert "constant offset" not in capsys.readouterr().err
    assert main(["predict", str(direct), "--pattern", str(pattern_file(tmp_path, n=6)), "--out",
                 str(tmp_path / "pred_lsq")]) == 0
    table = pd.read_csv(tmp_path / "pred_lsq" / "prediction.csv", comment="#")
    assert abs(table["out:lfp [mV]"].iloc[0] - 40.0) < 1.0


@pytest.mark.parametrize("method", ["indirect arx", "indirect subspace", "direct lsq", "direct hankel"])
def test_every_method_fits_and_scores_long_trials(rng, tmp_path, capsys, method):
    # Trials of 40,000 samples: held-out free runs over whole trials must not build anything that grows with the
    # square of the trial length (a dense free-run map here would hold 2.6e10 values, 205 GB).
    route, name = method.split()
    n, length = 4, 40_000
    model = StateSpaceModel(A=[[0.85, 0.2, 0.0], [0.0, 0.6, 0.1], [0.0, 0.0, 0.3]], B=rng.standard_normal((3, 2)),
                            C=rng.standard_normal((8, 3)))
    u = rng.standard_normal((n * length, 2))
    y = np.concatenate([model.simulate(u[i * length:(i + 1) * length]) for i in range(n)])
    y += 0.05 * rng.standard_normal(y.shape)
    s = Session(u=u, y=y, sample_rate_hz=1000.0, trials=[(i * length, (i + 1) * length) for i in range(n)])
    path = io.save_session(s, tmp_path / "long.h5")
    out = tmp_path / f"{name}.h5"
    assert main(["fit", str(path), "--route", route, "--method", name, "--out", str(out), "--past-steps", "4",
                 "--horizon-steps", "8"]) == 0
    printed = capsys.readouterr().out
    assert "free run" in printed and out.stat().st_size > 0


@pytest.mark.parametrize("method", ["lsq", "hankel"])
def test_direct_fit_without_its_windows_takes_them_from_the_data_and_says_so(session_file, tmp_path, capsys,
                                                                              method):
    # issue 18: a direct fit no longer needs the windows typed; they come from the data and the line says so
    out = tmp_path / "d.h5"
    assert main(["fit", str(session_file), "--route", "direct", "--method", method, "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "windows (default, from the data): past" in printed and "impulse response of a quick ARX" in printed
    assert out.exists()
    out2 = tmp_path / "d2.h5"
    assert main(["fit", str(session_file), "--route", "direct", "--method", method, "--out", str(out2),
                 "--past-steps", "3"]) == 0
    # the horizon still came from the data, and the line says which window was given (it used to say "default")
    assert "windows (past as given, horizon from the data)" in capsys.readouterr().out
    from stimsteer.sysid import load_predictor
    assert load_predictor(out2)[0].past_steps_ == 3


def test_arx_with_a_zero_past_window_names_the_option(session_file, tmp_path, capsys):
    # the command line checks the window itself, so the line names the flag (issue 12), not the API setting
    with pytest.raises(SystemExit) as exc:
        main(["fit", str(session_file), "--route", "indirect", "--method", "arx", "--out", str(tmp_path / "a.h5"),
              "--past-steps", "0"])
    assert exc.value.code == 2
    one_error_line(capsys, "argument --past-steps", "expected a whole number >= 1; got 0")
