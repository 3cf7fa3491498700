"""Infinite-horizon Gramians by doubling (``sysid/network/lyapunov.py``) against SciPy's solver and the series."""

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid.network import lyapunov as ly
from stimsteer.sysid.network.systems import minimal_realisation
from stimsteer.sysid.statespace import StateSpaceModel


def _stable(rng, n, radius, normal=False):
    A = rng.standard_normal((n, n))
    if normal:  # symmetric: its spectral norm is its spectral radius
        A = A + A.T
    return A * (radius / np.max(np.abs(np.linalg.eigvals(A))))


@pytest.mark.parametrize("radius", [0.5, 0.95, 0.999])
def test_the_doubled_sum_solves_the_lyapunov_equation_as_scipy_does(rng, monkeypatch, radius):
    # scipy.linalg.solve_discrete_lyapunov (reference library) on the same A and Q; the doubling route taken at
    # this size by lowering its threshold
    n = 60
    A, B = _stable(rng, n, radius), rng.standard_normal((n, 3))
    Q = B @ B.T
    reference = sla.solve_discrete_lyapunov(A, Q)
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    W = ly.stable_gramian(A, Q)
    np.testing.assert_array_equal(W, W.T)
    scale = np.abs(reference).max()
    # the author's margins: the two agree to 1e-9 of the largest entry at radius 0.999 (the equation's condition
    # grows as 1 / (1 - radius²)), and the doubled sum satisfies the equation to rounding
    assert np.abs(W - reference).max() <= 1e-9 * scale
    assert np.abs(A @ W @ A.T - W + Q).max() <= 1e-12 * scale


def test_the_doubled_sum_equals_the_series_it_sums(rng, monkeypatch):
    # W = Σ_k A^k Q (A^k)ᵀ, written out term by term until the terms vanish (the definition)
    n = 20
    A, B = _stable(rng, n, 0.8, normal=True), rng.standard_normal((n, 2))
    series, M = np.zeros((n, n)), np.eye(n)
    for _ in range(400):  # 0.8^400 = 1e-39
        series += M @ B @ B.T @ M.T
        M = A @ M
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    # the same sum grouped otherwise: rounding, the author's margins (entries of order 1-10)
    np.testing.assert_allclose(ly.stable_gramian(A, B @ B.T), series, rtol=1e-12, atol=1e-14)


def test_small_models_keep_scipys_numbers(rng):
    A, B = _stable(rng, 30, 0.9), rng.standard_normal((30, 2))
    np.testing.assert_array_equal(ly.stable_gramian(A, B @ B.T), sla.solve_discrete_lyapunov(A, B @ B.T))


def test_the_minimal_realisation_of_a_large_lag_realisation_keeps_its_impulse_response(rng):
    # a 6-state system padded to 600 states (above DOUBLING_STATES) with delay lines no channel sees: the balanced
    # truncation by doubled Gramians finds the 6 states and keeps the Markov parameters (Ho & Kalman 1966)
    n_min, pad = 6, 594
    A6, B6, C6 = _stable(rng, n_min, 0.9), rng.standard_normal((n_min, 2)), rng.standard_normal((3, n_min))
    shift = np.eye(pad, k=-1) * 0.5
    A = sla.block_diag(A6, shift)
    B = np.vstack([B6, np.zeros((pad, 2))])
    B[n_min, 0] = 1.0  # the delay line is driven by the first input but seen by no channel
    C = np.hstack([C6, np.zeros((3, pad))])
    model = StateSpaceModel(A=A, B=B, C=C, sample_rate_hz=1000.0)
    assert model.n_states >= ly.DOUBLING_STATES
    reduced, _hsv = minimal_realisation(model)
    assert reduced.n_states == n_min
    np.testing.assert_allclose(reduced.impulse_response(40), model.impulse_response(40), atol=1e-9)


