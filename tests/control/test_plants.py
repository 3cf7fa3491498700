"""Tests of the simulated plants (control/plants.py)."""

import h5py
import numpy as np
import pytest
from scipy import signal, stats

from stimsteer.control.plants import (
    InnovationPlant,
    LinearNetworkPlant,
    SaturatingRateNetworkPlant,
    load_plant,
    random_network,
    record_session,
    save_plant,
)
from stimsteer.sysid.exceptions import FileFormatError, SessionError, StimsteerError, UnstableModelError
from stimsteer.sysid import Plant, StateSpaceModel
from stimsteer.sysid.statespace import kalman_gain


def _matrices(rng, n=6, m=2, p=4):
    A = random_network(n, density=0.4, seed=rng, scale=0.5, self_weight=0.4)
    return A, rng.standard_normal((n, m)), rng.standard_normal((p, n)), 0.1 * rng.standard_normal((p, m))


def _full_plant(rng, **changes):
    """A linear plant with every recording effect switched on."""
    A, B, C, D = _matrices(rng)
    kw = dict(process_noise_std=0.1, measurement_noise_std=[0.5, 0.2, 0.3, 0.4], drift_amplitude=1.5,
              drift_period_s=2.0, drift_step_std=0.05, artifact_gain=rng.standard_normal((4, 2)),
              artifact_decay_s=0.02, sample_rate_hz=250.0, seed=11)
    kw.update(changes)
    return LinearNetworkPlant(A, B, C, D, **kw)


def _chi2_std_bounds(n, sigma, q=1e-4):
    # (n-1) s² / σ² ~ χ²(n-1) for n iid normal samples (Cochran 1934, The distribution of quadratic forms in a
    # normal system); two-sided interval of total probability 1 - q.
    lo, hi = stats.chi2.ppf([q / 2, 1 - q / 2], n - 1)
    return sigma * np.sqrt(lo / (n - 1)), sigma * np.sqrt(hi / (n - 1))


# ---------------------------------------------------------------------------------------------- random_network
@pytest.mark.parametrize("n, density, symmetric, signed", [(5, 0.5, False, True), (20, 0.2, True, True),
                                                           (40, 0.1, False, False), (12, 1.0, True, False)])
def test_normalised_network_has_sigma_max_below_one_and_is_stable(seed, n, density, symmetric, signed):
    # Gu S. et al. (2015), Controllability of structural brain networks, Nat. Commun. 6:8414 (Methods):
    # A / (1 + σ_max(A)) has σ_max < 1, and the spectral radius never exceeds σ_max (common practice, no source).
    for s in range(seed, seed + 5):
        A = random_network(n, density=density, seed=s, symmetric=symmetric, signed=signed)
        sigma = np.linalg.norm(A, 2)
        assert sigma < 1
        assert np.max(np.abs(np.linalg.eigvals(A))) <= sigma + 1e-12
        if symmetric:
            np.testing.assert_array_equal(A, A.T)
        if not signed:
            assert np.all(A >= 0)
        np.testing.assert_array_equal(np.diag(A), 0.0)


def test_scaled_network_with_self_weight_keeps_the_stability_bound(seed):
    # σ_max(a I + b N) <= |a| + b σ_max(N) (triangle inequality of the operator norm; common practice, no source).
    for s in range(seed, seed + 5):
        base = random_network(15, density=0.3, seed=s)
        A = random_network(15, density=0.3, seed=s, scale=0.4, self_weight=0.6)
        np.testing.assert_allclose(A, 0.6 * np.eye(15) + 0.4 * base, rtol=0, atol=1e-15)
        assert np.linalg.norm(A, 2) <= 0.6 + 0.4 * np.linalg.norm(base, 2) + 1e-12 < 1
        r = np.linspace(-0.5, 0.7, 15)  # one persistence per node
        A = random_network(15, density=0.3, seed=s, scale=0.3, self_weight=r)
        np.testing.assert_allclose(A, np.diag(r) + 0.3 * base, rtol=0, atol=1e-15)
        assert np.linalg.norm(A, 2) <= 0.7 + 0.3 * np.linalg.norm(base, 2) + 1e-12 < 1


