"""The shipped demo files load, match demo_data/README.md, and the generator reproduces them."""

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.control.plants import LinearNetworkPlant, SaturatingRateNetworkPlant, load_plant, record_session
from stimsteer.sysid.exceptions import StimsteerError
from stimsteer.sysid.io import load_session

DEMO = Path(__file__).resolve().parents[1] / "demo_data"


def _generator():
    spec = importlib.util.spec_from_file_location("stimsteer_make_demo", DEMO / "make_demo.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up while the script runs
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def md():
    return _generator()


@pytest.fixture(scope="module")
def shipped():
    return load_session(DEMO / "demo_session.h5"), load_plant(DEMO / "demo_plant.h5")


def _assert_same_session(a, b):
    for name in ("u", "y", "mask", "trials"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    for name in ("sample_rate_hz", "input_names", "output_names", "input_units", "output_units", "metadata"):
        assert getattr(a, name) == getattr(b, name), name


def _assert_same_plant(a, b):
    assert type(a) is type(b)
    pa, pb = a.get_params(), b.get_params()
    assert pa.keys() == pb.keys()
    for k in pa:
        if isinstance(pa[k], np.ndarray):
            # the plant's matrices come out of eigen-decompositions, whose last bits depend on the LAPACK build
            np.testing.assert_allclose(pa[k], pb[k], rtol=1e-12, atol=1e-15, err_msg=k)
        else:
            assert pa[k] == pb[k], k


def test_shipped_files_are_small():
    # the limit is 5 MB for the demo session
    assert (DEMO / "demo_session.h5").stat().st_size <= 5_000_000
    assert (DEMO / "demo_plant.h5").stat().st_size <= 100_000


def test_session_matches_the_readme(shipped, md):
    # every number below is one stated in demo_data/README.md
    session, _ = shipped
    assert session.n_inputs == 3 and session.n_outputs == 8 and session.sample_rate_hz == 250.0
    assert session.n_trials == 24 and session.n_samples == 21_000
    np.testing.assert_array_equal(session.trial_lengths, 750)
    np.testing.assert_array_equal(session.trials[:, 0], 125 + 875 * np.arange(24))  # 0.5 s rest before each
    assert session.input_names == ("stim_a", "stim_b", "stim_c")
    assert session.output_names == tuple(f"rec_{i:02d}" for i in range(1, 9))
    assert session.input_units == ("uA",) * 3 and session.output_units == ("uV",) * 8
    assert session.mask.all()
    assert session.metadata["simulated"] is True and session.metadata["demo_seed"] == md.DEMO_SEED
    assert f"DEMO_SEED = {md.DEMO_SEED}" in (DEMO / "README.md").read_text()
    outside = np.ones(session.n_samples, dtype=bool)
    for a, b in session.trials:
        outside[a:b] = False
        np.testing.assert_array_equal(session.u[a:a + 50], 0.0)  # 0.2 s unstimulated baseline
    np.testing.assert_array_equal(session.u[outside], 0.0)  # rests carry no stimulation
    # amplitudes are magnitudes (polarity is the site's leading phase): 0 .. 40, 40, 30 µA on a 0.1 µA resolution
    assert session.u.min() == 0.0 and np.all(session.u.max(axis=0) <= [40.0, 40.0, 30.0])
    np.testing.assert_allclose(session.u * 10, np.round(session.u * 10), atol=1e-9)
    np.testing.assert_allclose(session.y / 0.05, np.round(session.y / 0.05), atol=1e-6)  # 0.05 µV quantisation


def test_plant_matches_the_readme(shipped):
    session, plant = shipped
    assert isinstance(plant, LinearNetworkPlant)
    assert (plant.n_states, plant.n_inputs, plant.n_outputs) == (10, 3, 8)
    assert plant.input_names == session.input_names and plant.output_names == session.output_names
    assert plant.sample_rate_hz == session.sample_rate_hz
    A, B, C = plant.A, plant.B, plant.C
    # σ_max < 1 and spectral radius <= σ_max: stable (Gu S. et al. 2015, Nat. Commun. 6:8414, Methods)
    assert round(float(np.linalg.norm(A, 2)), 2) == 0.92
    rho = float(np.max(np.abs(np.linalg.eigvals(A))))
    assert round(rho, 2) == 0.90 and 1 - rho >= 0.05
    # Kalman rank conditions (Kalman R.E. 1960, On the general theory of control systems): order 10 is minimal
    ctrb = np.hstack([np.linalg.matrix_power(A, k) @ B for k in range(10)])
    obsv = np.vstack([C @ np.linalg.matrix_power(A, k) for k in range(10)])
    assert np.linalg.matrix_rank(ctrb) == 10 and np.linalg.matrix_rank(obsv) == 10
    # Hankel singular values from the Gramians (Moore B.C. 1981, Principal component analysis in linear systems,
    # IEEE TAC 26(1)), Lyapunov equations solved by scipy: the README says the smallest is about 7 % of the largest
    P = sla.solve_discrete_lyapunov(A, B @ B.T)
    Q = sla.solve_discrete_lyapunov(A.T, C.T @ C)
    hsv = np.sqrt(np.sort(np.abs(np.linalg.eigvals(P @ Q)))[::-1])
    assert round(float(hsv[-1] / hsv[0]), 2) == 0.07
    inside = np.zeros(session.n_samples, dtype=bool)
    for a, b in session.trials:
        inside[a:b] = True
    std = plant.to_state_space().simulate(session.u)[inside].std(axis=0)
    assert round(float(std.min())) == 17 and round(float(std.max())) == 43  # "17–43 µV per contact"
    np.testing.assert_array_equal(plant.measurement_noise_std, 3.0)


def test_shipped_plant_reproduces_the_shipped_recording(shipped):
    session, plant = shipped
    again = record_session(plant, session.u, trials=session.trials, output_resolution=0.05)
    np.testing.assert_array_equal(again.y, session.y)


def test_generator_reproduces_the_shipped_files(shipped, md, tmp_path):
    session_path, plant_path = md.write_demo(tmp_path)
    _assert_same_session(load_session(session_path), shipped[0])
    _assert_same_plant(load_plant(plant_path), shipped[1])
    session, plant = md.make_demo()
    _assert_same_session(session, shipped[0])
    _assert_same_plant(plant, shipped[1])


def test_other_seed_gives_another_demo(shipped, md):
    session, _ = md.make_demo(md.DEMO_SEED + 1)
    assert session.u.shape == shipped[0].u.shape and not np.array_equal(session.u, shipped[0].u)


def test_saturating_variant_linearises_to_the_linear_plant(shipped, md):
    plant = md.build_plant(kind="saturating")
    assert isinstance(plant, SaturatingRateNetworkPlant)
    lin = plant.linearize()
    np.testing.assert_allclose(lin.A, shipped[1].A, rtol=0, atol=1e-15)
    np.testing.assert_allclose(lin.B, shipped[1].B, rtol=0, atol=1e-15)
    np.testing.assert_array_equal(lin.C, shipped[1].C)
    with pytest.raises(StimsteerError, match="kind must be 'linear' or 'saturating'"):
        md.build_plant(kind="spiking")


def test_command_line_writes_elsewhere(md, tmp_path, capsys):
    assert md.main(["--out", str(tmp_path / "sat"), "--plant", "saturating"]) == 0
    assert "demo_session.h5" in capsys.readouterr().out
    assert isinstance(load_plant(tmp_path / "sat" / "demo_plant.h5"), SaturatingRateNetworkPlant)
    with pytest.raises(SystemExit) as exit_info:
        md.main(["--plant", "spiking"])
    assert exit_info.value.code == 2


# ---------------------------------------------------------------------------------------------------- pulse trains
def _stimulation():
    from stimsteer.sysid.stimulation import InputMapping, load_stimulation

    return InputMapping(load_stimulation(DEMO / "demo_stimulation.toml"), 250.0)


def test_the_model_input_is_the_recorded_pulse_table_encoded_by_the_declared_mapping(shipped):
    # Before: the session held signed per-sample amplitudes (±40 µA pulses, ±10–30 µA PRBS) and no pulse events.
    from stimsteer.sysid.stimulation import encode_pulse_table, pulse_table_from_record

    session, _ = shipped
    pulses = pulse_table_from_record(session.metadata["pulses"])
    assert session.metadata["pulses"]["units"]["amplitude"] == "uA" and len(pulses) > 10_000
    assert (pulses["amplitude"] > 0).all() and set(pulses["leading_phase"]) == {"cathodic"}
    again, record = encode_pulse_table(pulses, _stimulation(), n_samples=session.n_samples)
    np.testing.assert_array_equal(again, session.u)  # the session's inputs are exactly this encoding
    recorded = session.metadata["stimulation"]
    assert recorded["name"] == "amplitude" and recorded["description_file"] == "demo_stimulation.toml"
    assert recorded["description"] == _stimulation().description.to_dict()
    assert recorded["n_pulses"] == record["n_pulses"] == len(pulses) and recorded["n_pulses_off_grid"] == 0
    assert session.metadata["pulse_mapping"] == recorded  # what `inspect` reports


def test_a_plan_decoded_from_the_demo_inputs_gives_back_the_recorded_pulses(shipped):
    # one pulse per sample at 250 Hz: decoding the model inputs returns the delivered pulses, time and amplitude
    from stimsteer.sysid.stimulation import decode_plan, pulse_table_from_record

    session, _ = shipped
    pulses = pulse_table_from_record(session.metadata["pulses"])
    decoded = decode_plan(session.u, _stimulation())
    assert len(decoded) == len(pulses)
    np.testing.assert_allclose(decoded["onset_s"], pulses["time_s"], atol=1e-12)
    assert decoded["site"].tolist() == pulses["site"].tolist()
    np.testing.assert_allclose(decoded["amplitude_ua"], pulses["amplitude"], rtol=1e-15)
    np.testing.assert_allclose(decoded["second_phase_amplitude_ua"], pulses["second_phase_amplitude"], rtol=1e-12)
    # charge balance per pulse: Q1 = I · PW1 equals Q2 = I2 · PW2 (stim_c: a quarter of the amplitude, 4 x as long)
    pw2 = decoded["second_phase_width_us"]
    np.testing.assert_allclose(decoded["amplitude_ua"] * decoded["phase_width_us"],
                               decoded["second_phase_amplitude_ua"] * pw2, rtol=1e-12)


def test_the_recording_stays_inside_the_demo_physical_limits(shipped):
    # the simulated stimulator delivered nothing a plan under the same declared limits could not deliver
    from stimsteer.control._plan_physical import plan_limits
    from stimsteer.control.pulse_plan import safety_checks

    session, _ = shipped
    lim, physical = plan_limits(DEMO / "demo_physical_limits.toml", DEMO / "demo_stimulation.toml", {},
                                rate=250.0, names_in=list(session.input_names), names_out=list(session.output_names),
                                model_units=list(session.input_units))
    _, checks = safety_checks(session.u, physical.mapping, physical.compiled)
    failed = [(c["rule"], c["site"], c["value"], c["limit"]) for c in checks if not c["passed"]]
    assert failed == []
    assert {c["rule"] for c in checks} >= {"amplitude", "charge_per_phase", "shannon", "charge_injection",
                                           "charge_rate_window"}
    # stim_c's bound is its material limit: Q = I · PW <= 100 µC/cm² x 2e-5 cm², so I <= 0.002 µC / 60 µs
    # (Q = I·PW, D = Q/A: common practice, no source)
    np.testing.assert_allclose(lim.amplitude_max_ua, [50.0, 50.0, 100.0 * 2e-5 / 60e-6], rtol=1e-12)


def test_the_per_sample_limits_file_is_the_physical_one_compiled(shipped):
    # demo_limits.toml (per sample, for models without a description) may not allow more than the physical file
    from stimsteer.control._plan_physical import plan_limits
    from stimsteer.control.limits import load_limits

    session, _ = shipped
    compiled, _ = plan_limits(DEMO / "demo_physical_limits.toml", DEMO / "demo_stimulation.toml", {}, rate=250.0,
                              names_in=list(session.input_names), names_out=list(session.output_names),
                              model_units=list(session.input_units))
    per_sample = load_limits(DEMO / "demo_limits.toml").aligned(session.input_names, session.output_names)
    lo, hi = per_sample.input_bounds()
    np.testing.assert_array_equal(lo, 0.0)  # no negative amplitude: polarity is not a sign
    assert np.all(hi <= compiled.amplitude_max_ua) and np.all(hi >= compiled.amplitude_max_ua - 0.01)


def test_the_pulse_figures_of_the_readme(shipped):
    # every pulse figure stated in demo_data/README.md, measured on the shipped session
    from stimsteer.sysid.stimulation import pulse_table_from_record

    session, _ = shipped
    pulses = pulse_table_from_record(session.metadata["pulses"])
    assert len(pulses) == 20_018
    assert pulses.groupby("site").size().to_dict() == {"stim_a": 6720, "stim_b": 6646, "stim_c": 6652}
    assert pulses.groupby("site")["amplitude"].max().round(1).tolist() == [40.0, 39.7, 29.9]
    # the lowest: bursts from 5 µA, modulated trains from 10 % of the site's largest (4 µA; 3 µA on stim_c)
    assert (pulses.groupby("site")["amplitude"].min() >= [4.0, 4.0, 3.0]).all()
    inside = np.zeros(session.n_samples, dtype=bool)
    for a, b in session.trials:
        inside[a:b] = True
    on = (session.u[inside] > 0).mean(axis=0)
    assert np.round(100 * on).tolist() == [37.0, 37.0, 37.0]  # "37 % of the in-trial samples"
    u = session.u
    onset = ((u > 0) & (np.vstack([np.zeros((1, 3)), u[:-1]]) == 0)).any(axis=1)
    assert int(onset.sum()) == 845
    # charge per phase Q = I · PW per pulse (common practice, no source), summed over every 0.2 s (50-sample) window
    q = (u * [100e-6, 100e-6, 60e-6]).sum(axis=1)
    window = np.convolve(q, np.ones(50))[:q.size]
    assert round(float(window.max()), 3) == 0.350 and round(float(window.max()) / 0.2, 2) == 1.75
