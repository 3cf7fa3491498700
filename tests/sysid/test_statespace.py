"""StateSpaceModel and kalman_gain: simulation, impulse response, state estimation, stability, Riccati solution."""

import numpy as np
import pytest
import scipy.linalg as sla
import scipy.signal as sig

from stimsteer.sysid import SessionError, StateSpaceModel, UnstableModelError, kalman_gain


def _random_model(rng, n=4, m=2, p=3, with_d=True):
    # a stable random system: A scaled to spectral radius 0.9 (construction, no outside source)
    A = rng.standard_normal((n, n))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.standard_normal((n, m)), rng.standard_normal((p, n))
    D = rng.standard_normal((p, m)) if with_d else None
    return StateSpaceModel(A=A, B=B, C=C, D=D, sample_rate_hz=250.0)


# ------------------------------------------------------------------------------------------------ simulation
def test_simulate_equals_scipy_dlsim_from_a_state(rng):
    # outside check: scipy.signal.dlsim (SciPy reference implementation of the discrete state-space recursion)
    md = _random_model(rng)
    u = rng.standard_normal((200, md.n_inputs))
    x0 = rng.standard_normal(md.n_states)
    _, y_ref, x_ref = sig.dlsim((md.A, md.B, md.C, md.D, 1.0 / md.sample_rate_hz), u, x0=x0)
    y, X = md.simulate(u, x0=x0, return_states=True)
    np.testing.assert_allclose(y, y_ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(X[:-1], x_ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(X[-1], md.A @ X[-2] + md.B @ u[-1], rtol=1e-12, atol=1e-12)


def test_simulate_from_rest_is_the_default(rng):
    md = _random_model(rng)
    u = rng.standard_normal((50, md.n_inputs))
    np.testing.assert_array_equal(md.simulate(u), md.simulate(u, x0=np.zeros(md.n_states)))


def test_impulse_response_equals_dlsim_of_an_impulse(rng):
    # outside check: scipy.signal.dlsim driven by a unit impulse on each input in turn
    md = _random_model(rng)
    h = md.impulse_response(30)
    for j in range(md.n_inputs):
        u = np.zeros((30, md.n_inputs))
        u[0, j] = 1.0
        _, y_ref, _ = sig.dlsim((md.A, md.B, md.C, md.D, 1.0), u)
        np.testing.assert_allclose(h[:, :, j], y_ref, rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(h[0], md.D)


def test_simulate_does_not_modify_its_input(rng):
    md = _random_model(rng)
    u = rng.standard_normal((20, md.n_inputs))
    before = u.copy()
    md.simulate(u)
    md.predict(u[:5], md.simulate(u)[:5], u[5:])
    np.testing.assert_array_equal(u, before)


# ------------------------------------------------------------------------------------------------ state estimation
def test_estimate_state_and_predict_are_exact_on_noise_free_data(rng):
    # answer known by construction: noise-free output of the model itself, window >= observability index
    md = _random_model(rng).with_noise(Q=0.1 * np.eye(4), R=np.eye(3))  # a non-zero Kalman gain K
    u = rng.standard_normal((60, md.n_inputs))
    x0 = rng.standard_normal(md.n_states)
    y, X = md.simulate(u, x0=x0, return_states=True)
    np.testing.assert_allclose(md.estimate_state(u[:10], y[:10]), X[10], rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(md.predict(u[:10], y[:10], u[10:]), y[10:], rtol=1e-8, atol=1e-8)


def test_estimate_state_of_an_empty_window_is_rest(rng):
    md = _random_model(rng)
    x = md.estimate_state(np.zeros((0, md.n_inputs)), np.zeros((0, md.n_outputs)))
    np.testing.assert_array_equal(x, np.zeros(md.n_states))


# ------------------------------------------------------------------------------------------------ stability
def test_poles_spectral_radius_and_margin_of_a_known_system():
    # answer known by construction: block-diagonal A with eigenvalues 0.6 ± 0.6j (modulus 0.6·√2) and 0.5
    A = sla.block_diag([[0.6, 0.6], [-0.6, 0.6]], [[0.5]])
    md = StateSpaceModel(A=A, B=np.ones((3, 1)), C=np.ones((1, 3)))
    np.testing.assert_allclose(np.sort_complex(md.poles), np.sort_complex([0.6 + 0.6j, 0.6 - 0.6j, 0.5]),
                               atol=1e-14)
    assert np.all(np.diff(np.abs(md.poles)) <= 1e-15)  # sorted by decreasing modulus
    assert md.spectral_radius == pytest.approx(0.6 * np.sqrt(2.0), abs=1e-14)
    assert md.stability_margin == pytest.approx(1.0 - 0.6 * np.sqrt(2.0), abs=1e-14)
    assert md.is_stable
    md.require_stable("a Gramian")


def test_require_stable_raises_for_an_unstable_model():
    md = StateSpaceModel(A=[[1.05]], B=[[1.0]], C=[[1.0]])
    assert not md.is_stable and md.stability_margin == pytest.approx(-0.05)
    with pytest.raises(UnstableModelError, match=r"controllability Gramian needs a stable model.*1\.0500"):
        md.require_stable("the controllability Gramian")


# ------------------------------------------------------------------------------------------------ Kalman gain
def test_kalman_gain_equals_the_gain_built_from_solve_discrete_are(rng):
    # outside check: scipy.linalg.solve_discrete_are solved here directly on the dual (filter) problem
    n, p = 4, 2
    A = rng.standard_normal((n, n))
    A *= 1.1 / np.max(np.abs(np.linalg.eigvals(A)))  # also an unstable A: the filter must still exist
    C = rng.standard_normal((p, n))
    G = rng.standard_normal((n, n))
    Q = G @ G.T
    R = np.diag([0.5, 2.0])
    S = 0.1 * rng.standard_normal((n, p))
    P_ref = sla.solve_discrete_are(A.T, C.T, Q, R, s=S)
    K_ref = (A @ P_ref @ C.T + S) @ np.linalg.inv(C @ P_ref @ C.T + R)
    K, P = kalman_gain(A, C, Q, R, S)
    np.testing.assert_allclose(P, P_ref, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(K, K_ref, rtol=1e-10, atol=1e-10)
    assert np.max(np.abs(np.linalg.eigvals(A - K @ C))) < 1.0  # the predictor is stable


def test_kalman_riccati_residual_is_zero(rng):
    # residual check of the filter Riccati equation (Anderson & Moore 1979, Optimal Filtering, ch. 4)
    n, p = 3, 2
    A = rng.standard_normal((n, n))
    A *= 0.95 / np.max(np.abs(np.linalg.eigvals(A)))
    C = rng.standard_normal((p, n))
    Q, R = np.eye(n), np.eye(p)
    K, P = kalman_gain(A, C, Q, R)
    Re = C @ P @ C.T + R
    resid = A @ P @ A.T + Q - (A @ P @ C.T) @ np.linalg.solve(Re, C @ P @ A.T) - P
    assert np.max(np.abs(resid)) < 1e-10 * max(1.0, np.max(np.abs(P)))
    np.testing.assert_allclose(P, P.T, atol=0)
    assert np.min(np.linalg.eigvalsh(P)) > 0


def test_random_walk_prior_covariance_is_the_golden_ratio():
    # hand-derivable textbook value: x+ = x + w, y = x + v, unit variances -> P = P - P²/(P + 1) + 1,
    # i.e. P² - P - 1 = 0, P = (1 + √5)/2 = 1.618034; the gain is P/(P + 1) = 1/φ = 0.618034
    K, P = kalman_gain(np.eye(1), np.eye(1), np.eye(1), np.eye(1))
    golden = (1.0 + np.sqrt(5.0)) / 2.0
    assert P[0, 0] == pytest.approx(golden, abs=1e-12)
    assert round(float(P[0, 0]), 6) == 1.618034
    assert K[0, 0] == pytest.approx(golden - 1.0, abs=1e-12)


def test_with_noise_sets_gain_and_innovation_covariance(rng):
    md = _random_model(rng)
    Q, R = 0.2 * np.eye(4), np.diag([1.0, 2.0, 3.0])
    K, P = kalman_gain(md.A, md.C, Q, R)
    noisy = md.with_noise(Q, R)
    np.testing.assert_allclose(noisy.K, K, atol=1e-13)
    np.testing.assert_allclose(noisy.innovation_cov, md.C @ P @ md.C.T + R, atol=1e-12)
    np.testing.assert_array_equal(noisy.A, md.A)


# ------------------------------------------------------------------------------------------------ construction
def test_defaults_vectors_and_read_only_matrices():
    md = StateSpaceModel(A=[[0.5, 0.1], [0.0, 0.3]], B=[1.0, 0.0], C=[0.0, 1.0])
    assert (md.n_states, md.n_inputs, md.n_outputs) == (2, 1, 1)
    np.testing.assert_array_equal(md.D, np.zeros((1, 1)))
    np.testing.assert_array_equal(md.K, np.zeros((2, 1)))
    assert md.past_steps == 2 and md.input_names == ("u0",) and md.output_names == ("y0",)
    with pytest.raises(ValueError, match="read-only"):
        md.A[0, 0] = 1.0
    assert "n_states=2" in repr(md)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"A": np.zeros((2, 3)), "B": np.zeros((2, 1)), "C": np.zeros((1, 2))}, r"A must be square"),
        ({"A": np.eye(2), "B": np.zeros((3, 1)), "C": np.zeros((1, 2))}, r"B must have shape \(2, n_inputs\)"),
        ({"A": np.eye(2), "B": np.zeros((1, 2)), "C": np.zeros((1, 2))}, r"B must have shape.*got \(1, 2\)"),
        ({"A": np.eye(2), "B": np.zeros((2, 1)), "C": np.zeros((1, 3))}, r"C must have shape \(n_outputs, 2\)"),
        ({"A": np.eye(2), "B": np.zeros((2, 1)), "C": np.zeros((1, 2)), "D": np.zeros((2, 1))},
         r"D must have shape \(1, 1\)"),
        ({"A": np.eye(2), "B": np.zeros((2, 1)), "C": np.zeros((1, 2)), "K": np.zeros((1, 2))},
         r"K must have shape \(2, 1\)"),
        ({"A": [[np.nan]], "B": [[1.0]], "C": [[1.0]]}, r"A holds NaN"),
        ({"A": [[0.5]], "B": [[1.0]], "C": [[1.0]], "sample_rate_hz": 0.0}, r"sample_rate_hz must be positive"),
        ({"A": [[0.5]], "B": [[1.0]], "C": [[1.0]], "past_steps": 0}, r"past_steps must be at least 1"),
    ],
)
def test_bad_construction_raises_session_error(kwargs, match):
    with pytest.raises(SessionError, match=match):
        StateSpaceModel(**kwargs)


def test_bad_call_arguments_raise_session_error(rng):
    md = _random_model(rng, n=3, m=2, p=2)
    with pytest.raises(SessionError, match=r"u must have shape \(n_samples, 2\).*got \(10, 3\)"):
        md.simulate(np.zeros((10, 3)))
    with pytest.raises(SessionError, match=r"u holds NaN"):
        md.simulate(np.full((4, 2), np.nan))
    with pytest.raises(SessionError, match=r"x0 must be a finite state vector of length 3"):
        md.simulate(np.zeros((4, 2)), x0=np.zeros(2))
    with pytest.raises(SessionError, match=r"u_past must have shape"):
        md.estimate_state(np.zeros((5, 1)), np.zeros((5, 2)))
    with pytest.raises(SessionError, match=r"y_past must have shape \(5, 2\).*got \(4, 2\)"):
        md.estimate_state(np.zeros((5, 2)), np.zeros((4, 2)))
    with pytest.raises(SessionError, match=r"y_past holds NaN"):
        md.estimate_state(np.zeros((5, 2)), np.full((5, 2), np.nan))
    with pytest.raises(SessionError, match=r"n_steps must be at least 1; got 0"):
        md.impulse_response(0)


def test_predict_many_equals_predict_window_by_window(rng):
    # the batched form is the same linear map (least-squares state estimate, then the model's response)
    A = np.array([[0.8, 0.2, 0.0], [-0.1, 0.7, 0.1], [0.0, 0.0, 0.5]])
    model = StateSpaceModel(A=A, B=rng.normal(size=(3, 2)), C=rng.normal(size=(2, 3)), K=0.1 * rng.normal(size=(3, 2)))
    up, yp, uf = rng.normal(size=(7, 5, 2)), rng.normal(size=(7, 5, 2)), rng.normal(size=(7, 4, 2))
    many = model.predict_many(up, yp, uf)
    one = np.stack([model.predict(a, b, c) for a, b, c in zip(up, yp, uf)])
    np.testing.assert_allclose(many, one, rtol=1e-10, atol=1e-12)
    with pytest.raises(SessionError, match="predict_many needs"):
        model.predict_many(up[0], yp[0], uf[0])


def test_predict_many_over_a_long_horizon_simulates_the_windows_together_without_dense_maps(rng, monkeypatch):
    # A free run over a whole trial: the dense future map would hold (H p) x (H m) = 96,000 x 24,000 values (18 GB);
    # predict_many must give predict's answer without building it.
    from stimsteer.sysid.statespace import DENSE_MAP_LIMIT

    n, m, p, H = 6, 4, 16, 6000
    A = rng.standard_normal((n, n))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)), past_steps=8)
    assert H * p * H * m > DENSE_MAP_LIMIT
    up, yp, uf = rng.standard_normal((2, 8, m)), rng.standard_normal((2, 8, p)), rng.standard_normal((2, H, m))
    with monkeypatch.context() as mp:  # the windows are simulated together, not predicted one by one
        mp.setattr(StateSpaceModel, "predict", lambda *a: pytest.fail("predict called window by window"))
        out = model.predict_many(up, yp, uf)
    for w in range(2):
        np.testing.assert_allclose(out[w], model.predict(up[w], yp[w], uf[w]), rtol=0, atol=1e-12)


