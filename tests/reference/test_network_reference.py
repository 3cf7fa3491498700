"""Network-control results checked against outside sources (each source named beside its check)."""

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid.network import (
    controllability,
    controllability_gramian,
    minimum_energy_transition,
    reachability_matrix,
    site_controllability,
)


def _stable(rng, n, m, rho=0.9):
    A = rng.standard_normal((n, n))
    A *= rho / np.max(np.abs(np.linalg.eigvals(A)))
    return A, rng.standard_normal((n, m))


def _symmetric_network(rng, n=8):
    """A symmetric coupling matrix scaled as A / (1 + sigma_max(A)) (Gu et al. 2015, Methods), so it is stable."""
    M = rng.standard_normal((n, n))
    S = 0.5 * (M + M.T)
    return S / (1.0 + np.linalg.norm(S, 2))


# ------------------------------------------------------------------------------------------------ Gramians
def test_infinite_gramian_equals_scipy_lyapunov_and_solves_the_equation(rng):
    # Reference library: scipy.linalg.solve_discrete_lyapunov solves A X Aᵀ - X + Q = 0 (SciPy documentation).
    A, B = _stable(rng, 6, 2)
    W = controllability_gramian((A, B))
    np.testing.assert_allclose(W, sla.solve_discrete_lyapunov(A, B @ B.T), rtol=1e-10, atol=1e-12)
    # the defining equation W = A W Aᵀ + B Bᵀ (Kailath 1980, Linear Systems, Sec. 9.2)
    np.testing.assert_allclose(A @ W @ A.T + B @ B.T, W, rtol=1e-10, atol=1e-12)


def test_finite_horizon_sum_converges_to_the_infinite_gramian(rng):
    # W_T = sum_{k<T} A^k B Bᵀ A^kᵀ -> W_inf geometrically, with error bounded by O(rho^(2T))
    # (Kailath 1980, Linear Systems, Sec. 9.2; the series of the Lyapunov solution).
    A, B = _stable(rng, 5, 3, rho=0.7)
    W_inf = sla.solve_discrete_lyapunov(A, B @ B.T)
    errors = [np.linalg.norm(controllability_gramian((A, B), T) - W_inf) for T in (5, 10, 20, 300)]
    assert np.all(np.diff(errors[:3]) < 0)
    assert errors[-1] < 1e-12 * np.linalg.norm(W_inf)


def test_finite_gramian_is_the_reachability_matrix_product(rng):
    # W_T = R_T R_Tᵀ with R_T = [A^(T-1) B, ..., B] (Kailath 1980, Linear Systems, Sec. 2.3).
    A, B = _stable(rng, 4, 2)
    R = reachability_matrix((A, B), 9)
    np.testing.assert_allclose(controllability_gramian((A, B), 9), R @ R.T, rtol=1e-12, atol=1e-13)


def test_kalman_rank_matches_numpy_matrix_rank(rng):
    # Kalman rank test: controllable iff rank [B, AB, ..., A^(n-1)B] = n (Kalman, Ho, Narendra 1963);
    # numpy.linalg.matrix_rank is the reference for the rank (same default tolerance rule).
    A, B = _stable(rng, 5, 1)
    K = np.hstack([np.linalg.matrix_power(A, k) @ B for k in range(5)])
    assert controllability((A, B)).rank == np.linalg.matrix_rank(K) == 5


# ------------------------------------------------------------------------------------------------ Gu et al. 2015
def test_modal_controllability_of_a_symmetric_network(rng):
    # Gu et al. (2015), Nat. Commun. 6:8414, Methods: phi_i = sum_j (1 - lambda_j²) v_ij² for symmetric A with
    # orthonormal eigenvectors V. Since sum_j lambda_j² v_ij² = (A²)_ii = sum_k A_ik², phi_i = 1 - sum_k A_ik²
    # and sum_i phi_i = N - ||A||_F² (identities derived from that definition).
    A = _symmetric_network(rng)
    sites = site_controllability((A,))
    np.testing.assert_allclose(sites.modal, 1.0 - np.sum(A ** 2, axis=1), rtol=1e-10)
    assert sites.modal.sum() == pytest.approx(8 - np.linalg.norm(A, "fro") ** 2, rel=1e-10)


