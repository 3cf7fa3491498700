"""Behaviour of stimsteer.sysid.network: responses, controllability, minimum-energy transitions, site ranking."""

import dataclasses

import numpy as np
import pytest

from stimsteer.sysid.exceptions import SessionError, UnstableModelError
from stimsteer.sysid.network import (
    NORMALISATION_NONE,
    controllability,
    controllability_gramian,
    controlled_response,
    impulse_responses,
    minimum_energy_transition,
    network_model,
    normalised_network,
    pattern_to_state,
    pattern_transition,
    rank_sites,
    reachability_matrix,
    site_controllability,
)
from stimsteer.sysid.statespace import StateSpaceModel


def _random_model(rng, n=4, m=3, p=2, rho=0.8):
    """A random stable model; eigenvalues scaled to spectral radius ``rho`` (a choice of this test)."""
    A = rng.standard_normal((n, n))
    A *= rho / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)),
                           D=rng.standard_normal((p, m)))


# ------------------------------------------------------------------------------------------------ systems
def test_network_model_defaults_to_one_site_and_channel_per_node():
    model = network_model(np.diag([0.5, 0.2]))
    assert model.n_inputs == model.n_outputs == 2
    assert model.input_names == ("node0", "node1")
    np.testing.assert_array_equal(model.B, np.eye(2))


def test_network_model_accepts_vector_input_matrix():
    model = network_model(np.eye(3) * 0.5, B=[1.0, 0.0, 0.0], C=[0.0, 1.0, 0.0])
    assert model.B.shape == (3, 1) and model.C.shape == (1, 3)
    assert model.input_names == ("u0",)


@pytest.mark.parametrize("A, B, C, match", [
    (np.ones((2, 3)), None, None, "must be square"),
    (np.eye(2), np.ones((3, 1)), None, r"B must have shape \(2, n_sites\)"),
    (np.eye(2), None, np.ones((1, 3)), r"C must have shape \(n_channels, 2\)"),
])
def test_network_model_rejects_bad_shapes(A, B, C, match):
    with pytest.raises(SessionError, match=match):
        network_model(A, B, C)


def test_functions_reject_a_system_that_is_neither_model_nor_matrices():
    with pytest.raises(SessionError, match="system must be a StateSpaceModel or a tuple"):
        controllability("not a model")


def test_normalised_network_has_spectral_radius_below_one(rng):
    A = 3.0 * rng.standard_normal((6, 6))
    An, smax = normalised_network(A)
    assert smax == pytest.approx(np.linalg.svd(A, compute_uv=False)[0])
    assert np.max(np.abs(np.linalg.eigvals(An))) < 1.0


# ------------------------------------------------------------------------------------------------ responses
def test_impulse_responses_are_markov_parameters(rng):
    model = _random_model(rng)
    h = impulse_responses(model, 5)
    assert h.shape == (5, 2, 3)
    np.testing.assert_allclose(h[0], model.D)
    np.testing.assert_allclose(h[3], model.C @ np.linalg.matrix_power(model.A, 2) @ model.B, rtol=1e-12)


@pytest.mark.parametrize("bad", [0, -3, 2.5])
def test_impulse_responses_reject_bad_step_counts(bad):
    with pytest.raises(SessionError, match="whole number of samples >= 1"):
        impulse_responses((np.eye(2) * 0.5,), bad)


def test_controlled_response_is_free_plus_forced_and_equals_simulation(rng):
    model = _random_model(rng)
    u = rng.standard_normal((300, 3))
    x0 = rng.standard_normal(4)
    u_before = u.copy()
    resp = controlled_response(model, u, x0=x0)
    np.testing.assert_array_equal(u, u_before)
    np.testing.assert_allclose(resp.free + resp.forced, resp.y, rtol=0, atol=1e-14)
    # by construction: the free part alone is the simulation from x0 with zero input
    np.testing.assert_allclose(resp.free, model.simulate(np.zeros_like(u), x0=x0), atol=1e-10)
    np.testing.assert_allclose(resp.y, model.simulate(u, x0=x0), atol=1e-9)
    with pytest.raises(ValueError):
        resp.y[0, 0] = 1.0