def test_predict_many_is_the_same_on_both_sides_of_the_dense_map_limit(rng, monkeypatch):
    import stimsteer.sysid.statespace as ss

    A = np.array([[0.7, 0.2], [-0.1, 0.5]])
    model = StateSpaceModel(A=A, B=rng.standard_normal((2, 2)), C=rng.standard_normal((3, 2)), past_steps=4)
    up, yp, uf = rng.standard_normal((5, 4, 2)), rng.standard_normal((5, 4, 3)), rng.standard_normal((5, 30, 2))
    dense = model.predict_many(up, yp, uf)
    monkeypatch.setattr(ss, "DENSE_MAP_LIMIT", 0)
    np.testing.assert_allclose(model.predict_many(up, yp, uf), dense, rtol=0, atol=1e-11)


def test_prediction_maps_reproduce_predict_and_the_model_is_a_predictor(rng):
    from stimsteer.sysid.protocols import LinearPredictor, StateSpaceForm

    model = StateSpaceModel(A=[[0.8, 0.3], [0.0, 0.5]], B=[[0.0, 0.5], [1.0, 0.0]], C=[[1.0, 0.5]],
                            K=[[0.3], [0.1]], input_units=["uA", "uA"], output_units=["mV"])
    assert isinstance(model, LinearPredictor) and isinstance(model, StateSpaceForm)
    assert (model.past_steps_, model.max_horizon_steps_, model.n_inputs_, model.n_outputs_) == (2, None, 2, 1)
    assert model.input_units_ == ("uA", "uA") and model.output_units_ == ("mV",)
    maps = model.prediction_maps(4, 6)
    assert maps.P.shape == (6, 12) and maps.F.shape == (6, 12) and not np.any(maps.c)
    up, yp, uf = rng.standard_normal((4, 2)), rng.standard_normal((4, 1)), rng.standard_normal((6, 2))
    np.testing.assert_allclose(maps.apply(up, yp, uf), model.predict(up, yp, uf), rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("n, m, p, past", [(6, 3, 8, 5), (6, 2, 1, 2)])  # the second: too short to observe
def test_prediction_maps_equal_predict_on_many_windows_also_where_the_state_is_not_identifiable(rng, n, m, p, past):
    """The maps' state estimate (all unit windows solved at once) is :meth:`estimate_state`, minimum-norm included."""
    A = rng.standard_normal((n, n))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)),
                            D=0.1 * rng.standard_normal((p, m)), K=0.2 * rng.standard_normal((n, p)))
    maps = model.prediction_maps(past, 7)
    for _ in range(5):
        up, yp, uf = rng.standard_normal((past, m)), rng.standard_normal((past, p)), rng.standard_normal((7, m))
        np.testing.assert_allclose(maps.apply(up, yp, uf), model.predict(up, yp, uf), rtol=1e-10, atol=1e-10)