def test_average_controllability_of_a_symmetric_network(rng):
    # Gu et al. (2015), Methods: average controllability of node i = trace of the Gramian with B = e_i,
    # = sum_k (A^(2k))_ii = [(I - A²)^-1]_ii for symmetric stable A (derived from that definition).
    A = _symmetric_network(rng)
    sites = site_controllability((A,))
    np.testing.assert_allclose(sites.average, np.diag(np.linalg.inv(np.eye(8) - A @ A)), rtol=1e-10)


def test_normalisation_option_reproduces_the_gu_scaling(rng):
    # A / (1 + sigma_max(A)) (Gu et al. 2015, Methods; Pasqualetti, Zampieri, Bullo 2014, IEEE TCNS 1:40).
    M = rng.standard_normal((6, 6))
    S = M + M.T
    An = S / (1.0 + np.linalg.norm(S, 2))
    via_option = site_controllability((S,), normalise=True)
    np.testing.assert_allclose(via_option.modal, 1.0 - np.sum(An ** 2, axis=1), rtol=1e-10)
    assert "sigma_max" in via_option.normalisation


# ------------------------------------------------------------------------------------------------ minimum energy
@pytest.mark.parametrize("T, energy, inputs", [
    (2, 2.0, [1.0, -1.0]),        # hand-derived: solve [AB, B] u = [1, 0]
    (3, 0.5, [0.5, 0.0, -0.5]),   # hand-derived: u = Rᵀ (R Rᵀ)^-1 d with R R ᵀ = [[8.75, 4.5], [4.5, 3]]
    (10, 2.0 / 165.0, None),      # hand-derived worked value (task brief)
])
def test_double_integrator_minimum_energy_worked_values(T, energy, inputs):
    # Double integrator A = [[1, 1], [0, 1]], B = [0.5, 1]ᵀ from 0 to [1, 0] (hand-derived worked values).
    A, B = np.array([[1.0, 1.0], [0.0, 1.0]]), np.array([[0.5], [1.0]])
    tr = minimum_energy_transition((A, B), [1.0, 0.0], horizon_steps=T)
    assert tr.energy == pytest.approx(energy, rel=1e-12)
    assert tr.reachable and tr.residual < 1e-12
    if inputs is not None:
        np.testing.assert_allclose(tr.u.ravel(), inputs, atol=1e-12)


def test_minimum_energy_equals_the_gramian_formula(rng):
    # E* = dᵀ W_T^-1 d (Kailath 1980, Linear Systems, Sec. 2.3; Pasqualetti, Zampieri, Bullo 2014, Eq. 3).
    A, B = _stable(rng, 4, 2)
    x0, xt = rng.standard_normal(4), rng.standard_normal(4)
    T = 6
    d = xt - np.linalg.matrix_power(A, T) @ x0
    W = controllability_gramian((A, B), T)
    tr = minimum_energy_transition((A, B), xt, x0=x0, horizon_steps=T)
    assert tr.energy == pytest.approx(d @ np.linalg.solve(W, d), rel=1e-9)


def test_every_other_input_reaching_the_target_costs_at_least_as_much(rng):
    # The minimum-norm solution of R u = d is orthogonal to null(R), so ||u* + z||² = ||u*||² + ||z||² for z in
    # null(R) (least-squares theory, common practice, no source); perturb with random null-space directions.
    A, B = _stable(rng, 3, 2)
    T = 5
    xt = rng.standard_normal(3)
    tr = minimum_energy_transition((A, B), xt, horizon_steps=T)
    R = reachability_matrix((A, B), T)
    N = sla.null_space(R)
    for _ in range(50):
        z = N @ rng.standard_normal(N.shape[1])
        u = tr.u.reshape(-1) + z
        np.testing.assert_allclose(R @ u, xt, atol=1e-10)
        assert u @ u >= tr.energy * (1 - 1e-12)