def test_controlled_response_rejects_bad_input_and_state(rng):
    model = _random_model(rng)
    with pytest.raises(SessionError, match=r"shape \(n_samples, 3\)"):
        controlled_response(model, np.zeros((10, 2)))
    with pytest.raises(SessionError, match="x0 must be a finite vector of 4 states"):
        controlled_response(model, np.zeros((10, 3)), x0=np.zeros(3))


def test_reachability_matrix_maps_inputs_to_final_state(rng):
    model = _random_model(rng)
    T = 7
    u = rng.standard_normal((T, 3))
    x0 = rng.standard_normal(4)
    _, X = model.simulate(u, x0=x0, return_states=True)
    R = reachability_matrix(model, T)
    np.testing.assert_allclose(np.linalg.matrix_power(model.A, T) @ x0 + R @ u.reshape(-1), X[-1], atol=1e-12)
    np.testing.assert_allclose(R @ R.T, controllability_gramian(model, T), atol=1e-12)


# ------------------------------------------------------------------------------------------------ controllability
def test_uncontrollable_mode_is_found_by_the_kalman_rank():
    # a diagonal A with one actuated node: the other two modes are untouched (by construction)
    A = np.diag([0.9, 0.5, 0.2])
    rep = controllability((A, np.array([[1.0], [0.0], [0.0]])))
    assert rep.rank == 1 and not rep.is_controllable
    assert rep.rank_tol > 0 and rep.kalman_singular_values.shape == (3,)
    assert rep.condition_number == np.inf
    assert rep.normalisation == NORMALISATION_NONE


def test_controllable_model_has_full_rank_and_finite_condition(rng):
    rep = controllability(_random_model(rng), horizon_steps=20)
    assert rep.is_controllable and rep.rank == 4 and rep.horizon_steps == 20
    assert np.isfinite(rep.condition_number) and rep.condition_number >= 1
    assert rep.average_controllability == pytest.approx(np.sum(rep.gramian_eigenvalues))
    assert np.all(np.diff(rep.gramian_eigenvalues) <= 0)


def test_user_rank_tolerance_is_used_and_reported():
    rep = controllability((np.diag([0.5, 0.4]), np.array([[1.0], [1e-6]])), rank_tol=1e-3)
    assert rep.rank_tol == 1e-3 and rep.rank == 1
    with pytest.raises(SessionError, match="rank_tol must be a finite number >= 0"):
        controllability((np.diag([0.5, 0.4]),), rank_tol=-1.0)


def test_infinite_horizon_needs_a_stable_model_unless_normalised():
    A = np.array([[1.2, 0.3], [0.0, 0.7]])
    with pytest.raises(UnstableModelError, match="spectral radius is 1.2000 >= 1"):
        controllability((A,))
    with pytest.raises(UnstableModelError, match="infinite-horizon Gramian"):
        controllability_gramian((A,))
    assert controllability((A,), horizon_steps=5).horizon_steps == 5
    rep = controllability((A,), normalise=True)
    assert rep.normalisation.startswith("A / (1 + sigma_max(A))")


def test_site_controllability_adds_up_to_the_total(rng):
    model = _random_model(rng)
    sites = site_controllability(model)
    total = controllability(model).average_controllability
    assert sites.average.sum() == pytest.approx(total, rel=1e-10)
    assert sites.site_names == model.input_names and sites.horizon_steps is None
    frame = sites.to_frame()
    assert list(frame.columns) == ["site", "average_controllability", "modal_controllability"]
    finite = site_controllability(model, horizon_steps=3)
    np.testing.assert_array_less(finite.average, sites.average)