def test_network_density_matches_the_edge_probability(seed):
    n, density = 60, 0.2
    A = random_network(n, density=density, seed=seed)
    edges = np.count_nonzero(A) - np.count_nonzero(np.diag(A))
    n_pairs = n * (n - 1)
    # Binomial(n_pairs, density): mean n_pairs·density, std sqrt(n_pairs·d·(1-d)); 5 std (common practice).
    assert abs(edges - n_pairs * density) < 5 * np.sqrt(n_pairs * density * (1 - density))


def test_network_seeds_reproduce(seed):
    np.testing.assert_array_equal(random_network(8, density=0.3, seed=seed),
                                  random_network(8, density=0.3, seed=seed))
    assert not np.array_equal(random_network(8, density=0.3, seed=seed),
                              random_network(8, density=0.3, seed=seed + 1))


def test_network_bad_arguments_raise():
    with pytest.raises(SessionError, match="n_nodes must be a positive integer"):
        random_network(0, density=0.5, seed=0)
    with pytest.raises(SessionError, match=r"density must be in \(0, 1\]"):
        random_network(5, density=0.0, seed=0)
    with pytest.raises(SessionError, match=r"density must be in \(0, 1\]"):
        random_network(5, density=1.5, seed=0)
    with pytest.raises(SessionError, match="scale must be positive"):
        random_network(5, density=0.5, seed=0, scale=-1.0)
    with pytest.raises(SessionError, match="self_weight must be a finite number or one finite value per node"):
        random_network(5, density=0.5, seed=0, self_weight=np.inf)
    with pytest.raises(SessionError, match=r"one finite value per node, shape \(5,\)"):
        random_network(5, density=0.5, seed=0, self_weight=[0.1, 0.2])
    with pytest.raises(UnstableModelError, match="spectral radius"):
        random_network(5, density=0.5, seed=0, scale=0.5, self_weight=1.2)
    A = random_network(5, density=0.5, seed=0, scale=0.5, self_weight=1.2, require_stable=False)
    assert np.max(np.abs(np.linalg.eigvals(A))) >= 1


