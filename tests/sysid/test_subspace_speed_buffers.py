"""The subspace fit's reused buffers (the two-pipeline factor route of ``prepare._factor_route``): the Gram assembled
into a given buffer, the SVD computed in a given workspace with the GIL released, and the tail of a buffer handed
back to the system must change no number.

References: NumPy's ``numpy.linalg.svd`` and SciPy's ``scipy.linalg.qr`` (outside libraries: the calls the
decomposition made before, whose numbers the workspace route must give bit for bit); Linux ``madvise(2)``
(``MADV_DONTNEED`` on private anonymous memory: the pages read back as zeros and leave the resident set); the
package's own ``gram._gram_from_sums`` for the in-buffer Gram (an internal equivalence).
"""

from __future__ import annotations

import sys
import threading

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid._lagged import blas_threads
from stimsteer.sysid.subspace import SubspaceId, gram, prepare
from stimsteer.sysid._pages import release_tail
from stimsteer.sysid.subspace._left_svd import left_singular_pairs, work_size

from tests.sysid.test_subspace_factor import _session  # the simulated three-state session of the factor tests


def _before(mat):
    """The decomposition's calls before the workspace route (SciPy's QR, then NumPy's SVD)."""
    R = sla.qr(mat.T, mode="r", check_finite=False)[0][:mat.shape[0]].T
    U, s, _ = np.linalg.svd(R, full_matrices=False)
    return U, s


# shapes chosen: tiny, mid-sized and larger, none a multiple of another; a workspace absent, too small (10 values)
# and larger than work_size (999 spare values)
@pytest.mark.parametrize("shape", [(7, 19), (120, 333), (300, 700)])
@pytest.mark.parametrize("work", ["none", "small", "large"])
def test_left_singular_pairs_in_a_workspace_are_numpy_and_scipys_bit_for_bit(shape, work):
    rng = np.random.default_rng(5)
    full = rng.standard_normal((shape[0], shape[1] + 13))
    mat = full[:, 3:3 + shape[1]]  # a strided block, as the projection's rows are (13 spare columns, offset 3)
    ws = {"none": None, "small": np.full(10, np.nan), "large": np.full(work_size(*shape) + 999, np.nan)}[work]
    with blas_threads(1):  # (the fit decomposes on one BLAS thread)
        U, s = left_singular_pairs(mat, ws)
        U0, s0 = _before(mat)
    assert U.flags.c_contiguous
    np.testing.assert_array_equal(s, s0)
    np.testing.assert_array_equal(U, U0)


@pytest.mark.parametrize("past, future, rows", [(4, 3, None), (4, 3, (0, 20)), (60, 20, None), (60, 20, (0, 300))])
def test_the_gram_assembled_into_a_buffer_is_the_assembled_gram_bit_for_bit(past, future, rows):
    session = _session(noise=0.3, T=3000)
    L = gram._Layout(past, future, 2, 4)  # 42 and 480 rows: lagged vectors short and long (> _SMALL_ASSEMBLY / c)
    (acc,) = gram._hankel_sums(session, [session.segments(min_length=L.width)], L)
    order = L.factor_order()
    buffer = np.full(L.nz * L.nz + 5, np.nan)  # 5 more than the Gram: only its front used; NaN shows any unwritten
    got = gram._gram_from_sums(acc, L, order, rows, out=buffer)
    assert np.shares_memory(got, buffer)
    np.testing.assert_array_equal(got, gram._gram_from_sums(acc, L, order, rows))


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="madvise(MADV_DONTNEED) is Linux's")
def test_a_released_tail_reads_as_zeros_and_the_head_is_kept():
    buffer = np.empty(4 << 20 >> 3)  # 4 MB: above glibc's mmap threshold (from memory), so its own anonymous pages
    buffer[:] = 1.5
    released = release_tail(buffer, 1000)  # keep 1000 values (8,000 bytes, not a page multiple)
    # every whole page after the first 8,000 bytes: 4 MB less at most two partial pages, so >= 3 MB by a wide margin
    assert released >= 3 << 20
    zero = np.flatnonzero(buffer == 0.0)  # whole pages: one run, after the kept head; the rest untouched
    assert zero.size * 8 == released and zero[0] >= 1000 and zero[-1] - zero[0] + 1 == zero.size
    assert np.all(np.delete(buffer, zero) == 1.5)


@pytest.mark.parametrize("weighting", ["n4sid", "cva"])
def test_the_two_pipelines_fit_what_the_pipelines_one_after_the_other_fit(monkeypatch, weighting):
    """The factor route with its pipelines side by side against the same route with the fitting part's pipeline
    run to its end first (its thread joined before all data's starts): the same model and table, bit for bit."""
    session = _session(noise=0.3, seed=4)  # as in test_subspace_ahead (chosen)
    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)  # 0: the factor route at this small size
    ref_kw = dict(past_steps=6, future_steps=5, weighting=weighting)
    got = SubspaceId(**ref_kw).fit(session)
    pipeline, project, ended = prepare._fit_pipeline, prepare._projection, threading.Event()

    def fit_first(*a):
        try:
            return pipeline(*a)
        finally:
            ended.set()

    def after_fit(*a):  # all data's projection (this thread's) only once the fitting part's pipeline has ended
        if threading.current_thread() is threading.main_thread():
            assert ended.wait(60)  # 60 s: chosen far beyond the pipeline's time, only against a hang
        return project(*a)

    monkeypatch.setattr(prepare, "_fit_pipeline", fit_first)
    monkeypatch.setattr(prepare, "_projection", after_fit)
    ref = SubspaceId(**ref_kw).fit(session)
    assert got.order_ == ref.order_ and got.order_table_.equals(ref.order_table_)
    for name in ("A", "B", "C", "D", "K", "innovation_cov"):
        np.testing.assert_array_equal(getattr(got.model_, name), getattr(ref.model_, name))
