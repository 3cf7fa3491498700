"""Ridge ARX on large lagged Grams (held as lag sums): fold Grams assembled one at a time in the solve's order and
centred in place, the strengths factored on worker threads, the final fit by one Cholesky factor with the condition
number from two Lanczos iterations.

The reference is the earlier route, kept in the package (total Gram materialised, fold Gram = total − held, one
core factor per strength on one thread; the final fit by ``_ridge_path`` with all eigenvalues) and the
eigendecomposition route before it (an internal equivalence, not an outside source). The sizes are forced down by
patching the thresholds, so the tests stay small.
"""

from __future__ import annotations

import contextlib
import sys
import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from stimsteer.sysid import arx, arx_band, arx_cv, arx_regression
from stimsteer.sysid._lagged import _Moments
from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.arx_structure import _longest, structure_candidates
from stimsteer.sysid.arx_regression import _Problem, _condition

sys.path.insert(0, str(Path(__file__).parent))
from test_arx_cv import _eigen_reference, _session  # noqa: E402  (the earlier routes and the test session)


def _large_moments(est, session, candidates, monkeypatch):
    monkeypatch.setattr(arx, "_SMALL_GRAM", 0)  # every Gram counts as large: totals held as lag sums
    n_lags = max(_longest(c) for c in candidates)
    probe = est._validated(session, max(candidates, key=_longest), n_lags)
    folds, total, _k, _scheme, _shift = est._accumulate(session, probe)
    probs = [_Problem(probe.p, probe.m, *c, probe.fit_intercept, n_lags) for c in candidates]
    materialised = _Moments(probe.size)
    for f in folds:
        materialised.add(f.n, f.s, f.W)
    return probs, folds, total, materialised


def _est(**kw):
    base = dict(output_lags="auto", input_lags="auto", delay_samples="auto", lag_grid=(1, 2, 4), delay_grid=(0, 1, 2))
    return RidgeArx(**{**base, **kw})


def _band_route(monkeypatch, band: bool):
    """Force the band route (core of any size, a narrow band so that several panels are reduced) or keep the
    dense factors (the cores here are far below ``_BAND_FROM``)."""
    if band:
        monkeypatch.setattr(arx_cv, "_BAND_FROM", 0)
        monkeypatch.setattr(arx_band, "BANDWIDTH", 3)


@pytest.mark.parametrize("band", [False, True])
@pytest.mark.parametrize("alphas", [np.logspace(-8, 0, 9), np.array([0.0, 1e-3, 1.0])])
def test_large_gram_errors_equal_the_eigen_route_for_every_structure(monkeypatch, alphas, band):
    _band_route(monkeypatch, band)
    est = _est()
    candidates, _ = structure_candidates(est)
    probs, folds, total, materialised = _large_moments(est, _session(), candidates, monkeypatch)
    assert hasattr(total, "sums")  # the large route is the one under test
    got = arx_cv.cv_errors(probs, folds, total, alphas)
    small = arx_cv.cv_errors(probs, folds, materialised, alphas)  # the earlier route on the same sums
    for prob, errors, before in zip(probs, got, small):
        np.testing.assert_allclose(errors, _eigen_reference(prob, folds, materialised, alphas), rtol=1e-9,
                                   atol=1e-14)
        np.testing.assert_allclose(errors, before, rtol=1e-10, atol=1e-15)


@pytest.mark.parametrize("band", [False, True])
def test_large_gram_singular_falls_back_to_the_eigen_route(monkeypatch, band):
    _band_route(monkeypatch, band)
    session = _session(collinear=True)
    est = RidgeArx(output_lags=1, input_lags="auto", delay_samples=2, lag_grid=(1, 2), alphas=(0.0, 1e-2))
    candidates, _ = structure_candidates(est)
    alphas = np.array([0.0, 1e-2])
    probs, folds, total, materialised = _large_moments(est, session, candidates, monkeypatch)
    got = arx_cv.cv_errors(probs, folds, total, alphas)
    for prob, errors in zip(probs, got):
        np.testing.assert_allclose(errors, _eigen_reference(prob, folds, materialised, alphas), rtol=1e-8,
                                   atol=1e-12)
    assert np.isfinite(np.concatenate(got)).all()