# ---------------------------------------------------------------------------------------------- linear plant
def test_noise_free_linear_plant_equals_scipy_dlsim(rng):
    # Reference library: scipy.signal.dlsim simulates x[k+1] = A x[k] + B u[k], y[k] = C x[k] + D u[k].
    A, B, C, D = _matrices(rng)
    plant = LinearNetworkPlant(A, B, C, D, sample_rate_hz=250.0)
    u = rng.standard_normal((300, 2))
    x0 = rng.standard_normal(6)
    _, y_ref, x_ref = signal.dlsim((A, B, C, D, 1 / 250.0), u, x0=x0)
    y, X = plant.simulate(u, x0=x0, return_states=True)
    np.testing.assert_allclose(y, y_ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(X[:-1], x_ref, rtol=1e-12, atol=1e-12)


def test_to_state_space_returns_the_true_noise_free_model(rng):
    plant = _full_plant(rng)
    model = plant.to_state_space()
    for name in "ABCD":
        np.testing.assert_array_equal(getattr(model, name), getattr(plant, name))
    np.testing.assert_array_equal(model.K, 0.0)
    assert model.sample_rate_hz == 250.0 and model.output_names == plant.output_names
    u = rng.standard_normal((50, 2))
    np.testing.assert_allclose(plant.with_params(process_noise_std=0, measurement_noise_std=0, drift_amplitude=0,
                                                 drift_step_std=0, artifact_gain=None).simulate(u),
                               model.simulate(u), rtol=1e-12, atol=1e-12)


def test_innovation_form_uses_the_plant_noise_covariances(rng):
    plant = _full_plant(rng)
    model = plant.to_state_space(innovation=True)
    K, P = kalman_gain(plant.A, plant.C, np.diag(plant.process_noise_std ** 2),
                       np.diag(plant.measurement_noise_std ** 2))
    np.testing.assert_allclose(model.K, K, rtol=1e-12)
    R = np.diag(plant.measurement_noise_std ** 2)
    np.testing.assert_allclose(model.innovation_cov, plant.C @ P @ plant.C.T + R, rtol=1e-10)
    with pytest.raises(SessionError, match="innovation form needs a positive measurement noise"):
        plant.with_params(measurement_noise_std=0.0).to_state_space(innovation=True)


def test_step_and_simulate_agree_with_every_effect_on(rng):
    plant = _full_plant(rng)
    u = np.where(rng.random((700, 2)) < 0.1, rng.uniform(-5, 5, (700, 2)), 0.0)
    y_sim, X = plant.simulate(u, seed=5, return_states=True)
    plant.reset(seed=5)
    y_step = np.array([plant.step(u_k) for u_k in u])
    np.testing.assert_array_equal(y_step, y_sim)
    np.testing.assert_array_equal(plant.state, X[-1])


def test_seeds_reproduce_and_differ(rng):
    plant = _full_plant(rng)
    u = rng.standard_normal((200, 2))
    np.testing.assert_array_equal(plant.simulate(u, seed=3), plant.simulate(u, seed=3))
    assert not np.allclose(plant.simulate(u, seed=3), plant.simulate(u, seed=4))
    np.testing.assert_array_equal(plant.simulate(u), plant.simulate(u, seed=plant.seed))
    np.testing.assert_array_equal(plant.simulate(u, seed=np.random.default_rng(9)),
                                  plant.simulate(u, seed=np.random.default_rng(9)))


def test_noise_sources_have_independent_streams(rng):
    plant = _full_plant(rng)
    u = rng.standard_normal((300, 2))
    _, X_all = plant.simulate(u, seed=2, return_states=True)
    _, X_quiet = plant.with_params(measurement_noise_std=0.0, drift_amplitude=0.0, drift_step_std=0.0,
                                   artifact_gain=None).simulate(u, seed=2, return_states=True)
    np.testing.assert_array_equal(X_all, X_quiet)


def test_measurement_noise_has_the_requested_std(rng):
    stds = np.array([0.5, 2.0, 0.0, 1.0])
    A, B, C, _ = _matrices(rng)
    plant = LinearNetworkPlant(A, B, C, measurement_noise_std=stds)
    n = 20000
    y = plant.simulate(np.zeros((n, 2)), seed=1)  # from rest without input the output is the noise alone
    for j, sigma in enumerate(stds):
        if sigma == 0:
            np.testing.assert_array_equal(y[:, j], 0.0)
            continue
        lo, hi = _chi2_std_bounds(n, sigma)
        assert lo < np.std(y[:, j], ddof=1) < hi
    assert abs(np.mean(y[:, 0])) < 5 * stds[0] / np.sqrt(n)  # zero mean: 5 standard errors (common practice)


def test_process_noise_has_the_requested_std(rng):
    A, B, C, D = _matrices(rng)
    stds = np.linspace(0.1, 0.6, 6)
    plant = LinearNetworkPlant(A, B, C, D, process_noise_std=stds)
    n = 20000
    u = rng.standard_normal((n, 2))
    _, X = plant.simulate(u, seed=1, return_states=True)
    w = X[1:] - X[:-1] @ A.T - u @ B.T  # the noise that entered the state at each step
    for j, sigma in enumerate(stds):
        lo, hi = _chi2_std_bounds(n, sigma)
        assert lo < np.std(w[:, j], ddof=1) < hi


def test_sinusoidal_drift_has_the_requested_amplitude_and_period(rng):
    A, B, C, _ = _matrices(rng)
    plant = LinearNetworkPlant(A, B, C, drift_amplitude=[1.0, 2.0, 0.5, 3.0], drift_period_s=1.6,
                               sample_rate_hz=250.0)
    y = plant.simulate(np.zeros((1000, 2)))
    k = np.arange(1000)
    basis = np.column_stack([np.sin(2 * np.pi * k / 400), np.cos(2 * np.pi * k / 400)])  # 1.6 s at 250 Hz
    coef, *_ = np.linalg.lstsq(basis, y, rcond=None)
    np.testing.assert_allclose(basis @ coef, y, atol=1e-12)
    np.testing.assert_allclose(np.hypot(coef[0], coef[1]), [1.0, 2.0, 0.5, 3.0], rtol=1e-12)


def test_random_walk_drift_steps_have_the_requested_std(rng):
    A, B, C, _ = _matrices(rng)
    plant = LinearNetworkPlant(A, B, C, drift_step_std=0.2)
    n = 20000
    y = plant.simulate(np.zeros((n, 2)), seed=4)
    np.testing.assert_array_equal(y[0], 0.0)
    lo, hi = _chi2_std_bounds(n - 1, 0.2)
    for j in range(4):
        assert lo < np.std(np.diff(y[:, j]), ddof=1) < hi


def test_artifacts_appear_only_after_onsets_and_decay(rng):
    A, B, C, D = _matrices(rng)
    G = rng.standard_normal((4, 2))
    rate, tau = 250.0, 0.02
    with_art = LinearNetworkPlant(A, B, C, D, artifact_gain=G, artifact_decay_s=tau, sample_rate_hz=rate)
    clean = with_art.with_params(artifact_gain=None)
    u = np.zeros((120, 2))
    u[20:23, 0] = 5.0  # one onset at 20; 21 and 22 continue the same pulse
    u[40, 1] = -3.0
    u[60:62, 0] = [4.0, -4.0]  # a sign change while on is not a new onset
    diff = with_art.simulate(u) - clean.simulate(u)
    decay = np.exp(-1 / (tau * rate))
    k = np.arange(120)
    s = np.zeros((120, 2))
    for onset, ch, amp in ((20, 0, 5.0), (40, 1, -3.0), (60, 0, 4.0)):
        s[onset:, ch] += amp * decay ** (k[onset:] - onset)
    np.testing.assert_array_equal(diff[:20], 0.0)
    np.testing.assert_allclose(diff, s @ G.T, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(diff[20], 5.0 * G[:, 0], rtol=1e-12)


# ---------------------------------------------------------------------------------------------- saturating plant
def _saturating(rng, bias=None, **kw):
    W = random_network(6, density=0.4, seed=rng)
    return SaturatingRateNetworkPlant(W, rng.standard_normal((6, 2)), rng.standard_normal((4, 6)), leak=0.3,
                                      bias=bias, **kw)


def test_rest_state_is_the_fixed_point(rng):
    plant = _saturating(rng, bias=0.5 * rng.standard_normal(6))
    x = plant.rest_state()
    np.testing.assert_allclose(x, np.tanh(plant.W @ x + plant.bias), atol=1e-12)
    np.testing.assert_array_equal(plant.state, x)
    np.testing.assert_allclose(plant.simulate(np.zeros((50, 2))), np.tile(plant.C @ x, (50, 1)), atol=1e-12)
    u0 = np.array([0.3, -0.2])
    x_u = plant.rest_state(u0)
    np.testing.assert_allclose(x_u, np.tanh(plant.W @ x_u + plant.B @ u0 + plant.bias), atol=1e-12)
    lin = plant.linearize(u0)
    assert lin.info["operating_input"] == [0.3, -0.2]
    np.testing.assert_allclose(lin.info["operating_output"], plant.C @ x_u + plant.D @ u0)


def test_linearisation_matches_central_differences(rng):
    plant = _saturating(rng, bias=0.3 * rng.standard_normal(6))
    lin = plant.linearize()
    x_star, h = plant.rest_state(), 1e-6

    def advance(x, u):
        plant.set_state(x)
        plant.step(u)
        return plant.state

    # Central differences: error O(h²) from truncation plus O(eps/h) from rounding (common practice, no source).
    J_x = np.column_stack([(advance(x_star + h * e, np.zeros(2)) - advance(x_star - h * e, np.zeros(2))) / (2 * h)
                           for e in np.eye(6)])
    J_u = np.column_stack([(advance(x_star, h * e) - advance(x_star, -h * e)) / (2 * h) for e in np.eye(2)])
    np.testing.assert_allclose(lin.A, J_x, atol=1e-8)
    np.testing.assert_allclose(lin.B, J_u, atol=1e-8)
    np.testing.assert_allclose(lin.info["operating_output"], plant.C @ x_star)


@pytest.mark.parametrize("biased, order", [(False, 2), (True, 1)])
def test_small_signal_error_shrinks_with_the_taylor_order(rng, biased, order):
    # Taylor's theorem: the first-order model leaves an O(a²) remainder, O(a³) when the operating point is the
    # symmetric point of the odd tanh (bias 0); relative to the O(a) response that is O(a) and O(a²), so halving
    # the amplitude divides the relative error by 2**order (common practice, no source).
    plant = _saturating(rng, bias=0.4 * rng.standard_normal(6) if biased else None)
    lin = plant.linearize()
    y0 = np.asarray(lin.info["operating_output"])
    u = rng.standard_normal((200, 2))
    errs = []
    for a in (1e-3, 5e-4):
        y_lin = lin.simulate(a * u)
        errs.append(np.abs(plant.simulate(a * u) - y0 - y_lin).max() / np.abs(y_lin).max())
    assert errs[0] / errs[1] == pytest.approx(2 ** order, rel=0.05)


def test_saturating_states_stay_bounded_under_strong_input(rng):
    plant = _saturating(rng, bias=rng.standard_normal(6))
    _, X = plant.simulate(1e3 * rng.standard_normal((300, 2)), return_states=True)
    assert np.all(np.abs(X) <= 1.0)


def test_saturating_step_and_simulate_agree(rng):
    plant = _saturating(rng, process_noise_std=0.01, measurement_noise_std=0.1, artifact_gain=0.5)
    u = rng.standard_normal((200, 2))
    y = plant.simulate(u, seed=8)
    plant.reset(seed=8)
    np.testing.assert_array_equal(np.array([plant.step(u_k) for u_k in u]), y)


def test_saturating_bad_arguments_raise(rng):
    W, B, C = random_network(3, density=0.5, seed=rng), np.ones((3, 1)), np.ones((2, 3))
    with pytest.raises(SessionError, match=r"leak must be in \(0, 1\]"):
        SaturatingRateNetworkPlant(W, B, C, leak=0.0)
    with pytest.raises(SessionError, match=r"leak must be in \(0, 1\]"):
        SaturatingRateNetworkPlant(W, B, C, leak=1.5)
    with pytest.raises(SessionError, match=r"bias must be a finite vector of shape \(3,\)"):
        SaturatingRateNetworkPlant(W, B, C, bias=np.ones(2))
    with pytest.raises(SessionError, match="W must be square"):
        SaturatingRateNetworkPlant(np.ones((3, 2)), B, C)
    with pytest.raises(UnstableModelError, match="linearisation at rest has spectral radius"):
        SaturatingRateNetworkPlant(3.0 * np.eye(3), B, C)
    with pytest.raises(UnstableModelError, match="did not settle to a rest state"):
        # x <- tanh(-3x + 0.5) has an unstable fixed point and a stable 2-cycle (derivative -3 sech² < -1).
        SaturatingRateNetworkPlant(-3.0 * np.eye(3), B, C, bias=0.5 * np.ones(3), leak=1.0, require_stable=False)


# ---------------------------------------------------------------------------------------------- bad arguments
def test_linear_plant_bad_arguments_raise(rng):
    A, B, C, D = _matrices(rng)
    cases = [
        (dict(A=np.ones((3, 2))), SessionError, "A must be square"),
        (dict(A=np.ones(3)), SessionError, "A must be a 2-D matrix"),
        (dict(B=np.ones((5, 2))), SessionError, "B must have one row per node"),
        (dict(C=np.ones((4, 5))), SessionError, "C must have one column per node"),
        (dict(D=np.ones((2, 4))), SessionError, r"D must have shape \(4, 2\)"),
        (dict(A=np.full((6, 6), np.nan)), SessionError, "A holds NaN or infinite"),
        (dict(process_noise_std=-0.1), SessionError, "process_noise_std must be finite and non-negative"),
        (dict(measurement_noise_std=[1.0, 2.0]), SessionError, r"one value per channel, shape \(4,\)"),
        (dict(sample_rate_hz=0.0), SessionError, "sample_rate_hz must be positive"),
        (dict(artifact_decay_s=-1.0), SessionError, "artifact_decay_s must be positive"),
        (dict(artifact_gain=np.ones((2, 4))), SessionError, r"artifact_gain must have shape \(4, 2\)"),
        (dict(input_names=["a", "a"]), SessionError, "input_names must be 2 unique"),
        (dict(input_names=["a", "b"], output_names=["a", "c", "d", "e"]), SessionError, "must differ"),
        (dict(seed=-1), SessionError, "seed must be a non-negative integer"),
        (dict(A=1.01 * np.eye(6)), UnstableModelError, "spectral radius 1.0100 >= 1"),
    ]
    for change, error, message in cases:
        kw = {"A": A, "B": B, "C": C, "D": D, **change}
        with pytest.raises(error, match=message):
            LinearNetworkPlant(**kw)
    assert LinearNetworkPlant(1.01 * np.eye(6), B, C, require_stable=False).n_states == 6


def test_running_with_bad_inputs_raises(rng):
    plant = _full_plant(rng)
    with pytest.raises(SessionError, match=r"u_k must hold one value per input, shape \(2,\)"):
        plant.step(np.zeros(3))
    with pytest.raises(SessionError, match="u_k holds NaN"):
        plant.step([np.nan, 0.0])
    with pytest.raises(SessionError, match=r"u must be time-major with shape \(n_samples, 2\)"):
        plant.simulate(np.zeros((10, 3)))
    with pytest.raises(SessionError, match="u holds NaN"):
        plant.simulate(np.full((10, 2), np.inf))
    with pytest.raises(SessionError, match=r"x0 must be a finite state vector of shape \(6,\)"):
        plant.reset(x0=np.zeros(5))
    with pytest.raises(SessionError, match="unknown plant parameters"):
        plant.with_params(gain=2.0)


def test_step_does_not_keep_the_callers_buffer(rng):
    plant = _full_plant(rng)
    u = rng.uniform(1, 2, (30, 2))
    u[::2] = 0.0  # an onset at every odd sample
    u_copy = u.copy()
    y_ref = plant.simulate(u)
    plant.reset()
    buf = np.empty(2)
    out = []
    for u_k in u:
        buf[:] = u_k  # a caller reusing one buffer: a kept reference would hide every onset
        out.append(plant.step(buf))
    np.testing.assert_array_equal(np.array(out), y_ref)
    np.testing.assert_array_equal(u, u_copy)  # input untouched


# ---------------------------------------------------------------------------------------------- record_session
def test_record_session_continues_through_trials_and_rests(rng):
    plant = _full_plant(rng)
    u = rng.standard_normal((600, 2))
    u[150:200] = u[350:400] = 0.0
    trials = [(0, 150), (200, 350), (400, 600)]
    session = record_session(plant, u, trials=trials, seed=6, output_resolution=0.01)
    np.testing.assert_array_equal(session.trials, trials)
    assert session.segments() == trials  # every sample valid: artifacts are not blanked here
    assert session.input_units == ("uA", "uA") and session.output_units == ("uV",) * 4
    assert session.input_names == plant.input_names and session.output_names == plant.output_names
    assert session.sample_rate_hz == 250.0
    assert session.metadata["simulated"] is True and session.metadata["seed"] == 6
    assert session.metadata["trial_start"] == "continue" and session.metadata["plant_type"] == "linear_network"
    np.testing.assert_array_equal(session.u, u)
    y = plant.simulate(u, seed=6)
    np.testing.assert_allclose(session.y, y, atol=0.005 + 1e-12)  # rounding to 0.01 moves each value <= 0.005
    np.testing.assert_allclose(session.y / 0.01, np.round(session.y / 0.01), atol=1e-6)


def test_record_session_from_rest_restarts_each_trial(rng):
    plant = _full_plant(rng).with_params(process_noise_std=0, measurement_noise_std=0, drift_amplitude=0,
                                         drift_step_std=0, artifact_gain=None)
    u = rng.standard_normal((300, 2))
    trials = [(0, 100), (100, 220), (220, 300)]  # back to back: the previous trial leaves a non-rest state
    session = record_session(plant, u, trials=trials, trial_start="rest", output_units="mV",
                             metadata={"scenario": "test"})
    for a, b in trials:
        np.testing.assert_allclose(session.y[a:b], plant.simulate(u[a:b]), rtol=1e-12, atol=1e-12)
    assert session.output_units == ("mV",) * 4 and session.metadata["scenario"] == "test"
    assert not np.allclose(session.y[100:220], plant.simulate(u)[100:220])


class _EchoPlant:
    """The bare plant interface without set_state: y_k = u_k."""

    n_inputs = n_outputs = 1
    sample_rate_hz = 100.0
    input_names, output_names = ("stim",), ("rec",)

    def reset(self, seed=None, x0=None):
        pass

    def step(self, u_k):
        return np.array(u_k, dtype=float).reshape(1)


def test_record_session_takes_any_plant_with_the_interface():
    u = np.arange(10.0)[:, None]
    session = record_session(_EchoPlant(), u, trials=[(0, 5), (5, 10)])
    np.testing.assert_array_equal(session.y, u)
    assert "seed" not in session.metadata and session.metadata["plant_type"] == "_EchoPlant"
    with pytest.raises(SessionError, match="trial_start='rest' needs a plant with rest_state"):
        record_session(_EchoPlant(), u, trial_start="rest")


def test_record_session_bad_arguments_raise(rng):
    plant = _full_plant(rng)
    u = np.zeros((100, 2))
    with pytest.raises(SessionError, match="trial_start must be 'continue' or 'rest'"):
        record_session(plant, u, trial_start="fresh")
    with pytest.raises(SessionError, match=r"schedule u must be time-major with shape \(n_samples, 2\)"):
        record_session(plant, np.zeros((100, 3)))
    with pytest.raises(SessionError, match="schedule u holds NaN"):
        record_session(plant, np.full((100, 2), np.nan))
    with pytest.raises(SessionError, match="overlap"):
        record_session(plant, u, trials=[(0, 60), (50, 100)])
    with pytest.raises(SessionError, match="output_resolution must be positive"):
        record_session(plant, u, output_resolution=0.0)


# ---------------------------------------------------------------------------------------------- files
def _assert_same_params(a, b):
    pa, pb = a.get_params(), b.get_params()
    assert pa.keys() == pb.keys()
    for k in pa:
        if isinstance(pa[k], np.ndarray):
            np.testing.assert_array_equal(pa[k], pb[k])
            assert pb[k].dtype == pa[k].dtype
        else:
            assert pa[k] == pb[k] and type(pa[k]) is type(pb[k]), k


@pytest.mark.parametrize("kind", ["linear", "saturating", "linear_no_artifact"])
def test_save_load_round_trip_is_exact(rng, tmp_path, kind):
    if kind == "saturating":
        plant = _saturating(rng, bias=0.2 * rng.standard_normal(6), process_noise_std=0.01, artifact_gain=0.3,
                            measurement_noise_std=0.2, sample_rate_hz=500.0, seed=4, input_names=["s1", "s2"])
    else:
        plant = _full_plant(rng, **({"artifact_gain": None} if kind == "linear_no_artifact" else {}))
    path = save_plant(plant, tmp_path / "plant.h5")
    loaded = load_plant(path)
    assert type(loaded) is type(plant)
    _assert_same_params(plant, loaded)
    u = rng.standard_normal((100, 2))
    np.testing.assert_array_equal(loaded.simulate(u, seed=1), plant.simulate(u, seed=1))
    save_plant(loaded, tmp_path / "again.h5")
    assert (tmp_path / "again.h5").read_bytes() == path.read_bytes()


def test_save_plant_refuses_to_overwrite_and_leaves_nothing_behind(rng, tmp_path):
    plant = _full_plant(rng)
    path = save_plant(plant, tmp_path / "plant.h5")
    before = path.read_bytes()
    with pytest.raises(StimsteerError, match="already exists; pass overwrite=True"):
        save_plant(plant.with_params(seed=3), path)
    assert path.read_bytes() == before
    save_plant(plant.with_params(seed=3), path, overwrite=True)
    assert load_plant(path).seed == 3
    with pytest.raises(StimsteerError, match="save_plant stores"):
        save_plant(_EchoPlant(), tmp_path / "echo.h5")
    with pytest.raises(StimsteerError, match="does not exist"):
        save_plant(plant, tmp_path / "missing" / "plant.h5")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["plant.h5"]


def test_load_plant_rejects_other_files(rng, tmp_path):
    plant = _full_plant(rng)
    text = tmp_path / "notes.h5"
    text.write_text("not a plant")
    with pytest.raises(FileFormatError, match="is not an HDF5 file"):
        load_plant(text)
    with pytest.raises(FileNotFoundError):
        load_plant(tmp_path / "absent.h5")
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f["data"] = np.zeros(3)
    with pytest.raises(FileFormatError, match="not a stimsteer plant file"):
        load_plant(other)
    for attr, value, message in (("format_version", 99, "plant file version 99"),
                                 ("plant_type", "neural_field", "unknown plant_type 'neural_field'")):
        path = save_plant(plant, tmp_path / f"{attr}.h5")
        with h5py.File(path, "a") as f:
            f.attrs[attr] = value
        with pytest.raises(FileFormatError, match=message):
            load_plant(path)
    path = save_plant(plant, tmp_path / "damaged.h5")
    with h5py.File(path, "a") as f:
        del f["C"]
    before = path.read_bytes()
    with pytest.raises(FileFormatError, match=r"misses the plant parameters \['C'\]"):
        load_plant(path)
    assert path.read_bytes() == before  # a bad file is never modified
    path = save_plant(plant, tmp_path / "extra.h5")
    with h5py.File(path, "a") as f:
        f.attrs["gain"] = 2.0
    with pytest.raises(FileFormatError, match="does not take"):
        load_plant(path)


# ------------------------------------------------------------------------------------------------ innovation plant
def test_innovation_plant_without_noise_is_the_model_plus_offset(rng):
    # Outside check: scipy.signal.dlsim simulates the same (A, B, C, D) from rest.
    model = StateSpaceModel(A=[[0.5, 0.1], [0.0, 0.3]], B=[[1.0], [0.5]], C=[[1.0, -1.0]], D=[[0.2]],
                            K=[[0.3], [0.1]], innovation_cov=[[4.0]])
    plant = InnovationPlant(model, output_offset=[2.5], noise=False)
    u = rng.standard_normal((50, 1))
    _t, y_ref, _x = signal.dlsim((model.A, model.B, model.C, model.D, 1.0), u)
    assert np.allclose(plant.simulate(u), y_ref + 2.5, atol=1e-12)
    with pytest.raises(SessionError, match="output_offset must be 1 finite values"):
        InnovationPlant(model, output_offset=[1.0, 2.0])
    with pytest.raises(SessionError, match="x0 must be a finite state vector of shape \\(2,\\)"):
        plant.reset(x0=[1.0])
    with pytest.raises(SessionError, match="u_k must hold 1 finite values"):
        plant.step([np.nan])


def test_innovation_plant_draws_its_innovations_with_their_covariance():
    model = StateSpaceModel(A=[[0.0]], B=[[0.0]], C=[[0.0]], innovation_cov=[[4.0]])
    plant = InnovationPlant(model, seed=7)
    y = plant.simulate(np.zeros((20000, 1)))
    # sample variance of 20000 normal draws: standard error 4 * sqrt(2 / 20000) = 0.04; 5 standard errors allowed
    assert abs(y.var() - 4.0) < 0.2
    assert np.array_equal(plant.simulate(np.zeros((5, 1)), seed=3), plant.simulate(np.zeros((5, 1)), seed=3))


def test_every_plant_has_the_plant_interface_of_the_contract(rng):
    # stimsteer.sysid.protocols.Plant: reset(seed, x0) and step(u_k) -> y_k, plus the sizes the closed loop reads
    model = StateSpaceModel(A=[[0.5]], B=[[1.0]], C=[[1.0]], innovation_cov=[[1.0]])
    W = random_network(4, density=0.5, seed=1)
    plants = [LinearNetworkPlant([[0.5]], [[1.0]], [[1.0]]), InnovationPlant(model),
              SaturatingRateNetworkPlant(W, rng.standard_normal((4, 1)), rng.standard_normal((1, 4)))]
    for plant in plants:
        assert isinstance(plant, Plant)
        plant.reset(seed=3)
        assert np.shape(plant.step(np.zeros(plant.n_inputs))) == (plant.n_outputs,)
