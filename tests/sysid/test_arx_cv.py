"""Ridge ARX cross-validation from one set of moments: every structure and strength by Cholesky factors of a shared
core, equal to the eigendecomposition route structure by structure; the eigen fallback where no factor exists.

The reference here is the earlier eigendecomposition route, kept in the package as the fallback (an internal
equivalence, not an outside source); block Cholesky updates as in Golub & Van Loan (2013), Matrix Computations,
4th ed., section 4.2. The ridge fits themselves are checked against scikit-learn in the reference tests."""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid import Session
from stimsteer.sysid import arx_cv
from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.arx_regression import _Problem, _ridge_path
from stimsteer.sysid.arx_structure import select_structure, structure_candidates


def _session(T=3000, noise=0.2, seed=0, n_trials=5, collinear=False):
    rng = np.random.default_rng(seed)
    u = rng.standard_normal((T, 2))
    if collinear:  # a second input that is a copy of the first: the Gram is singular
        u[:, 1] = u[:, 0]
    y = np.zeros((T, 3))
    A = np.array([[0.6, 0.1, 0.0], [0.0, 0.5, 0.2], [0.1, 0.0, -0.4]])
    B = rng.standard_normal((3, 2))
    for k in range(2, T):
        y[k] = A @ y[k - 1] + B @ u[k - 2] + noise * rng.standard_normal(3)
    edges = np.linspace(0, T, n_trials + 1).astype(int)
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=np.column_stack([edges[:-1], edges[1:]]))


def _eigen_reference(prob, folds, total, alphas):
    """The per-structure eigendecomposition route (the implementation before the shared Cholesky factors)."""
    out = np.full((len(alphas), len(folds)), np.nan)
    for f, held in enumerate(folds):
        train = total.minus(held)
        Cxx, Cxy, _Cyy, _mu = prob.centred(train)
        n = train.n
        scale = np.sqrt(np.clip(np.diag(Cxx), 0.0, None) / n)
        scale[scale == 0] = 1.0
        betas, _ = _ridge_path(Cxx / (n * np.outer(scale, scale)), Cxy / (n * scale[:, None]), alphas, route="eigh")
        out[:, f] = prob.validation_errors([b / scale[:, None] for b in betas], train, held)
    return out


def _moments(est, session, candidates):
    from stimsteer.sysid.arx_structure import _longest

    n_lags = max(_longest(c) for c in candidates)
    probe = est._validated(session, max(candidates, key=_longest), n_lags)
    folds, total, _k, _scheme, _shift = est._accumulate(session, probe)
    probs = [_Problem(probe.p, probe.m, *c, probe.fit_intercept, n_lags) for c in candidates]
    return probs, folds, total


@pytest.mark.parametrize("alphas", [np.logspace(-8, 0, 9), np.array([0.0, 1e-3, 1.0])])
def test_shared_core_errors_equal_the_eigen_route_for_every_structure(alphas):
    # alphas with 0: least squares, below the rounding level of R, where the eigen route is taken instead
    session = _session()
    est = RidgeArx(output_lags="auto", input_lags="auto", delay_samples="auto", lag_grid=(1, 2, 4),
                   delay_grid=(0, 1, 2))
    candidates, _ = structure_candidates(est)
    probs, folds, total = _moments(est, session, candidates)
    got = arx_cv.cv_errors(probs, folds, total, alphas)
    for prob, errors in zip(probs, got):
        ref = _eigen_reference(prob, folds, total, alphas)
        np.testing.assert_allclose(errors, ref, rtol=1e-9, atol=1e-14)


def test_structure_search_and_cv_need_no_eigenvectors(monkeypatch):
    # The old route made one eigendecomposition (with eigenvectors) per structure and fold, and per fold again for
    # the chosen structure: 28 structures x 5 folds + 5 + 1 here. Now: Cholesky factors for every structure and
    # fold; one eigendecomposition at most, of the final fit (below 512 regressors, as before).
    calls = []
    real = np.linalg.eigh
    monkeypatch.setattr(np.linalg, "eigh", lambda *a, **k: calls.append(a[0].shape) or real(*a, **k))
    session = _session()
    est = RidgeArx(output_lags="auto", input_lags=(2), delay_samples="auto", lag_grid=(1, 2, 3, 4, 6, 8, 10),
                   delay_grid=(0, 1, 2, 3)).fit(session)
    assert est.delay_samples_ == 2 and est.output_lags_ >= 1
    assert len(calls) <= 1


