"""The quick routes of the small fits give the numbers of the routes they stand in for.

Each check compares a faster route with the general one it replaces (or a plain loop written here from the
definition): the lagged Gram of short lagged vectors against the strided block copies, the direct LAPACK calls of
the structure search against SciPy's wrappers, the ARX recursion against the model equation step by step, the
block-Toeplitz builder against its definition, the cached prediction maps against fresh ones, and the session
file's kept validity mask against a window read.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid import Session, StateSpaceModel
from stimsteer.sysid import _lagged, arx_cv
from stimsteer.sysid.arx_statespace import arx_recursion
from stimsteer.sysid.exceptions import FileFormatError
from stimsteer.sysid.io import open_session_file
from stimsteer.sysid.io import save_session
from stimsteer.sysid.statespace import markov_toeplitz


def _sums(rng, n_lags, c, n_windows=6):
    sums = _lagged._LagSums(c, n_lags)
    sums.n, sums.S, sums.X = 50, rng.standard_normal(c), rng.standard_normal((n_lags + 1, c, c))
    sums.windows = [((-1.0) ** k, rng.standard_normal((n_lags, c))) for k in range(n_windows)]
    return sums


@pytest.mark.parametrize("n_lags, c", [(0, 3), (1, 2), (6, 5)])
def test_short_lagged_gram_equals_the_strided_route_bit_for_bit(monkeypatch, n_lags, c):
    rng = np.random.default_rng(n_lags)
    sums = _sums(rng, n_lags, c)
    N = (n_lags + 1) * c
    cases = [(None, None, False), (rng.permutation(N).reshape(n_lags + 1, c), None, False),
             (np.arange(N).reshape(n_lags + 1, c)[::-1].copy(), (N // 3, N // 2 + 1), True)]
    quick = [_lagged._lagged_gram(sums, index, rows, avg) for index, rows, avg in cases]
    monkeypatch.setattr(_lagged, "_SMALL_ASSEMBLY", 0)  # every size through the strided block copies
    for (index, rows, avg), W in zip(cases, quick):
        assert np.array_equal(W, _lagged._lagged_gram(sums, index, rows, avg))
        assert W.flags.c_contiguous  # the layout too: later products round by the layout they are given


@pytest.mark.parametrize("small", [True, False])
@pytest.mark.parametrize("fortran", [False, True])
def test_lagged_gram_written_into_a_buffer_is_the_fresh_one_bit_for_bit(monkeypatch, small, fortran):
    # the same numbers and layout whether the Gram is a fresh array or the front of a buffer already used
    # (reference: the fresh array of the same function, an internal equivalence, bit for bit)
    if not small:
        monkeypatch.setattr(_lagged, "_SMALL_ASSEMBLY", 0)  # 0: the strided route even for these short vectors
    rng = np.random.default_rng(7)
    n_lags, c = 5, 4  # chosen for speed: 24 lagged coordinates
    sums = _sums(rng, n_lags, c)
    N = (n_lags + 1) * c
    index = rng.permutation(N).reshape(n_lags + 1, c)
    for rows in (None, (3, 17)):  # all rows, and a block not starting at 0 (any inner block)
        fresh = _lagged._lagged_gram(sums, index, rows, True, fortran)
        buffer = np.full(N * N + 5, np.nan)  # 5 more than the Gram: only its front used; NaN shows any unwritten
        got = _lagged._lagged_gram(sums, index, rows, True, fortran, out=buffer)
        assert np.array_equal(got, fresh) and np.shares_memory(got, buffer)
        assert got.flags.f_contiguous == fresh.flags.f_contiguous and got.flags.c_contiguous == fresh.flags.c_contiguous


def test_short_lagged_gram_is_the_gram_of_the_lagged_vectors():
    # the definition: w_k = [Z_k; Z_{k-1}; ...; Z_{k-L}] over the rows k of each piece, Gram = sum of w_k w_k^T
    rng = np.random.default_rng(2)
    session = Session(u=rng.standard_normal((90, 1)), y=rng.standard_normal((90, 2)), sample_rate_hz=100.0)
    L, pieces = 4, [(4, 40, 0), (50, 90, 0)]
    sums = _lagged._stream_lag_sums(session, pieces, 1, L)[0]
    Z = np.hstack([session.y, session.u])
    w = np.array([np.concatenate([Z[k - a] for a in range(L + 1)]) for a0, b0, _f in pieces for k in range(a0, b0)])
    np.testing.assert_allclose(_lagged._lagged_gram(sums), w.T @ w, rtol=1e-12, atol=1e-12)


def test_structure_search_lapack_calls_are_scipys_bit_for_bit():
    rng = np.random.default_rng(3)
    A = rng.standard_normal((9, 9))
    S = A @ A.T + 0.1 * np.eye(9)
    b = rng.standard_normal((9, 4))
    assert np.array_equal(arx_cv._cho_solve_small(S, b),
                          sla.cho_solve(sla.cho_factor(S, lower=True, check_finite=False), b, check_finite=False))
    L = np.tril(A) + 5 * np.eye(9)
    for order in ("F", "C"):
        Lo = np.asarray(L, order=order)
        for trans in (0, 1):
            assert np.array_equal(arx_cv._trsolve(Lo, b, trans),
                                  sla.solve_triangular(Lo, b, lower=True, trans=trans, check_finite=False))
    assert arx_cv._cho_solve_small(-S, b) is None  # no factor: the caller takes the eigen route


@pytest.mark.parametrize("na, nb, d", [(3, 2, 1), (0, 3, 0), (1, 1, 2)])
def test_arx_recursion_follows_the_model_equation(na, nb, d):
    rng = np.random.default_rng(na + 10 * nb + 100 * d)
    p, m, n, H = 2, 3, 4, 7
    L = max(na, d + nb - 1)
    A, B, c = 0.2 * rng.standard_normal((na, p, p)), rng.standard_normal((nb, p, m)), rng.standard_normal(p)
    up, yp, uf = rng.standard_normal((n, L, m)), rng.standard_normal((n, L, p)), rng.standard_normal((n, H, m))
    got = arx_recursion(A, B, d, L, up, yp, uf, c)
    # y_k = c + sum_i A_i y_{k-i} + sum_j B_j u_{k-d-j} (Ljung 1999, System Identification, eq. 4.7), one window
    # and one step at a time
    for w in range(n):
        u, y = np.concatenate([up[w], uf[w]]), np.concatenate([yp[w], np.zeros((H, p))])
        for k in range(L, L + H):
            y[k] = c + sum(A[i - 1] @ y[k - i] for i in range(1, na + 1)) + \
                sum(B[j] @ u[k - d - j] for j in range(nb))
        np.testing.assert_allclose(got[w], y[L:], rtol=1e-12, atol=1e-12)
    assert arx_recursion(A, B, d, L, up, yp, uf[:, :0], c).shape == (n, 0, p)


def test_markov_toeplitz_places_every_block_by_its_definition():
    rng = np.random.default_rng(5)
    h = rng.standard_normal((6, 2, 3))
    T = markov_toeplitz(h, 5)
    for i in range(5):
        for j in range(5):
            want = h[i - j] if j <= i else np.zeros((2, 3))
            assert np.array_equal(T[2 * i:2 * i + 2, 3 * j:3 * j + 3], want)


def test_predict_many_maps_follow_the_model_even_when_its_arrays_change_in_place():
    rng = np.random.default_rng(6)
    model = StateSpaceModel(A=0.5 * np.eye(2), B=rng.standard_normal((2, 1)), C=rng.standard_normal((1, 2)),
                            past_steps=3)
    up, yp, uf = rng.standard_normal((4, 3, 1)), rng.standard_normal((4, 3, 1)), rng.standard_normal((4, 5, 1))
    first = model.predict_many(up, yp, uf)
    np.testing.assert_allclose(first[1], model.predict(up[1], yp[1], uf[1]), rtol=1e-10, atol=1e-12)
    model.A.setflags(write=True)  # (read-only as made; a caller may still change them)
    model.A[0, 0] = 0.9  # the maps kept for this shape must not answer for the changed model
    again = model.predict_many(up, yp, uf)
    np.testing.assert_allclose(again[1], model.predict(up[1], yp[1], uf[1]), rtol=1e-10, atol=1e-12)
    assert not np.allclose(first, again)


def test_session_file_keeps_its_mask_and_still_rejects_a_bad_window(tmp_path):
    rng = np.random.default_rng(7)
    session = Session(u=rng.standard_normal((60, 1)), y=rng.standard_normal((60, 2)), sample_rate_hz=100.0)
    path = tmp_path / "s.h5"
    save_session(session, path)
    with h5py.File(path, "r+") as h:
        h["valid"][40] = 3  # a value that is neither 0 nor 1, late in the file
    f = open_session_file(path)
    try:
        u, y, mask = f.read(0, 30)
        assert mask.all() and np.array_equal(y, session.y[:30])
        with pytest.raises(FileFormatError, match="only 0 and 1"):
            f.read(35, 45)
    finally:
        f.close()
