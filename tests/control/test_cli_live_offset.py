"""`stimsteer live --offset-free`: the option reaches the run, and its record says which disturbance model ran."""

from __future__ import annotations

import json

import pytest

from stimsteer.control.stream import configure_lsl

configure_lsl()  # before anything imports pylsl: LSL stays on this machine

from stimsteer.control.cli import main  # noqa: E402

from .test_cli_live import _args, files  # noqa: E402,F401  (the module-scoped model, plant and limits)


@pytest.mark.parametrize("kind", ["constant", "ramp"])
def test_live_offset_free_option_runs_and_is_recorded(files, capsys, kind):  # noqa: F811
    out = f"run_offset_{kind}"
    code = main(_args(files, out, "--plant", str(files / "plant.h5"), "--offset-free", kind))
    printed = capsys.readouterr().out
    assert code == 0, printed
    summary = json.loads((files / out / "run.json").read_text())
    assert summary["offset_free"]["disturbance_model"] == kind
    assert len(summary["offset_free"]["disturbance_estimate"]) == 3
    assert summary["delivered_violations"] == {"amplitude": 0, "slew": 0, "energy_budget": 0}


def test_live_offset_free_refuses_an_unknown_model(files, capsys):  # noqa: F811
    with pytest.raises(SystemExit) as exit_:
        main(_args(files, "bad_offset", "--plant", str(files / "plant.h5"), "--offset-free", "cubic"))
    err = capsys.readouterr().err
    assert exit_.value.code == 2 and "--offset-free" in err and len(err.strip().splitlines()) == 1


BOX = """
[inputs.site_b]
amplitude_min_ua = -1.0
amplitude_max_ua = 1.0
slew_max_ua = 0.4

[inputs.site_a]
amplitude_min_ua = -1.0
amplitude_max_ua = 1.5
slew_max_ua = 0.4
"""


def test_live_fast_step_runs_and_delivers_only_safe_inputs(files, capsys):  # noqa: F811
    pytest.importorskip("daqp")
    (files / "box.toml").write_text(BOX)
    args = _args(files, "run_fast", "--plant", str(files / "plant.h5"), "--fast-step")
    args[args.index("--limits") + 1] = str(files / "box.toml")
    code = main(args)
    printed = capsys.readouterr().out
    assert code == 0, printed
    summary = json.loads((files / "run_fast" / "run.json").read_text())
    assert summary["unchecked_inputs"] == 0 and not any(summary["delivered_violations"].values())


def test_live_fast_step_refuses_what_it_cannot_reproduce(files, capsys):  # noqa: F811
    pytest.importorskip("daqp")
    code = main(_args(files, "bad_fast", "--plant", str(files / "plant.h5"), "--fast-step"))  # energy budget
    err = capsys.readouterr().err
    assert code == 2 and "energy budget" in err and len(err.strip().splitlines()) == 1
    code = main(_args(files, "bad_fast2", "--plant", str(files / "plant.h5"), "--fast-step", "--offset-free",
                      "constant"))
    err = capsys.readouterr().err
    assert code == 2 and "--offset-free needs the full plan" in err


@pytest.mark.parametrize("method", ["lsq", "hankel"])
def test_live_fast_step_accepts_a_direct_model(files, capsys, method):  # noqa: F811
    pytest.importorskip("daqp")
    import numpy as np

    from stimsteer.control.plants import load_plant, record_session
    from stimsteer.sysid import HankelPredictor, LsqPredictor
    from stimsteer.sysid.storage import save_predictor

    u = np.random.default_rng(8).uniform(-1, 1, size=(400, 2))
    session = record_session(load_plant(files / "plant.h5"), u, seed=1)
    pred = (LsqPredictor(past_steps=3, horizon_steps=6, alphas=(1e-6,)) if method == "lsq" else
            HankelPredictor(past_steps=3, horizon_steps=6, lambdas_g=(1e-3,))).fit(session)
    prov = {"session": {"input_names": ["site_a", "site_b"], "input_units": ["uA", "uA"],
                        "output_names": ["lfp_0", "lfp_1", "lfp_2"], "output_units": ["uV"] * 3,
                        "sample_rate_hz": 50.0}}
    save_predictor(pred, files / f"direct_{method}.h5", provenance=prov)
    (files / "box.toml").write_text(BOX)
    args = _args(files, f"run_fast_{method}", "--plant", str(files / "plant.h5"), "--fast-step")
    args[1] = str(files / f"direct_{method}.h5")
    args[args.index("--limits") + 1] = str(files / "box.toml")
    code = main(args)
    printed = capsys.readouterr()
    assert code == 0, printed.out + printed.err
    summary = json.loads((files / f"run_fast_{method}" / "run.json").read_text())
    assert summary["unchecked_inputs"] == 0 and not any(summary["delivered_violations"].values())