@pytest.mark.parametrize("band", [False, True])
@pytest.mark.parametrize("workers", [1, 3])
def test_worker_threads_give_the_numbers_of_one_thread_bit_for_bit(monkeypatch, workers, band):
    _band_route(monkeypatch, band)
    est = _est()
    candidates, _ = structure_candidates(est)
    probs, folds, total, _m = _large_moments(est, _session(seed=2), candidates, monkeypatch)
    alphas = np.logspace(-8, 0, 9)
    ref = arx_cv.cv_errors(probs, folds, total, alphas)

    @contextlib.contextmanager
    def fixed(n=workers):
        yield n

    monkeypatch.setattr(arx_cv, "_single_threaded_blas", fixed)
    got = arx_cv.cv_errors(probs, folds, total, alphas)
    for a, b in zip(got, ref):
        np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("band", [False, True])
def test_large_fit_predicts_as_the_earlier_route(monkeypatch, band):
    # issue 14: on large Grams the chosen structure keeps its table from the search (scored on the search's rows:
    # here the grid's longest window is 3, the chosen structure's 2), and is fitted on its own rows at that alpha
    session = _session(seed=4)
    kw = dict(lag_grid=(1, 2, 3), delay_grid=(1, 2))
    slow = _est(**kw).fit(session)  # small Grams: the earlier route, bit for bit
    _band_route(monkeypatch, band)
    monkeypatch.setattr(arx_regression, "_CHOLESKY_FROM", 0)  # the final fit by one factor and Lanczos
    est = _est(**kw)
    candidates, _ = structure_candidates(est)
    probs, folds, _total, materialised = _large_moments(est, session, candidates, monkeypatch)
    fast = _est(**kw).fit(session)
    chosen = (fast.output_lags_, fast.input_lags_, fast.delay_samples_)
    assert chosen + (fast.alpha_,) == (slow.output_lags_, slow.input_lags_, slow.delay_samples_, slow.alpha_)
    assert _longest(chosen) < max(_longest(c) for c in candidates)  # its own rows are not the search's
    searched = _eigen_reference(probs[candidates.index(chosen)], folds, materialised, fast.cv_table_["alpha"])
    np.testing.assert_allclose(fast.cv_table_.filter(like="fold_").to_numpy(), searched, rtol=1e-9)
    np.testing.assert_allclose(fast.structure_table_["mean_error"], slow.structure_table_["mean_error"], rtol=1e-9)
    assert fast.n_rows_ == slow.n_rows_  # fitted on its own rows
    assert fast.condition_number_ == pytest.approx(slow.condition_number_, rel=1e-9)
    np.testing.assert_allclose(fast.coef_, slow.coef_, rtol=1e-9, atol=1e-12 * np.abs(slow.coef_).max())
    np.testing.assert_allclose(fast.intercept_, slow.intercept_, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(fast.innovation_cov_, slow.innovation_cov_, rtol=1e-9)
    rng = np.random.default_rng(1)
    args = (rng.standard_normal((3, 5, 2)), rng.standard_normal((3, 5, 3)), rng.standard_normal((3, 7, 2)))
    a, b = slow.predict_many(*args), fast.predict_many(*args)
    np.testing.assert_allclose(b, a, rtol=1e-8, atol=1e-10 * np.abs(a).max())


def test_large_fit_at_the_rounding_level_takes_the_eigen_route(monkeypatch):
    # alpha = 0 on a singular Gram: no factor; the final fit must be the minimum-norm eigen solution of before
    session = _session(collinear=True)
    kw = dict(output_lags=1, input_lags=2, delay_samples=2, alphas=(0.0,))
    slow = RidgeArx(**kw).fit(session)
    monkeypatch.setattr(arx, "_SMALL_GRAM", 0)
    monkeypatch.setattr(arx_regression, "_CHOLESKY_FROM", 0)
    fast = RidgeArx(**kw).fit(session)
    np.testing.assert_allclose(fast.coef_, slow.coef_, rtol=1e-8, atol=1e-10)
    assert fast.condition_number_ == slow.condition_number_ == np.inf


def test_condition_number_from_two_lanczos_runs_equals_all_eigenvalues():
    rng = np.random.default_rng(0)
    X = rng.standard_normal((900, 300)) @ np.diag(np.logspace(0, -3, 300))
    R = X.T @ X / 900
    for alpha in (1e-6, 1e-2):
        lam = np.linalg.eigvalsh(R)
        L = np.linalg.cholesky(R + alpha * np.eye(300))
        got = _condition(lambda v: R @ v, np.asfortranarray(L), alpha)
        assert got == pytest.approx((lam.max() + alpha) / (max(lam.min(), 0) + alpha), rel=1e-9)


def test_large_cross_validation_holds_two_grams_and_the_worker_buffers(monkeypatch):
    # An earlier route held the total, training and held-out Grams, the centred blocks and its buffer at once
    # (5.2 Grams at peak here, measured with tracemalloc); the route of issue 14's first pass 3.3 with two workers
    # (one fold's Gram, a core-sized buffer per worker), at two Gram assemblies per fold. This route keeps the total
    # Gram as well (4.3 measured), and assembles one Gram per fold instead of two. Since the folds run on the worker
    # threads (issue 14, band route), each worker holds a fold's Gram, and one fold at a time the core-sized buffer
    # (4.4 measured; 5.5 when each worker had its own buffer).
    est = RidgeArx(output_lags=100, input_lags=100, delay_samples="auto", delay_grid=(0, 1))
    session = _session(T=8000)
    candidates, _ = structure_candidates(est)
    probs, folds, total, _m = _large_moments(est, session, candidates, monkeypatch)
    gram = 8.0 * total.s.size ** 2
    workers = 2

    @contextlib.contextmanager
    def fixed():
        yield workers

    monkeypatch.setattr(arx_cv, "_single_threaded_blas", fixed)
    tracemalloc.start()
    try:
        arx_cv.cv_errors(probs, folds, total, np.logspace(-8, 0, 9))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    # (4.37-4.51 measured on the previous commit at load 15-20, where two folds' temporaries overlap more or less:
    # the earlier bound of 4.5 failed now and then; a worker's own buffer would add a whole Gram)
    assert peak <= (2 + workers + 0.75) * gram


def test_a_large_fit_assembles_the_total_gram_once_and_one_gram_per_fold(monkeypatch):
    # issue 14: the fold's held-out moments are the total's minus its training moments, and the final fit takes the
    # total Gram the cross-validation assembled (before: two Grams per fold, and the total again for the final fit)
    session = _session(seed=4)
    monkeypatch.setattr(arx, "_SMALL_GRAM", 0)
    monkeypatch.setattr(arx_regression, "_CHOLESKY_FROM", 0)
    calls = []
    for module in (arx_cv, arx_regression):
        real = module._lagged_gram
        monkeypatch.setattr(module, "_lagged_gram", lambda *a, real=real: calls.append(1) or real(*a))
    est = RidgeArx(output_lags=2, input_lags=2, delay_samples=1, n_folds=3).fit(session)
    assert est.n_folds_ == 3 and len(calls) == 1 + 3


def test_a_chosen_structure_on_the_search_rows_reuses_its_moments_and_scores(monkeypatch):
    # issue 14: a structure whose longest lag is the grid's has the search's rows, so its own pass and cross-validation
    # would repeat the search's on the same moments; the reference fixes that structure (no search: one pass, its own
    # cross-validation, the route of before)
    session = _session(seed=4)  # true delay 2: the longest candidate below
    monkeypatch.setattr(arx, "_SMALL_GRAM", 0)
    fixed = RidgeArx(output_lags=1, input_lags=2, delay_samples=2).fit(session)
    passes = []
    real = RidgeArx._accumulate
    monkeypatch.setattr(RidgeArx, "_accumulate", lambda self, *a: passes.append(1) or real(self, *a))
    auto = RidgeArx(output_lags=1, input_lags=2, delay_samples="auto", delay_grid=(0, 1, 2)).fit(session)
    assert (auto.output_lags_, auto.input_lags_, auto.delay_samples_) == (1, 2, 2) and len(passes) == 1
    assert auto.alpha_ == fixed.alpha_
    np.testing.assert_allclose(auto.cv_table_.to_numpy(), fixed.cv_table_.to_numpy(), rtol=1e-9)
    np.testing.assert_allclose(auto.coef_, fixed.coef_, rtol=1e-12)
    np.testing.assert_allclose(auto.intercept_, fixed.intercept_, rtol=1e-12, atol=1e-14)


def _centred_gram(moments):
    """The Gram about the rows' own mean (independent of the shift the sums were taken about)."""
    return moments.W - np.outer(moments.s, moments.s) / moments.n


@pytest.mark.parametrize("n_trials", [5, 1])
def test_a_shorter_chosen_window_takes_its_moments_from_the_search_sums(monkeypatch, n_trials):
    # issue 14: the chosen structure's rows start N − L samples before the search's in each piece; those rows and
    # their lead-in are in the search's start windows, so its own moments need no second pass over the data (folds
    # of whole trials). One trial (folds of contiguous blocks, cut by row counts): the pieces differ, second pass.
    session = _session(seed=4, n_trials=n_trials)
    monkeypatch.setattr(arx, "_SMALL_GRAM", 0)
    est = _est(lag_grid=(1, 2, 3), delay_grid=(1, 2))
    candidates, _ = structure_candidates(est)
    n_lags = max(_longest(c) for c in candidates)
    probe = est._validated(session, max(candidates, key=_longest), n_lags)
    search = {"moments": est._accumulate(session, probe), "n_lags": n_lags}
    prob = est._validated(session, (2, 2, 1))
    assert prob.L == 2 < n_lags == 4
    passes = []
    real = RidgeArx._accumulate
    monkeypatch.setattr(RidgeArx, "_accumulate", lambda self, *a: passes.append(1) or real(self, *a))
    _f, own, k, scheme, shift = arx_regression.own_moments(est, session, prob, search)
    assert len(passes) == (0 if n_trials > 1 else 1) and shift.size == own.s.size == prob.size
    _f, ref, k_ref, scheme_ref, _shift = real(est, session, prob)
    assert (own.n, k, scheme) == (ref.n, k_ref, scheme_ref)
    np.testing.assert_allclose(own.s / own.n + shift, ref.s / ref.n + _shift, rtol=1e-12)
    expected = _centred_gram(ref)
    np.testing.assert_allclose(_centred_gram(own), expected, rtol=1e-10, atol=1e-12 * np.abs(expected).max())
    passes.clear()
    fitted = _est(lag_grid=(1, 2, 3), delay_grid=(1, 2)).fit(session)
    assert _longest((fitted.output_lags_, fitted.input_lags_, fitted.delay_samples_)) < n_lags
    assert len(passes) == (1 if n_trials > 1 else 2)  # the search's pass alone (before: one more for the chosen)


def _two_workers(monkeypatch):
    @contextlib.contextmanager
    def fixed():
        yield 2

    monkeypatch.setattr(arx_cv, "_single_threaded_blas", fixed)


def _fitted(est):
    return (est.output_lags_, est.input_lags_, est.delay_samples_, est.alpha_, est.condition_number_, est.coef_,
            est.intercept_, est.innovation_cov_, est.n_rows_)


def test_the_final_fit_is_prepared_on_the_worker_the_last_fold_leaves_idle(monkeypatch):
    # issue 14: with five folds on two workers one worker idles during the last fold; it prepares the final fit of
    # the structure the other folds choose (its moments, Gram centred in place, scale, largest eigenvalue), and the
    # fit at the chosen strength follows from it: the result of the fit after the search, bit for bit
    import threading

    session = _session(seed=4)
    monkeypatch.setattr(arx, "_SMALL_GRAM", 0)
    monkeypatch.setattr(arx_regression, "_CHOLESKY_FROM", 0)
    _two_workers(monkeypatch)
    kw = dict(lag_grid=(1, 2, 3), delay_grid=(1, 2))
    with monkeypatch.context() as m:
        m.setattr(arx, "fit_ahead", lambda *a, **k: None)
        ref = _fitted(_est(**kw).fit(session))
    where = []
    real = arx_regression.LargeFinal.__init__
    monkeypatch.setattr(arx_regression.LargeFinal, "__init__",
                        lambda self, *a: where.append(threading.current_thread().name) or real(self, *a))
    got = _fitted(_est(**kw).fit(session))
    assert len(where) == 1 and where[0].startswith("stimsteer-ridge-cv")
    assert got[:5] == ref[:5] and got[-1] == ref[-1]
    for a, b in zip(got[5:-1], ref[5:-1]):
        np.testing.assert_array_equal(a, b)



@pytest.mark.parametrize("b", [3, 128])
def test_the_final_condition_number_from_the_band_form_equals_all_eigenvalues(monkeypatch, b):
    # issue 14: λ_min(R + α I) by Lanczos on banded solves with B + α I (B = Qᵀ R Q), not on the dense factor's
    # triangular solves (O(d b) a step against O(d²)); λ_max as before
    monkeypatch.setattr(arx_band, "BANDWIDTH", b)
    monkeypatch.setattr(arx_regression, "_lowest_shifted", lambda *a, **k: pytest.fail("dense route taken"))
    session = _session(seed=4)
    monkeypatch.setattr(arx, "_SMALL_GRAM", 0)
    est = RidgeArx(output_lags=3, input_lags=3, delay_samples=1)
    prob = est._validated(session, (3, 3, 1))
    _f, total, _k, _s, _shift = est._accumulate(session, prob)
    prepared = arx_regression.LargeFinal(prob, total, {})
    Cxx, _Cxy, _Cyy, _mu = prob.centred(total.sums.moments())
    scale = np.sqrt(np.diag(Cxx) / total.n)
    lam = np.clip(np.linalg.eigvalsh(Cxx / (total.n * np.outer(scale, scale))), 0, None)
    for alpha in (1e-6, 1e-2):
        cond = prepared.fit(alpha)[2]
        assert cond == pytest.approx((lam.max() + alpha) / (lam.min() + alpha), rel=1e-9)
