"""The cheap paths of subspace identification's per-order checks decide as the eigenvalue rules they replace.

Outside check: NumPy's ``linalg.solve`` and ``eigvalsh`` (LAPACK) on the same matrices. The largest |eigenvalue| of
a symmetric matrix lies between its largest diagonal entry (a Rayleigh quotient) and its Frobenius norm (Golub & Van
Loan 2013, Matrix Computations, 4th ed., sec. 2.3 and 8.1), the bounds the noise-free test uses. Condition numbers:
1e4 takes the Cholesky route (inside the module's 1e12 rule with its 1000x margin), 1e11 and 1e14 the eigenvalue
rule; the noise scales sit on both sides of the module's noise-free threshold.
"""

import numpy as np
import pytest

from stimsteer.sysid.subspace import projection as pj


def _spd(cond, n=30, seed=0):
    rng = np.random.default_rng(seed)
    Q = np.linalg.qr(rng.standard_normal((n, n)))[0]
    return (Q * np.logspace(0, -np.log10(cond), n)) @ Q.T


def test_well_conditioned_normal_equations_are_solved_by_cholesky():
    M, rhs = _spd(1e4), np.arange(30.0)
    np.testing.assert_allclose(pj._solve_excited(M, rhs), np.linalg.solve(M, rhs), rtol=1e-10)


@pytest.mark.parametrize("cond", [1e11, 1e14])
def test_ill_conditioned_or_indefinite_normal_equations_go_to_the_eigenvalue_rule(cond):
    assert pj._solve_excited(_spd(cond), np.ones(30)) is None
    assert pj._solve_excited(-_spd(10.0), np.ones(30)) is None  # not positive definite


@pytest.mark.parametrize("scale", [1e-3, 1e-13, 1e-16, 0.0])
def test_noise_free_decision_is_the_eigenvalue_rule(scale):
    rng = np.random.default_rng(1)
    X = rng.standard_normal((5, 3))
    Q, R, Sx = scale * np.eye(3), scale * (X.T @ X) / 5, scale * rng.standard_normal((3, 3)) * 0.1
    joint = np.block([[Q, Sx], [Sx.T, R]])
    expected = np.max(np.abs(np.linalg.eigvalsh(joint))) <= pj._NOISE_FREE  # the rule (definition)
    A, C = 0.5 * np.eye(3), np.eye(3)
    _K, _Re, how = pj._innovation_form(A, C, Q, R, Sx)
    assert (how == "noise-free residuals: K = 0") == expected
