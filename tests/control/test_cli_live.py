"""`stimsteer live` as a user runs it: a simulated plant in wall-clock time and behind LSL streams on this machine,
the run folder it writes, and its bad-input lines (exit 2, one line, no traceback)."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest

from stimsteer.control.stream import configure_lsl

configure_lsl()  # before anything imports pylsl: LSL stays on this machine

from stimsteer.control.cli import CAUTION, main  # noqa: E402
from stimsteer.control.plants import LinearNetworkPlant, save_plant  # noqa: E402
from stimsteer.sysid import StateSpaceModel  # noqa: E402
from stimsteer.sysid.io import load_session  # noqa: E402
from stimsteer.sysid.storage import save_predictor  # noqa: E402

RATE = 50.0
LIMITS = """
[energy]
budget_ua2 = 8.0

[inputs.site_b]
amplitude_min_ua = -1.0
amplitude_max_ua = 1.0
slew_max_ua = 0.4

[inputs.site_a]
amplitude_min_ua = -1.0
amplitude_max_ua = 1.5
slew_max_ua = 0.4
"""


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("live")
    rng = np.random.default_rng(4)
    A = rng.normal(size=(4, 4))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.normal(size=(4, 2)), rng.normal(size=(3, 4))
    names_in, names_out = ("site_a", "site_b"), ("lfp_0", "lfp_1", "lfp_2")
    model = StateSpaceModel(A=A, B=B, C=C, sample_rate_hz=RATE, input_names=names_in, output_names=names_out,
                            past_steps=3)
    prov = {"session": {"input_names": list(names_in), "input_units": ["uA", "uA"], "output_names": list(names_out),
                        "output_units": ["uV"] * 3, "sample_rate_hz": RATE}}
    save_predictor(model, d / "model.h5", provenance=prov)
    plant = LinearNetworkPlant(A, B, C, measurement_noise_std=0.01, sample_rate_hz=RATE, input_names=names_in,
                               output_names=names_out)
    save_plant(plant, d / "plant.h5")
    (d / "limits.toml").write_text(LIMITS)
    return d


def _args(d, out, *extra):
    return [
        "live", str(d / "model.h5"), "--limits", str(d / "limits.toml"), "--target", "lfp_0=2,lfp_2=-1",
        "--horizon-steps", "6", "--duration-s", "0.6", "--out", str(d / out), *extra,
    ]


@pytest.mark.parametrize("via_lsl", [False, True])
def test_live_runs_for_the_declared_time_and_writes_a_refittable_session(files, capsys, via_lsl):
    out = f"run_{via_lsl}"
    code = main(_args(files, out, "--plant", str(files / "plant.h5"), *(["--via-lsl"] if via_lsl else [])))
    printed = capsys.readouterr().out
    assert code == 0, printed
    assert "step latency p50" in printed and "unchecked inputs 0" in printed and CAUTION in printed
    s = load_session(files / out / "run.h5")
    summary = json.loads((files / out / "run.json").read_text())
    assert summary["n_steps_run"] == 30 and summary["pace"] == ("source" if via_lsl else "wall")
    assert summary["delivered_violations"] == {"amplitude": 0, "slew": 0, "energy_budget": 0}
    assert s.sample_rate_hz == RATE and s.input_names == ("site_a", "site_b") and s.output_units == ("uV",) * 3
    assert s.metadata["recorded_under_feedback"] is True and np.all(s.u[-1] == 0)


def test_live_realtime_asks_the_system_and_reports_what_it_granted_or_refused(files, capsys):
    # whether SCHED_FIFO, one core and locked memory are granted depends on the machine's rights (common practice,
    # no source: Linux grants SCHED_FIFO to privileged processes or under an RLIMIT_RTPRIO); either way the run goes on
    code = main(_args(files, "run_rt", "--plant", str(files / "plant.h5"), "--realtime"))
    printed = capsys.readouterr().out
    assert code == 0, printed
    summary = json.loads((files / "run_rt" / "run.json").read_text())
    asked = summary["realtime"]
    assert asked["requested"] is True and set(asked) == {"requested", "sched_fifo", "cpu", "memory_locked"}
    assert all(str(v).startswith(("granted", "refused")) for k, v in asked.items() if k != "requested")
    line = next(ln for ln in printed.splitlines() if ln.startswith("real time: "))
    assert "sched fifo" in line and "memory locked" in line
    # 30 steps: --duration-s 0.6 at RATE = 50 Hz
    assert summary["n_steps_run"] == 30 and summary["unchecked_inputs"] == 0
    # without the flag nothing is asked
    main(_args(files, "run_plain", "--plant", str(files / "plant.h5")))
    assert "real time: " not in capsys.readouterr().out
    assert json.loads((files / "run_plain" / "run.json").read_text())["realtime"] == {"requested": False}


@pytest.mark.parametrize("extra, match", [
    ([], "give either --plant PLANT.h5"),
    (["--inlet", "stimsteer-absent-{pid}", "--resolve-timeout-s", "0.3"],
     "no LSL stream named 'stimsteer-absent-.*' .* within 0.3 s"),
    (["--plant", "PLANT", "--inlet", "x"], "not both or neither"),
    (["--plant", "PLANT", "--duration-s", "-1"], "--duration-s must be a positive"),
])
def test_live_bad_input_is_one_line_with_exit_code_2(files, capsys, extra, match):
    import re

    extra = [e.replace("PLANT", str(files / "plant.h5")).replace("{pid}", str(os.getpid())) for e in extra]
    code = main(_args(files, "bad", *extra))
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and re.search(match, err), err
    assert not (files / "bad").exists() or not any((files / "bad").iterdir())


def test_live_refuses_a_plant_at_another_rate(files, capsys, tmp_path):
    other = LinearNetworkPlant(np.eye(4) * 0.5, np.ones((4, 2)), np.ones((3, 4)), sample_rate_hz=RATE * 2,
                               input_names=("site_a", "site_b"), output_names=("lfp_0", "lfp_1", "lfp_2"))
    save_plant(other, tmp_path / "fast.h5")
    code = main(_args(files, "rate", "--plant", str(tmp_path / "fast.h5")))
    assert code == 2 and "samples at 100 Hz but the model at 50 Hz" in capsys.readouterr().err


def test_live_refuses_a_rate_faster_than_its_best_step(files, capsys, tmp_path):
    """A 1 MHz plant: no plan takes under 1 µs, so the run must not start, and says why with the figures."""
    fast = LinearNetworkPlant(np.eye(4) * 0.5, np.ones((4, 2)), np.ones((3, 4)), sample_rate_hz=1e6,
                              input_names=("site_a", "site_b"), output_names=("lfp_0", "lfp_1", "lfp_2"))
    save_plant(fast, tmp_path / "fast.h5")
    model = StateSpaceModel(A=np.eye(4) * 0.5, B=np.ones((4, 2)), C=np.ones((3, 4)), sample_rate_hz=1e6,
                            input_names=("site_a", "site_b"), output_names=("lfp_0", "lfp_1", "lfp_2"), past_steps=3)
    prov = {"session": {"input_names": ["site_a", "site_b"], "output_names": ["lfp_0", "lfp_1", "lfp_2"],
                        "output_units": ["uV"] * 3, "sample_rate_hz": 1e6}}
    save_predictor(model, tmp_path / "m.h5", provenance=prov)
    args = _args(files, "refused", "--plant", str(tmp_path / "fast.h5"))
    args[1] = str(tmp_path / "m.h5")
    code = main(args)
    err = capsys.readouterr().err
    assert code == 2 and "the sample period 1 µs (1e+06 Hz) is shorter than the best measured step" in err
    assert "median" in err and not (files / "refused").exists()


STIMULATION = """
[mapping]
kind = "amplitude"