def test_site_controllability_refuses_unstable_models():
    with pytest.raises(UnstableModelError, match="modal controllability"):
        site_controllability((np.diag([1.5, 0.5]),), horizon_steps=4)
    assert np.all(np.isfinite(site_controllability((np.diag([1.5, 0.5]),), normalise=True).modal))


# ------------------------------------------------------------------------------------------------ patterns
def test_pattern_to_state_is_unique_when_c_has_full_column_rank(rng):
    model = _random_model(rng, n=3, p=5)
    x = rng.standard_normal(3)
    ps = pattern_to_state(model, model.C @ x)
    assert ps.unique and ps.null_space_dim == 0 and ps.residual < 1e-12
    np.testing.assert_allclose(ps.x, x, atol=1e-12)


def test_pattern_to_state_reports_the_null_space_of_a_wide_c(rng):
    model = _random_model(rng, n=5, p=2)
    ps = pattern_to_state(model, [1.0, -1.0])
    assert not ps.unique and ps.null_space_dim == 3 and ps.rank == 2
    np.testing.assert_allclose(model.C @ ps.x, [1.0, -1.0], atol=1e-12)


def test_pattern_to_state_rejects_wrong_length(rng):
    with pytest.raises(SessionError, match="one finite value per recorded channel"):
        pattern_to_state(_random_model(rng), [1.0, 2.0, 3.0])


def test_pattern_transition_reaches_the_target_pattern(rng):
    model = _random_model(rng, n=3, m=2, p=3)
    y0, y1 = rng.standard_normal(3), rng.standard_normal(3)
    pt = pattern_transition(model, y1, y_start=y0, horizon_steps=6)
    assert pt.transition.reachable
    np.testing.assert_allclose(model.C @ pt.transition.x_reached, y1, atol=1e-8)
    np.testing.assert_allclose(pt.transition.x0, pt.start.x)
    assert pattern_transition(model, y1, horizon_steps=6).start is None


# ------------------------------------------------------------------------------------------------ energy
def test_minimum_energy_transition_reaches_a_random_target(rng):
    model = _random_model(rng)
    xt, x0 = rng.standard_normal(4), rng.standard_normal(4)
    tr = minimum_energy_transition(model, xt, x0=x0, horizon_steps=8)
    assert tr.reachable and tr.relative_residual < 1e-9 and tr.u.shape == (8, 3)
    assert tr.gramian_rank == 4 and np.isfinite(tr.gramian_condition)
    with pytest.raises(dataclasses.FrozenInstanceError):
        tr.energy = 0.0


def test_unreachable_target_is_flagged_with_its_residual():
    A = np.diag([0.9, 0.5])
    tr = minimum_energy_transition((A, np.array([[1.0], [0.0]])), [0.0, 1.0], horizon_steps=5)
    assert not tr.reachable and tr.residual == pytest.approx(1.0)
    assert tr.gramian_rank == 1 and tr.gramian_condition == np.inf


def test_minimum_energy_uses_only_the_allowed_sites(rng):
    model = _random_model(rng, n=3, m=3)
    tr = minimum_energy_transition(model, [1.0, 0.0, 0.0], horizon_steps=6, sites=["u2", 0])
    assert tr.sites == (2, 0) and tr.site_names == ("u2", "u0")
    np.testing.assert_array_equal(tr.u[:, 1], 0.0)
    assert tr.reachable


@pytest.mark.parametrize("sites, match", [
    (["nope"], "unknown stimulation site 'nope'"),
    ([7], r"indices 0..2"),
    ([0, 0], "each once"),
    ([], "at least one site"),
])
def test_minimum_energy_rejects_bad_sites(rng, sites, match):
    with pytest.raises(SessionError, match=match):
        minimum_energy_transition(_random_model(rng), np.zeros(4), horizon_steps=3, sites=sites)


