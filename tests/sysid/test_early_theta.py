"""The projection predictor's closed form from the total's factor, GIL-free, computed beside the folds
(``datadriven._early_theta``), with the plan gaps from it, against ``kkt._projection_closed_form`` (SciPy's f2py
LAPACK ``trcon``/``trtrs``, the same routines: the reference, bit for bit), and the predictor fitted with and
without it (an internal equivalence: the fit of before, bit for bit)."""

from __future__ import annotations

import threading

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid.datadriven import _early_theta as et
from stimsteer.sysid.datadriven import _hankel_folds as hf
from stimsteer.sysid.datadriven import gram as gr
from stimsteer.sysid.datadriven import kkt
from stimsteer.sysid.datadriven.hankel_predictor import HankelBlocks, HankelPredictor


# (m, p, past, N): chosen for speed, one input and several; n = 150 and 133 rows
@pytest.mark.parametrize("sizes", [(1, 2, 30, 20), (3, 4, 12, 7)])
def test_theta_from_the_factor_equals_the_closed_form_bit_for_bit(sizes):
    m, p, past, N = sizes
    n = (m + p) * (past + N)
    X = np.random.default_rng(n).standard_normal((n, n + 50))  # 50 more columns than rows: X Xᵀ positive definite
    F = np.asfortranarray(sla.cholesky(X @ X.T, lower=True))
    blocks = HankelBlocks.from_matrix(np.ascontiguousarray(F), m, p, past, N, True)
    # limit 1e8: the package's GRAM_CONDITION_LIMIT (gram.py), met by these well-conditioned random factors
    n_b, theta = kkt._projection_closed_form(blocks, 1e8, make_projector=False)
    got = et.projection_theta(F, n_b, 1e8)
    np.testing.assert_array_equal(got, theta)
    assert got.flags.c_contiguous == theta.flags.c_contiguous
    # limit 1.0: every condition number is >= 1 (common practice, no source), so a random D1 is refused
    assert et.projection_theta(F, n_b, 1.0) is None  # refused as the closed form refuses it
    assert kkt._projection_closed_form(blocks, 1.0, make_projector=False) == (None, None)


def test_the_predictor_fitted_with_theta_beside_the_folds_as_without(monkeypatch):
    from tests.sysid.test_hankel_folds import _session

    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)  # 1 row: the small test session takes the large fits' routes
    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)
    calls = []
    real = et.solve_theta_columns
    monkeypatch.setattr(et, "solve_theta_columns", lambda *a: calls.append(1) or real(*a))
    gaps = HankelPredictor._gaps_from_factor
    monkeypatch.setattr(HankelPredictor, "_gaps_from_factor", lambda *a, **k: calls.append(2) or gaps(*a, **k))
    unscaled, threads = HankelPredictor._unscaled, []
    monkeypatch.setattr(HankelPredictor, "_unscaled",
                        lambda *a: threads.append(threading.current_thread().name) or unscaled(*a))
    new = HankelPredictor(past_steps=5, horizon_steps=4).fit(_session())  # past 5, horizon 4: chosen for speed
    # 8 predicted rows: one piece of Θ's columns (cuts at multiples of 16), the closed form's numbers bit for bit
    assert calls == [1, 2] and new._theta_early is None and new._gaps_early is None
    assert new._map_early is None and new._scale_early is None
    # the map in the channels' units made once, beside the folds (a worker), not again after them
    assert len(threads) == 1 and threads[0].startswith("stimsteer-hankel-folds")
    monkeypatch.setattr(et, "available", lambda: False)
    old = HankelPredictor(past_steps=5, horizon_steps=4).fit(_session())
    assert calls == [1, 2] and threads[1:] == [threading.main_thread().name]
    assert new.data_scale_ == old.data_scale_
    np.testing.assert_array_equal(new.cv_table_.to_numpy(float), old.cv_table_.to_numpy(float))  # plan gaps too
    np.testing.assert_array_equal(new._map_cache, old._map_cache)
    rng = np.random.default_rng(0)
    # 4 windows of past 5 (1 input, 2 outputs) and horizon 4: the fitted sizes of _session
    windows = rng.standard_normal((4, 5, 1)), rng.standard_normal((4, 5, 2)), rng.standard_normal((4, 4, 1))
    np.testing.assert_array_equal(new.predict_many(*windows), old.predict_many(*windows))
    assert new.lambda_g_ == old.lambda_g_