[sites.site_a]
kind = "electrical"
waveform = "symmetric"
leading_phase = "cathodic"
phase_width = "100 us"
frequency = "50 Hz"
amplitude_unit = "uA"
contact_area = "0.06 cm^2"

[sites.site_b]
kind = "electrical"
waveform = "symmetric"
leading_phase = "cathodic"
phase_width = "100 us"
frequency = "50 Hz"
amplitude_unit = "uA"
contact_area = "0.06 cm^2"
"""

PHYSICAL = """
[physical]
window_s = WINDOW
charge_rate_max_uc_per_s = 0.004

[physical.sites.site_a]
amplitude_max_ua = 1.0
train_length_max_s = 0.1

[physical.sites.site_b]
amplitude_max_ua = 1.0
"""


def test_live_keeps_physical_window_and_train_limits_of_the_delivered_run(files, capsys):
    """`live --stimulation` compiles [physical] limits as `plan` does; the recorded run is graded by the independent
    checker of test_live_sequence_limits on the compiled limits."""
    from stimsteer.control._plan_physical import plan_limits

    from .test_live_sequence_limits import sequence_breaks

    (files / "stim.toml").write_text(STIMULATION)
    (files / "physical.toml").write_text(PHYSICAL.replace("WINDOW", "0.2"))
    args = _args(files, "physical", "--plant", str(files / "plant.h5"), "--stimulation", str(files / "stim.toml"))
    args[args.index("--limits") + 1] = str(files / "physical.toml")
    args[args.index("--target") + 1] = "lfp_0=20,lfp_1=20,lfp_2=20"
    code = main(args)
    printed = capsys.readouterr().out
    assert code == 0, printed
    summary = json.loads((files / "physical" / "run.json").read_text())
    assert summary["sequence_limits"]["window_budgets"][0]["name"] == "charge_rate_window"
    assert not any(summary["delivered_violations"].values()) and "reduced to the largest safe input" in printed
    lim, _ = plan_limits(files / "physical.toml", files / "stim.toml", {}, rate=RATE, names_in=("site_a", "site_b"),
                         names_out=("lfp_0", "lfp_1", "lfp_2"), model_units=("uA", "uA"))
    u = np.asarray(load_session(files / "physical" / "run.h5").u)
    assert np.any(u > 0) and sequence_breaks(u, lim) == []


@pytest.mark.parametrize("window, stimulation, match", [
    ("0.2", False, r"declares \[physical\] limits, but the model records no stimulation description"),
    ("30000.0", True, r"spans 150000\d samples, more than the 1048576 a live gate keeps"),
])
def test_live_refuses_sequence_limits_it_cannot_honour_in_one_line(files, capsys, window, stimulation, match):
    import re

    (files / "stim.toml").write_text(STIMULATION)
    (files / f"phys_{window}.toml").write_text(PHYSICAL.replace("WINDOW", window))
    args = _args(files, "bad_phys", "--plant", str(files / "plant.h5"),
                 *(["--stimulation", str(files / "stim.toml")] if stimulation else []))
    args[args.index("--limits") + 1] = str(files / f"phys_{window}.toml")
    code = main(args)
    err = capsys.readouterr().err
    assert code == 2 and len(err.strip().splitlines()) == 1 and re.search(match, err), err
    assert not (files / "bad_phys").exists() or not any((files / "bad_phys").iterdir())