def test_markov_toeplitz_is_the_response_from_rest(rng):
    from stimsteer.sysid.statespace import markov_toeplitz

    model = StateSpaceModel(A=[[0.8, 0.3], [0.0, 0.5]], B=[[0.0, 0.5], [1.0, 0.0]], C=[[1.0, 0.5]], D=[[0.1, 0.0]])
    u = rng.standard_normal((7, 2))
    T = markov_toeplitz(model.impulse_response(9), 7)
    np.testing.assert_allclose((T @ u.reshape(-1)).reshape(7, 1), model.simulate(u), rtol=1e-12, atol=1e-12)


def test_poles_are_computed_once_and_handed_out_as_copies(monkeypatch):
    model = StateSpaceModel(A=[[0.5, 0.2], [0.0, -0.9]], B=[[1.0], [0.0]], C=[[1.0, 1.0]])
    calls = []
    real = np.linalg.eigvals
    monkeypatch.setattr(np.linalg, "eigvals", lambda a: calls.append(1) or real(a))
    first = model.poles
    np.testing.assert_allclose(first, [-0.9, 0.5])  # a triangular A: its diagonal, by decreasing modulus
    first[:] = 0.0  # a caller's copy: the model's poles stay
    np.testing.assert_allclose(model.poles, [-0.9, 0.5])
    assert model.spectral_radius == 0.9 and model.is_stable and len(calls) == 1