def test_singular_gram_falls_back_to_the_eigen_route_with_the_same_choice():
    # Two identical inputs: R is singular; with alpha = 0 no Cholesky factor exists and the minimum-norm eigen
    # solution is used, as before.
    session = _session(collinear=True)
    est = RidgeArx(output_lags=1, input_lags="auto", delay_samples=2, lag_grid=(1, 2), alphas=(0.0, 1e-2))
    candidates, _ = structure_candidates(est)
    probs, folds, total = _moments(est, session, candidates)
    got = arx_cv.cv_errors(probs, folds, total, np.array([0.0, 1e-2]))
    for prob, errors in zip(probs, got):
        np.testing.assert_allclose(errors, _eigen_reference(prob, folds, total, np.array([0.0, 1e-2])),
                                   rtol=1e-8, atol=1e-12)
    assert np.isfinite(np.concatenate(got)).all()


def test_select_structure_scores_every_candidate_on_the_shared_rows():
    session = _session(seed=3)
    est = RidgeArx(output_lags="auto", input_lags="auto", delay_samples="auto", lag_grid=(1, 3),
                   delay_grid=(1, 2))
    candidates, _ = structure_candidates(est)
    structure, table = select_structure(est, session, candidates, np.logspace(-8, 0, 9))
    assert structure == (1, 1, 2)  # the simulated system: one output lag, one input at delay 2
    assert len(table) == len(candidates) and table["mean_error"].notna().all()


def test_cholesky_route_predicts_as_the_eigen_route_on_well_conditioned_data(monkeypatch):
    from stimsteer.sysid import arx_regression

    session = _session(seed=4)
    kw = dict(output_lags="auto", input_lags="auto", delay_samples="auto", lag_grid=(1, 2, 3), delay_grid=(1, 2))
    monkeypatch.setattr(arx_regression, "_CHOLESKY_FROM", 0)  # the final solve by Cholesky even at this size
    fast = RidgeArx(**kw).fit(session)
    # every factorisation refused: the eigen route of before, in the CV and in the final fit
    monkeypatch.setattr(arx_cv, "_core_factor", lambda *a, **k: None)
    monkeypatch.setattr(arx_regression, "chol_ridge_path", lambda *a, **k: None)
    slow = RidgeArx(**kw).fit(session)
    assert (fast.output_lags_, fast.input_lags_, fast.delay_samples_, fast.alpha_) == \
        (slow.output_lags_, slow.input_lags_, slow.delay_samples_, slow.alpha_)
    np.testing.assert_allclose(fast.cv_table_.to_numpy(), slow.cv_table_.to_numpy(), rtol=1e-9)
    assert fast.condition_number_ == pytest.approx(slow.condition_number_, rel=1e-9)
    rng = np.random.default_rng(1)
    args = (rng.standard_normal((3, 5, 2)), rng.standard_normal((3, 5, 3)), rng.standard_normal((3, 7, 2)))
    a, b = slow.predict_many(*args), fast.predict_many(*args)
    np.testing.assert_allclose(b, a, rtol=1e-8, atol=1e-10 * np.abs(a).max())


def test_one_worker_runs_in_the_calling_thread_with_the_numbers_of_the_pool(monkeypatch):
    # issue 20: with one BLAS thread (the demo's bench tasks) the strengths were handed one by one to a one-thread
    # pool; they run in the calling thread now, with the same numbers as on a pool of two
    import contextlib

    est = RidgeArx(output_lags=2, input_lags=2, delay_samples="auto", delay_grid=(1, 2))
    candidates, _ = structure_candidates(est)
    probs, folds, total = _moments(est, _session(seed=3), candidates)
    alphas = np.logspace(-6, 0, 4)

    def workers(n):
        @contextlib.contextmanager
        def fixed():
            yield n
        return fixed

    monkeypatch.setattr(arx_cv, "_single_threaded_blas", workers(2))
    ref = arx_cv.cv_errors(probs, folds, total, alphas)
    monkeypatch.setattr(arx_cv, "_single_threaded_blas", workers(1))

    def no_pool(*args, **kwargs):
        raise AssertionError("a thread pool was started for one worker")

    monkeypatch.setattr(arx_cv, "ThreadPoolExecutor", no_pool)
    got = arx_cv.cv_errors(probs, folds, total, alphas)
    for a, b in zip(got, ref):
        np.testing.assert_array_equal(a, b)