@pytest.mark.parametrize("radius", [0.5, 0.999])
def test_the_pair_of_gramians_solves_both_equations_as_scipy_does(rng, monkeypatch, radius):
    # scipy.linalg.solve_discrete_lyapunov (reference library) for W = A W Aᵀ + Q and V = Aᵀ V A + R; the pair
    # shares the powers of A and forms each term's lower block triangle only (blocks of 7 rows here, so the
    # triangle has many blocks); below DOUBLING_STATES it is SciPy's two solutions exactly
    n = 60
    A, B, C = _stable(rng, n, radius), rng.standard_normal((n, 3)), rng.standard_normal((4, n))
    Q, R = B @ B.T, C.T @ C
    small = ly.stable_gramian_pair(A, Q, R)
    np.testing.assert_array_equal(small[0], sla.solve_discrete_lyapunov(A, Q))
    np.testing.assert_array_equal(small[1], sla.solve_discrete_lyapunov(A.T, R))
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    monkeypatch.setattr(ly._symmetric_product, "__defaults__", (7,))
    W, V = ly.stable_gramian_pair(A, Q, R)
    for G, ref, M, S in ((W, small[0], A, Q), (V, small[1], A.T, R)):
        np.testing.assert_array_equal(G, G.T)
        scale = np.abs(ref).max()
        # the author's margins, as for stable_gramian above; against stable_gramian itself: rounding (measured
        # 2.5e-16 and 6e-17 of the largest entry on the 2,297-state ridge ARX of the benchmarks)
        assert np.abs(G - ref).max() <= 1e-9 * scale
        assert np.abs(M @ G @ M.T - G + S).max() <= 1e-12 * scale
        assert np.abs(G - ly.stable_gramian(M, S)).max() <= 1e-13 * scale


def _rows_matrix(rng, n=40, zeros=True):
    """A matrix of unit rows (a shift: each copies the state four before it), zero rows (with ``zeros``) and four
    dense rows, as a lag realisation's ``A`` is (its coefficient rows dense)."""
    A = np.zeros((n, n))
    A[np.arange(4, n), np.arange(0, n - 4)] = 1.0  # unit rows: row i copies state i − 4
    if zeros:
        A[[12, 30]] = 0.0  # zero rows inside the shift
    A[:4] = rng.standard_normal((4, n)) * 0.1  # dense rows
    return A


def test_the_rows_form_multiplies_as_the_dense_matrix_does(rng):
    # reference: NumPy's dense products with the same matrix; the unit rows are copies (exact), the dense rows
    # products of the same length (rounding); its powers keep the form until half the rows are dense
    A = _rows_matrix(rng)
    M = ly._Rows.of(A)
    assert M is not None and M.dense.size == 4
    Y = rng.standard_normal((A.shape[0], 7))
    np.testing.assert_allclose(M.left(Y), A @ Y, rtol=1e-14, atol=1e-15)
    np.testing.assert_allclose(M.tleft(Y), A.T @ Y, rtol=1e-14, atol=1e-15)
    for A_, M_ in ((A, M), (_rows_matrix(rng, 500), None)):  # 500 rows: more than one block of the mirror
        M_ = ly._Rows.of(A_) if M_ is None else M_
        Y_ = rng.standard_normal((A_.shape[0], 7))
        G = Y_ @ Y_.T
        for transposed, ref in ((False, A_ @ G @ A_.T), (True, A_.T @ G @ A_)):
            term = M_.sandwich(G, transposed)
            np.testing.assert_array_equal(term, term.T)
            np.testing.assert_allclose(term, ref, rtol=1e-13, atol=1e-13 * np.abs(ref).max())
    for A in (A, _rows_matrix(rng, zeros=False)):
        P, dense, forms = ly._Rows.of(A), A.copy(), []
        for _ in range(4):
            P, dense = P.squared() if isinstance(P, ly._Rows) else P @ P, dense @ dense
            forms.append(isinstance(P, ly._Rows))
            got = P.left(np.eye(A.shape[0])) if forms[-1] else P
            np.testing.assert_allclose(got, dense, rtol=1e-13, atol=1e-13 * np.abs(dense).max())
    # without zero rows A^8 has 32 of 40 rows dense: a dense array from there on
    assert forms == [True, True, False, False]
    assert ly._Rows.of(rng.standard_normal((10, 10))) is None  # every row dense
    twice = np.zeros((3, 3))
    twice[1, 0] = twice[2, 0] = 1.0
    assert ly._Rows.of(twice) is None  # two unit rows copying one state