def test_a_group_of_extra_tasks_runs_side_by_side_and_the_next_waits_for_all():
    # an internal check of _hankel_folds._chain: the tasks of a tuple are on both workers at once (each waits
    # until the other has begun), and the task after the group begins once both have ended
    from stimsteer.sysid.datadriven._task_pool import TaskPool

    begun = [threading.Event(), threading.Event()]
    log = []

    def member(i):
        def run():
            begun[i].set()
            assert begun[1 - i].wait(10), "the group's tasks did not run side by side"
            log.append(f"member {i}")
        return run
    pool, done = TaskPool(2, 2, "test-chain"), []
    hf._chain(pool, [lambda: log.append("first"), (member(0), member(1)), lambda: log.append("last")], done)
    pool.close()
    for future in done:
        future.result()
    assert log[0] == "first" and sorted(log[1:3]) == ["member 0", "member 1"] and log[3:] == ["last"]


def _run_theta_tasks(F, n_b: int, limit: float):
    """The theta tasks of a fit (``theta_task``) run as the fit runs them: ``_hankel_folds._chain`` on a task pool
    of two workers. Returns the owner they set ``_theta_early`` on."""
    from stimsteer.sysid.datadriven._task_pool import TaskPool

    class Total:
        _factor = F

    class Owner:
        pass
    owner = Owner()
    pool, done = TaskPool(2, 2, "test-theta"), []
    hf._chain(pool, et.theta_task(owner, Total(), n_b, limit), done)
    pool.close()
    for future in done:
        future.result()
    return owner


def test_theta_in_pieces_beside_the_folds_is_the_closed_form_to_rounding(monkeypatch):
    # reference: SciPy's solve_triangular (LAPACK trtrs), Θ = Yf1 D1⁻¹ with D1 the factor's leading block
    n, n_b = 160, 100  # 60 predicted rows: pieces of 32 and 28 columns (cut at a multiple of 16; sizes chosen)
    X = np.random.default_rng(5).standard_normal((n, n + 40))
    F = np.asfortranarray(sla.cholesky(X @ X.T, lower=True))
    pieces, real = [], et.solve_theta_columns
    monkeypatch.setattr(et, "solve_theta_columns", lambda F_, rhs, a, b: pieces.append((a, b)) or real(F_, rhs, a, b))
    theta = _run_theta_tasks(F, n_b, 1e8)._theta_early
    assert sorted(pieces) == [(0, 32), (32, 60)] == et.theta_pieces(60, et.THETA_PIECES)
    ref = sla.solve_triangular(F[:n_b, :n_b], F[n_b:, :n_b].T, lower=True, trans="T").T
    # 1e-12 / 1e-14: the author's margins over the pieces' rounding (measured: 4e-17 to 6e-17 on entries of order
    # 1 at the benchmark's 1,000 columns, benchmarks/README.md, twelfth session)
    np.testing.assert_allclose(theta, ref, rtol=1e-12, atol=1e-14 * np.abs(ref).max())
    # one solve of every column (projection_theta, the closed form's numbers): the same to rounding
    np.testing.assert_allclose(theta, et.projection_theta(F, n_b, 1e8), rtol=0, atol=1e-14 * np.abs(ref).max())
    # limit 1.0: every condition number is >= 1 (common practice, no source), so D1 is refused: no Θ
    assert _run_theta_tasks(F, n_b, 1.0)._theta_early is None