# ------------------------------------------------------------------------------------------------ repeated eigenvalues
def _ring(n):
    A = np.zeros((n, n))
    for i in range(n):
        A[i, (i + 1) % n] = A[(i + 1) % n, i] = 1.0
    return A


@pytest.mark.parametrize("graph, n", [("ring", 8), ("complete", 6), ("ring", 12), ("complete", 9)])
def test_modal_controllability_is_equal_on_every_node_of_a_vertex_transitive_graph(graph, n):
    # Pasqualetti, Zampieri, Bullo (2014), IEEE TCNS 1:40 and Gu et al. (2015), Nat. Commun. 6:8414, Methods:
    # for symmetric A with orthonormal eigenvectors, phi_i = 1 - sum_k A_ik². On a ring or a complete graph every
    # node is equivalent, so every value is that closed form (both graphs have repeated eigenvalues, which the
    # one-by-one eigenvectors of scipy.linalg.eig got wrong: 0.75-0.83 on the 8-ring, 0.69-0.94 on K6).
    A = _ring(n) if graph == "ring" else np.ones((n, n)) - np.eye(n)
    An = A / (1.0 + np.linalg.norm(A, 2))
    closed = 1.0 - np.sum(An ** 2, axis=1)
    modal = site_controllability((An,)).modal
    np.testing.assert_allclose(modal, closed, rtol=0, atol=1e-12)
    assert np.ptp(closed) == 0.0
    if (graph, n) == ("ring", 8):
        assert modal[0] == pytest.approx(7.0 / 9.0, abs=1e-12)  # 1 - 2 (1/3)², sigma_max of the ring = 2


def test_modal_controllability_of_a_random_symmetric_graph_with_a_repeated_eigenvalue(rng):
    # Orthonormal eigenvectors of a symmetric matrix built with a three-fold eigenvalue (closed form as above).
    Q, _ = np.linalg.qr(rng.standard_normal((7, 7)))
    lam = np.array([0.5, 0.5, 0.5, -0.2, 0.1, 0.1, 0.7])
    A = Q @ np.diag(lam) @ Q.T
    A = 0.5 * (A + A.T)
    modal = site_controllability((A,)).modal
    np.testing.assert_allclose(modal, 1.0 - np.sum(A ** 2, axis=1), atol=1e-12)
    assert np.all(modal <= 1.0)


def test_modal_controllability_of_a_non_normal_network_warns_with_the_condition_number():
    from stimsteer.sysid import ConditioningWarning

    A = np.array([[0.5, 0.4], [0.0, 0.3]])
    with pytest.warns(ConditioningWarning, match="not normal.*condition number"):
        modal = site_controllability((A,)).modal
    # Unit-norm left eigenvectors (Pasqualetti et al. 2014): worked by hand from w1 ∝ (1, 2), w2 = (0, 1).
    lam_w = [(0.5, np.array([1.0, 2.0]) / np.sqrt(5.0)), (0.3, np.array([0.0, 1.0]))]
    expect = [sum((1 - lam ** 2) * (w @ np.eye(2)[:, j]) ** 2 for lam, w in lam_w) for j in range(2)]
    np.testing.assert_allclose(modal, expect, atol=1e-12)


def test_modal_controllability_refuses_a_defective_network():
    from stimsteer.sysid import InvalidParameterError

    A = np.array([[0.5, 1.0], [0.0, 0.5]])  # a Jordan block: one eigenvector for a double eigenvalue
    with pytest.raises(InvalidParameterError, match="defective"):
        site_controllability((A,))