@pytest.mark.parametrize("companion", [False, True])
def test_the_doubled_pair_of_a_lag_realisation_is_scipys_solution(rng, monkeypatch, companion):
    # scipy.linalg.solve_discrete_lyapunov (reference library) for a realisation in the rows form (its powers
    # taken in that form for the first doubling steps, then densely), or a companion form (its transpose in the
    # rows form: the powers of Aᵀ doubled in that form, each sum's side swapped); the same sums as the dense route
    # to rounding
    A = _rows_matrix(rng, 80, zeros=False)
    while np.max(np.abs(np.linalg.eigvals(A))) > 0.97:  # the dense rows scaled down: the unit rows stay copies
        A[:4] *= 0.9
    A = np.ascontiguousarray(A.T) if companion else A
    B, C = rng.standard_normal((80, 2)), rng.standard_normal((3, 80))
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    assert (ly._Rows.of(A) is None) == companion and ly._Rows.of(A.T if companion else A) is not None
    calls = []
    squared = ly._Rows.squared
    monkeypatch.setattr(ly._Rows, "squared", lambda self: calls.append(1) or squared(self))
    W, V = ly.stable_gramian_pair(A, B @ B.T, C.T @ C)
    assert calls  # the rows form was taken
    for got, ref in ((W, sla.solve_discrete_lyapunov(A, B @ B.T)), (V, sla.solve_discrete_lyapunov(A.T, C.T @ C))):
        np.testing.assert_array_equal(got, got.T)
        assert np.abs(got - ref).max() <= 1e-10 * np.abs(ref).max()
    monkeypatch.setattr(ly._Rows, "of", classmethod(lambda cls, A: None))  # the dense route throughout
    W2, V2 = ly.stable_gramian_pair(A, B @ B.T, C.T @ C)
    # measured (the lag realisation): 1.1e-16 and 1.3e-16 of the largest entry (against SciPy above: 4.8e-15 and
    # 4.7e-15)
    assert np.abs(W - W2).max() <= 1e-13 * np.abs(W2).max() and np.abs(V - V2).max() <= 1e-13 * np.abs(V2).max()


def test_gramians_solved_together_are_each_the_gramian_solved_alone(rng, monkeypatch):
    # stable_gramians shares A's powers between the sums; each sum takes the same steps as alone (the same numbers,
    # bit for bit), and each solves its own equation as SciPy does (reference library; margins as above)
    n = 40
    A, B = _stable(rng, n, 0.95), rng.standard_normal((n, 3))
    Qs = [np.outer(B[:, j], B[:, j]) for j in range(3)] + [B @ B.T]
    monkeypatch.setattr(ly, "DOUBLING_STATES", 1)
    together = ly.stable_gramians(A, Qs)
    for Q, W in zip(Qs, together):
        np.testing.assert_array_equal(W, ly.stable_gramian(A, Q))
        reference = sla.solve_discrete_lyapunov(A, Q)
        assert np.abs(W - reference).max() <= 1e-9 * np.abs(reference).max()


def test_a_models_gramians_are_solved_once_and_kept_read_only(rng, monkeypatch):
    # stimsteer network asks for the all-site Gramian in two reports and for each site's in the site sets: each is
    # solved once per model (counted here), the kept arrays cannot be changed by a caller, and every report gives
    # what it gave when each solved its own (SciPy's solver on the same A and B: reference library)
    import importlib

    ctl = importlib.import_module("stimsteer.sysid.network.controllability")  # the module (the package exports
    outputs = importlib.import_module("stimsteer.sysid.network.outputs")  # functions of the same names)

    n = 12
    model = StateSpaceModel(A=_stable(rng, n, 0.9), B=rng.standard_normal((n, 3)), C=rng.standard_normal((4, n)))
    solved = []
    real = ly.stable_gramians

    def counting(A, Qs):
        solved.append(len(Qs))
        return real(A, Qs)

    monkeypatch.setattr(ctl, "stable_gramians", counting)
    report = ctl.controllability(model)
    out = outputs.output_controllability(model)
    singles = outputs.site_output_gramians(model)
    again = [outputs.output_gramian(model, sites=[j]) for j in range(3)]
    assert solved == [1, 3]  # the all-site Gramian once, the three sites' together once, nothing after
    A, B, C = np.asarray(model.A), np.asarray(model.B), np.asarray(model.C)
    W = sla.solve_discrete_lyapunov(A, B @ B.T)  # margins below: the author's (two solvers' rounding, radius 0.9)
    np.testing.assert_allclose(report.gramian, 0.5 * (W + W.T), rtol=1e-10, atol=1e-12 * np.abs(W).max())
    np.testing.assert_allclose(out.gramian, C @ W @ C.T, rtol=1e-10, atol=1e-12 * np.abs(C @ W @ C.T).max())
    for j in range(3):
        Wj = sla.solve_discrete_lyapunov(A, np.outer(B[:, j], B[:, j]))
        np.testing.assert_allclose(singles[j], C @ Wj @ C.T, rtol=1e-9, atol=1e-12 * np.abs(C @ Wj @ C.T).max())
        np.testing.assert_array_equal(again[j], singles[j])
    kept = ctl.model_gramians(model, [range(3)], None)[0]
    with pytest.raises(ValueError):
        kept[0, 0] = 1.0
    K = ctl.model_reach(model)
    assert K is ctl.model_reach(model) and not K.flags.writeable
    np.testing.assert_array_equal(K, ctl._reach(A, B, n))
