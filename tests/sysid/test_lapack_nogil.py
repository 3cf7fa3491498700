"""The GIL-free triangular-pentagonal QR behind the compressed Hankel build (``sysid/_lapack_nogil.py``)."""

import threading
import time

import numpy as np
import pytest
from scipy.linalg import lapack

from stimsteer.sysid._lapack_nogil import one_norm, tpqrt_inplace, tpqrt_nogil_available


@pytest.fixture
def rng():
    return np.random.default_rng(7)


@pytest.mark.parametrize("k, n, nb", [(50, 12, 5), (7, 12, 12), (300, 40, 40)])
def test_a_full_block_gives_the_same_factor_as_scipys_wrapper(rng, k, n, nb):
    R0 = np.asfortranarray(np.triu(rng.standard_normal((n, n))))
    B = np.asfortranarray(rng.standard_normal((k, n)))
    expected = lapack.dtpqrt(0, nb, R0.copy(order="F"), B.copy(order="F"))[0]
    got = tpqrt_inplace(R0.copy(order="F"), B.copy(order="F"), 0, nb)
    np.testing.assert_allclose(np.triu(got), np.triu(expected), rtol=0, atol=1e-12 * np.abs(expected).max())
    # and it is the factor of the stacked rows: RᵀR + BᵀB (the definition of the update)
    G = R0.T @ R0 + B.T @ B
    np.testing.assert_allclose(np.triu(got).T @ np.triu(got), G, atol=1e-12 * np.abs(G).max())


def test_a_triangular_block_merges_two_factors(rng):
    n = 30
    R1, R2 = (np.asfortranarray(np.triu(rng.standard_normal((n, n)))) for _ in range(2))
    got = np.triu(tpqrt_inplace(R1.copy(order="F"), R2.copy(order="F"), n, 8))
    G = R1.T @ R1 + R2.T @ R2
    np.testing.assert_allclose(got.T @ got, G, atol=1e-12 * np.abs(G).max())


def test_arrays_in_c_order_are_refused(rng):
    with pytest.raises(ValueError, match="Fortran"):
        tpqrt_inplace(np.zeros((3, 3)), np.ones((4, 3)), 0, 3)


def test_the_gil_is_released_while_lapack_runs(rng):
    """A Python thread keeps running beside a long call: the largest pause between its steps is a small part of
    the call (with the GIL held it would be the whole call). Common practice, no source."""
    assert tpqrt_nogil_available()
    n, k = 400, 6000
    R = np.zeros((n, n), order="F")
    B = np.asfortranarray(rng.standard_normal((k, n)))
    started, span = threading.Event(), {}

    def work():
        started.set()
        t0 = time.perf_counter()
        tpqrt_inplace(R, B, 0, 64)
        span["t"] = (t0, time.perf_counter())

    worker = threading.Thread(target=work)
    stamps = []
    worker.start()
    started.wait()
    while worker.is_alive():
        stamps.append(time.perf_counter())
    worker.join()
    t0, t1 = span["t"]
    inside = np.array([t0] + [s for s in stamps if t0 < s < t1] + [t1])
    assert np.diff(inside).max() < 0.5 * (t1 - t0)


def test_eigh_lower_of_a_block_of_a_larger_array_is_numpys_eigh():
    from stimsteer.sysid._lapack_nogil import eigh_lower, trmm_lower_t

    rng = np.random.default_rng(8)
    n, ld = 40, 55
    X = rng.standard_normal((n, n))
    G = X @ X.T
    panel = rng.standard_normal((n, ld))  # C-ordered n × ld: a column-major ld × n panel, G in its first n rows
    panel[:, :n] = G
    tail = panel[:, n:].copy()
    d, V = eigh_lower(panel, n, ld)
    ref = np.linalg.eigh(G)[0]  # reference: NumPy's eigh (LAPACK syevd)
    np.testing.assert_allclose(d, ref, rtol=1e-12, atol=1e-12 * ref.max())
    np.testing.assert_allclose(V.T @ G @ V, np.diag(d), atol=1e-11 * ref.max())  # orthonormal eigenvectors
    np.testing.assert_array_equal(panel[:, n:], tail)  # the rest of the panel untouched
    F = np.asfortranarray(rng.standard_normal((ld, ld)))
    B = np.asfortranarray(rng.standard_normal((n, 7)))
    expected = np.tril(F[:n, :n]).T @ B  # only the lower triangle of the block is read
    np.testing.assert_allclose(trmm_lower_t(F, n, ld, B), expected, rtol=1e-12, atol=1e-12)
    with pytest.raises(ValueError, match="leading dimension"):
        eigh_lower(np.zeros((3, 3)), 4, 4)
    with pytest.raises(ValueError, match="Fortran-ordered"):
        trmm_lower_t(F, n, ld, np.zeros((n, 2)))


def _layouts(M: np.ndarray):
    """``M`` (C-ordered) as it may lie: C- and Fortran-ordered, leading blocks of both, a strided view."""
    F = np.asfortranarray(M)
    k = M.shape[0] // 2 + 1
    return {"C": M, "Fortran": F, "C block": M[:k, :k + 3], "Fortran block": F[:k, :k + 3],
            "strided": M[::2, ::3]}


@pytest.mark.parametrize("shape", [(1, 5), (5, 1), (37, 37), (130, 200), (300, 90)])
def test_one_norm_is_numpys_matrix_one_norm_in_every_layout(rng, shape):
    # reference: NumPy's np.linalg.norm(·, 1), the largest absolute column sum (NumPy docs, numpy.linalg.norm);
    # columns of unequal scale so that the largest sum is one column's; rel 1e-13: the author's margin for two
    # summation orders (LAPACK's row order, NumPy's pairwise sums), whose sums of 300 terms differ by ~1e-16
    M = rng.standard_normal(shape) * np.logspace(0, 3, shape[1])
    for name, view in _layouts(M).items():
        assert one_norm(view) == pytest.approx(np.linalg.norm(view, 1), rel=1e-13), name
    assert one_norm(np.zeros((0, 4))) == 0.0


def test_one_norm_is_the_same_number_however_the_matrix_lies(rng):
    # each column summed in row order in every layout (LAPACK dlange "1" and "I"): exactly equal, as SciPy's wrapper
    M = rng.standard_normal((61, 61))  # arbitrary size (chosen)
    ref = lapack.dlange("1", np.asfortranarray(M))
    views = _layouts(M)
    assert one_norm(views["C"]) == one_norm(views["Fortran"]) == ref
    assert one_norm(views["C block"]) == one_norm(views["Fortran block"]) == lapack.dlange("1", views["C block"])


def test_one_norm_makes_no_temporary_of_the_matrix(rng):
    # the Gram route's former row blocks, each a new array, made the matrix's size in new pages per norm (their first
    # touch is what costs: _lapack_nogil.one_norm); tracemalloc sees NumPy's data buffers (NumPy docs, "Memory
    # management": NumPy reports its allocations to tracemalloc)
    import tracemalloc

    M = rng.standard_normal((1024, 2000))
    for view in (M, np.asfortranarray(M), M[:, :1500]):
        tracemalloc.start()
        try:
            one_norm(view)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
        assert peak < 64 * 1024  # LAPACK's n-vector of row sums (16 kB) at most; the matrix: 16 MB


def test_one_norm_refuses_what_is_not_a_float64_matrix():
    with pytest.raises(ValueError, match="2-D float64"):
        one_norm(np.ones((3, 3), dtype=np.float32))
    with pytest.raises(ValueError, match="2-D float64"):
        one_norm(np.ones(3))
