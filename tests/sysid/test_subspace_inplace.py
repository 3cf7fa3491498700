"""The candidate orders' ``B, D`` systems built in Fortran order and factored where they lie: the same numbers, bit
for bit, as the C-ordered systems factored on a copy.

References: SciPy's ``cho_factor``/``cho_solve`` (LAPACK ``potrf``/``potrs``) on a copy of the system, NumPy's
``linalg.norm(·, 1)`` and ``linalg.solve``; the additions are reordered only where IEEE 754 addition commutes
(``a + b == b + a`` exactly), which the first test checks against the former sum written out.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid.exceptions import ExcitationError
from stimsteer.sysid._lapack_nogil import one_norm
from stimsteer.sysid.subspace import gram, markov, projection, riccati


def _projection(past, future, m, p, T=3000, seed=0):  # T = 3000 samples: a full-rank covariance (chosen)
    rng = np.random.default_rng(seed)
    L = gram._Layout(past, future, m, p)
    z = rng.standard_normal((T, L.nz))
    return projection._Projection(z.T @ z / T, L, "n4sid"), rng


def _former_normal_equations(h, Q, S_uu, D_uu, target, n, m, weights):
    """The C-ordered system as :func:`markov.normal_equations_gemm` built it before (pattern term + projected term,
    then laid out in the unknowns' order)."""
    f, p, nc = h.shape
    M = markov._pattern_term(h, weights, n) + markov._projected_gemm(markov.projected_patterns(Q, h),
                                                                     D_uu.reshape(f, m, f, m))
    M = M.reshape(m, m, nc, nc).transpose(0, 2, 1, 3)
    out = np.empty((nc * m, nc * m))
    parts = ((slice(0, n), slice(0, n * m)), (slice(n, nc), slice(n * m, nc * m)))
    for r, rows in parts:
        for c, cols in parts:
            out[rows, cols].reshape(m, r.stop - r.start, m, c.stop - c.start)[...] = M[:, r, :, c]
    return out if nc > n else np.ascontiguousarray(M.reshape(nc * m, nc * m))


@pytest.mark.parametrize("feedthrough", [False, True])
# (past, future, m, p): chosen small for speed, with fewer and more inputs than outputs
@pytest.mark.parametrize("shape", [(4, 6, 2, 3), (2, 3, 4, 2), (3, 5, 3, 4)])
def test_fortran_ordered_equations_hold_the_former_numbers_bit_for_bit(feedthrough, shape):
    past, future, m, p = shape
    proj, rng = _projection(past, future, m, p)
    L = proj.layout
    (S_uu, S_yu), (Sc_uu, Sc_yu) = proj.future_cov, proj.given_past
    weights = markov._shift_weights(S_uu.reshape(L.f, m, L.f, m))
    for n in (1, 3):  # one state and several (chosen)
        A, C = 0.3 * rng.standard_normal((n, n)), rng.standard_normal((p, n))  # 0.3: a small, typically stable A
        Q = np.linalg.qr(proj.gamma(n))[0]
        h = markov.pattern_blocks(A, C, L.f, feedthrough)
        target = S_yu + Q @ (Q.T @ (Sc_yu - S_yu))
        M, _rhs = markov.normal_equations_gemm(h, Q, S_uu, Sc_uu - S_uu, target, n, m, feedthrough, weights)
        ref = _former_normal_equations(h, Q, S_uu, Sc_uu - S_uu, target, n, m, weights)
        assert M.flags.f_contiguous and np.array_equal(M, ref)


@pytest.mark.parametrize("settings", [(False, True), (True,), (False,)])
def test_candidate_b_d_equal_scipy_on_a_copy_bit_for_bit(settings):
    proj, rng = _projection(3, 5, 3, 4)  # sizes chosen for speed
    L = proj.layout
    n = 3  # chosen: several states
    gamma = proj.gamma(n)
    A, C = projection._a_c(gamma, L.p)
    Q = np.linalg.qr(gamma)[0]
    got = projection._b_d(proj, gamma, A, C, settings, Q)
    k = n * L.m
    full = max(settings)
    M, rhs = projection._normal_equations(proj, A, C, Q, full)
    F = sla.cho_factor(M.copy(), lower=True, check_finite=False)[0]  # SciPy on a copy
    for ft in settings:
        if ft or not full:
            theta = sla.cho_solve((F, True), rhs, check_finite=False)
        else:  # without the direct term: the leading block of the full system's factor
            theta = sla.cho_solve((F[:k, :k], True), rhs[:k], check_finite=False)
        B = theta[:k].reshape(n, L.m, order="F")
        assert np.array_equal(got[ft][0], B)
        if ft:
            assert np.array_equal(got[ft][1], theta[k:].reshape(L.p, L.m, order="F"))


def test_a_system_refused_after_its_factor_overwrote_it_is_solved_from_the_remade_one():
    # condition ~1e10: Cholesky succeeds, its condition estimate refuses it, the eigenvalues accept it; the
    # eigenvalue route must read the system remade, not the factor left in its place
    rng = np.random.default_rng(2)
    V = np.linalg.qr(rng.standard_normal((12, 12)))[0]
    M0 = np.asfortranarray((V * np.logspace(0, -10, 12)) @ V.T)  # eigenvalues 1 to 1e-10: condition 1e10
    rhs = rng.standard_normal(12)
    L = gram._Layout(2, 3, 2, 1)  # n m + p m = 12 unknowns for n = 5 with a direct term
    M = M0.copy(order="F")
    (B, D), F = projection._solve_b_d(M, rhs, 5, L, True, remake=lambda: M0.copy(order="F"))
    assert F is None and not np.array_equal(M, M0)  # factored in place, then refused
    theta = np.linalg.solve(0.5 * (M0 + M0.T), rhs)  # NumPy on the system itself
    assert np.array_equal(B, theta[:10].reshape(5, 2, order="F"))
    assert np.array_equal(D, theta[10:].reshape(1, 2, order="F"))
    singular = np.asfortranarray(np.outer(rhs, rhs))
    with pytest.raises(ExcitationError):
        projection._solve_b_d(singular.copy(order="F"), rhs, 5, L, True, remake=lambda: singular.copy(order="F"))


def test_gil_free_calls_equal_scipys_wrappers_bit_for_bit():
    # reference: SciPy's f2py wrappers of the same LAPACK routines (dpotrf, dpocon, dpotrs via cho_solve, dlange)
    from stimsteer.sysid.subspace import _gil_free

    rng = np.random.default_rng(3)
    a = rng.standard_normal((60, 60))
    M = np.asfortranarray(a @ a.T + 60 * np.eye(60))  # + 60 I: positive definite and well conditioned (chosen)
    b = rng.standard_normal(60)
    ref = sla.cho_factor(M, lower=True, check_finite=False)[0]
    F = M.copy(order="F")
    assert _gil_free.potrf(F) == 0 and np.array_equal(np.tril(F), np.tril(ref))
    assert np.array_equal(np.triu(F, 1), np.triu(M, 1))  # the upper triangle is kept, as cho_factor's
    for k in (60, 25):  # the whole factor and a leading block read where it lies (leading dimension 60)
        assert one_norm(M[:k, :k]) == sla.lapack.dlange("1", M[:k, :k])
        # 7.0: any one-norm given to both (the estimate is a function of it; exact: the same dpocon)
        assert _gil_free.pocon(F[:k, :k], 7.0) == sla.lapack.dpocon(ref[:k, :k], 7.0, uplo="L")[0]
        assert np.array_equal(_gil_free.potrs(F[:k, :k], b[:k]),
                              sla.cho_solve((ref[:k, :k], True), b[:k], check_finite=False))
    assert _gil_free.potrf(np.asfortranarray(-M)) > 0  # not positive definite: LAPACK's info
    with pytest.raises(ValueError):
        _gil_free.potrf(np.ascontiguousarray(M[:, :30]).T.copy())  # not column-major