def test_minimum_energy_rejects_bad_states_horizon_and_tolerance(rng):
    model = _random_model(rng)
    with pytest.raises(SessionError, match="x_target must be a finite vector of the model's 4 states"):
        minimum_energy_transition(model, np.zeros(3), horizon_steps=3)
    with pytest.raises(SessionError, match="horizon_steps must be a whole number"):
        minimum_energy_transition(model, np.zeros(4), horizon_steps=0)
    with pytest.raises(SessionError, match="reach_rtol must be a positive number"):
        minimum_energy_transition(model, np.zeros(4), horizon_steps=3, reach_rtol=0.0)


def test_zero_target_from_rest_costs_nothing(rng):
    tr = minimum_energy_transition(_random_model(rng), np.zeros(4), horizon_steps=4)
    assert tr.reachable and tr.energy == 0.0


# ------------------------------------------------------------------------------------------------ ranking
def test_rank_sites_orders_sets_by_energy_and_matches_single_transitions(rng):
    model = _random_model(rng, n=3, m=4)
    xt = rng.standard_normal(3)
    ranking = rank_sites(model, xt, horizon_steps=6, max_set_size=2)
    assert len(ranking.sets) == 4 + 6
    finite = ranking.energy[np.isfinite(ranking.energy)]
    assert np.all(np.diff(finite) >= 0)
    for c, e in zip(ranking.sets, ranking.energy):
        tr = minimum_energy_transition(model, xt, horizon_steps=6, sites=list(c))
        assert (e == np.inf) == (not tr.reachable)
        if tr.reachable:
            assert e == pytest.approx(tr.energy, rel=1e-9)
    energy = dict(zip(ranking.sets, ranking.energy))
    for (a, b) in [c for c in ranking.sets if len(c) == 2]:
        # more sites can only lower the minimum energy (the single-site inputs stay feasible)
        assert energy[(a, b)] <= min(energy[(a,)], energy[(b,)]) * (1 + 1e-9)
    frame = ranking.to_frame()
    assert frame["rank"].tolist() == list(range(1, 11)) and frame["sites"].iloc[0] == ranking.names[0]


def test_rank_sites_puts_unreachable_sets_last_with_infinite_energy():
    A = np.diag([0.9, 0.5])
    ranking = rank_sites((A,), [1.0, 1.0], horizon_steps=3, max_set_size=2)
    assert ranking.names[0] == "node0+node1" and np.isfinite(ranking.energy[0])
    assert ranking.n_unreachable == 2 and np.all(np.isinf(ranking.energy[1:]))


def test_rank_sites_rejects_bad_set_sizes(rng):
    with pytest.raises(SessionError, match="max_set_size must be 1, 2 or 3"):
        rank_sites(_random_model(rng), np.zeros(4), horizon_steps=3, max_set_size=4)


def test_rank_sites_refuses_too_many_sets():
    with pytest.raises(SessionError, match="too many"):
        rank_sites((np.eye(120) * 0.5,), np.zeros(120), horizon_steps=1, max_set_size=3)


def test_pattern_to_state_subtracts_the_models_resting_output(rng):
    base = _random_model(rng, n=3, p=3)
    offset = np.array([1.0, -2.0, 0.5])
    model = base.replace(info={"output_offset": offset})
    x = rng.standard_normal(3)
    ps = pattern_to_state(model, model.C @ x + offset)
    np.testing.assert_allclose(ps.x, x, atol=1e-12)
    np.testing.assert_array_equal(ps.output_offset, offset)
    np.testing.assert_array_equal(pattern_to_state(base, [0.0, 0.0, 0.0]).output_offset, 0.0)


def test_minimum_energy_needs_a_horizon(rng):
    with pytest.raises(SessionError, match="horizon_steps is required"):
        minimum_energy_transition(_random_model(rng), np.zeros(4), horizon_steps=None)


def test_minimum_energy_rejects_a_bad_start_state(rng):
    with pytest.raises(SessionError, match="x0 must be a finite vector of the model's 4 states"):
        minimum_energy_transition(_random_model(rng), np.zeros(4), horizon_steps=3, x0=[np.nan, 0, 0, 0])
