"""The doubling solver of the filter Riccati equation (the factor route's Kalman gains) against SciPy's QZ route, and
its fallbacks.

References: the QZ route is ``scipy.linalg.solve_discrete_are`` through ``kalman_gain`` (an internal equivalence);
the doubling iteration is that of Chu, Fan, Lin & Wang (2004), Convergence analysis of structure-preserving doubling
algorithms for Riccati-type matrix equations, J. Phys. A 37:5749-5762.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stimsteer.sysid import kalman_gain
from stimsteer.sysid.subspace import projection, riccati


def _system(n, p, radius, seed):
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((n, n))
    A *= radius / np.max(np.abs(np.linalg.eigvals(A)))
    C = rng.standard_normal((p, n))
    W = rng.standard_normal((n + p, 3 * (n + p)))
    J = W @ W.T / (3 * (n + p))  # a joint noise covariance with cross terms, as the residuals give
    return A, C, J[:n, :n], J[n:, n:], J[:n, n:]


@pytest.mark.parametrize("n, p, radius", [(3, 2, 0.5), (12, 6, 0.99), (30, 20, 0.9), (8, 2, 1.05)])
def test_doubling_gives_the_gain_of_the_qz_route(n, p, radius):
    A, C, Q, R, S = _system(n, p, radius, seed=n)
    K_ref, P_ref = kalman_gain(A, C, Q, R, S)
    K, P = riccati.doubling_gain(A, C, Q, R, S)
    np.testing.assert_allclose(K, K_ref, rtol=1e-10, atol=1e-10 * np.abs(K_ref).max())
    np.testing.assert_allclose(P, P_ref, rtol=1e-10, atol=1e-10 * np.abs(P_ref).max())
    assert np.max(np.abs(np.linalg.eigvals(A - K @ C))) < 1.0  # the stabilising solution


def test_an_ill_conditioned_measurement_covariance_is_left_to_the_qz_route():
    A, C, Q, R, S = _system(4, 3, 0.8, seed=3)
    R_bad = np.diag([1.0, 1.0, 1e-12])
    assert riccati.doubling_gain(A, C, Q, R_bad, S) is None
    K, Re, how = projection._innovation_form(A, C, Q, R_bad, S, doubling=True)
    K_qz, Re_qz, how_qz = projection._innovation_form(A, C, Q, R_bad, S, doubling=False)
    assert how == how_qz == "steady-state Kalman gain (DARE)"
    np.testing.assert_array_equal(K, K_qz)
    np.testing.assert_array_equal(Re, Re_qz)


def test_no_stabilising_solution_keeps_the_fallback_of_before():
    # an unstable mode the output does not see: no stabilising solution exists; doubling gives up (A_k does not
    # vanish), the QZ route fails as before, and the model keeps K = 0 with the warning
    A, C = np.diag([1.2, 0.5]), np.array([[0.0, 1.0]])
    Q, R, S = np.eye(2), np.eye(1), np.zeros((2, 1))
    assert riccati.doubling_gain(A, C, Q, R, S) is None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        K, _Re, how = projection._innovation_form(A, C, Q, R, S, doubling=True)
    with warnings.catch_warnings(record=True):
        warnings.simplefilter("always")
        K_qz, _Re, how_qz = projection._innovation_form(A, C, Q, R, S, doubling=False)
    assert how == how_qz == "Riccati equation failed: K = 0"
    np.testing.assert_array_equal(K, K_qz)
    assert np.all(K == 0) and any("Kalman gain could not be computed" in str(w.message) for w in caught)
    assert not any(issubclass(w.category, RuntimeWarning) for w in caught)  # doubling's overflow stays silent
