"""The least-squares (SPC) predictor's strength grid on large Grams: one Cholesky factor per strength, against the
eigendecomposition route of before (an internal equivalence, not an outside source) and direct solves of the
normal equations (common practice, no source). Sizes are forced down by patching the threshold."""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid import Session
from stimsteer.sysid.datadriven import gram as gr
from stimsteer.sysid.datadriven import lsq
from stimsteer.sysid.datadriven.lsq import LsqPredictor


def _system(T=3000, noise=0.1, seed=0, n_trials=6):
    """A stable 3-state, 2-input, 3-output system in trials; measurement noise ``noise``."""
    rng = np.random.default_rng(seed)
    u = rng.standard_normal((T, 2))
    A, B = np.diag([0.8, 0.5, -0.3]), rng.standard_normal((3, 2))
    x, y = np.zeros(3), np.zeros((T, 3))
    for k in range(T):
        y[k] = x + noise * rng.standard_normal(3)
        x = A @ x + B @ u[k]
    edges = np.linspace(0, T, n_trials + 1).astype(int)
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=np.column_stack([edges[:-1], edges[1:]]))


@pytest.fixture(scope="module")
def noisy():
    return _system()


def _folds(session, m=2, p=3, past=4, horizon=6):
    pieces = [(0, 1000, 0), (1000, 2000, 1), (2000, 3000, 2)]
    folds, *_ = gr.collect_gram(session, pieces, 3, m, p, past, horizon)
    return folds, (m + p) * past + m * horizon


@pytest.mark.parametrize("workers", [1, 3])
def test_cholesky_grid_equals_the_eigen_route_and_direct_solves(noisy, workers):
    folds, n_b = _folds(noisy)
    total = gr.total_fold(folds)
    train, val = total.plus(folds[1], -1.0), folds[1]
    alphas = np.logspace(-8, 0, 9)
    w = np.linspace(0.5, 2.0, train.n_rows - n_b)
    got = lsq._cholesky_grid_errors(train, val, n_b, alphas, w, workers)
    np.testing.assert_allclose(got, gr.ridge_grid_errors(train, val, n_b, alphas, w), rtol=1e-10)
    Gt, Gv = train.gram, val.gram
    s = np.trace(Gt) / Gt.shape[0]
    for a, e in zip(alphas, got):
        theta = np.linalg.solve(Gt[:n_b, :n_b] + a * s * np.eye(n_b), Gt[:n_b, n_b:]).T
        R = Gv[n_b:, n_b:] - theta @ Gv[:n_b, n_b:] - Gv[n_b:, :n_b] @ theta.T + theta @ Gv[:n_b, :n_b] @ theta.T
        assert e == pytest.approx(float(np.sum(w ** 2 * np.diagonal(R))), rel=1e-10)
    if workers > 1:  # each strength on one thread as on one: the numbers do not depend on the worker count
        np.testing.assert_array_equal(got, lsq._cholesky_grid_errors(train, val, n_b, alphas, w, 1))


def test_cholesky_grid_without_a_validation_factor_gives_way_to_the_eigen_route(noisy):
    # a held-out fold with fewer windows than regressors: its G11 is singular, so no factor (the caller falls back)
    folds, n_b = _folds(noisy, past=30, horizon=30)
    tiny = gr.collect_gram(noisy, [(2000, 2100, 0)], 1, 2, 3, 30, 30)[0][0]
    train = gr.total_fold(folds)
    assert lsq._cholesky_grid_errors(train, tiny, n_b, np.logspace(-8, 0, 3), np.ones(train.n_rows - n_b)) is None


def test_fit_with_the_cholesky_grid_predicts_as_the_eigen_route(noisy, monkeypatch):
    P, N = 4, 6
    before = LsqPredictor(past_steps=P, horizon_steps=N).fit(noisy)  # 32 regressors: the eigen route
    monkeypatch.setattr(lsq, "_CHOLESKY_FROM", 0)
    monkeypatch.setattr(lsq, "_CHOLESKY_WORKERS", 1)  # whatever the machine's BLAS thread count
    calls = []
    real = lsq._cholesky_grid_errors
    monkeypatch.setattr(lsq, "_cholesky_grid_errors", lambda *a: calls.append(1) or real(*a))
    after = LsqPredictor(past_steps=P, horizon_steps=N).fit(noisy)
    assert calls and after.factor_route_ == "gram"
    assert after.alpha_ == before.alpha_
    np.testing.assert_allclose(after.cv_table_["validation_error"], before.cv_table_["validation_error"], rtol=1e-10)
    rng = np.random.default_rng(5)
    windows = rng.standard_normal((6, P, 2)), rng.standard_normal((6, P, 3)), rng.standard_normal((6, N, 2))
    a, b = before.predict_many(*windows), after.predict_many(*windows)
    assert np.abs(a - b).max() <= 1e-8 * np.abs(a).max()
