"""The Hankel predictor's large folds scored side by side, in place (``datadriven._hankel_folds``): the same held-out
errors as ``gram.unregularised_fold_error`` from the total's factor (the route it replaces from
``gram.TOTAL_FACTOR_ROWS`` regressor rows; here the limit is lowered to reach it on a small session), and the
general route where a fold's Gram is refused."""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid import Session
from stimsteer.sysid.datadriven import _hankel_folds as hf
from stimsteer.sysid.datadriven import gram as gr
from stimsteer.sysid.datadriven.hankel_predictor import HankelPredictor
from tests.sysid.simulated import state_space_session


def _session(T=2400, seed=3):
    """A stable 2-state, 1-input, 2-output system with measurement noise, in four trials."""
    rng = np.random.default_rng(seed)
    u = rng.standard_normal((T, 1))
    A, B = np.array([[0.7, 0.2], [-0.1, 0.5]]), rng.standard_normal((2, 1))
    return state_space_session(u, A, B, noise=0.1, rng=rng)


def folds_setup():
    """Three folds of the simulated session, their total with its factor kept, and ``n_b`` (fresh on each call)."""
    m, p, past, horizon = 1, 2, 5, 4
    pieces = [(0, 600, 0), (600, 1200, 1), (1200, 1800, 2), (1800, 2400, 0)]
    fs, *_ = gr.collect_gram(_session(), pieces, 3, m, p, past, horizon)
    total = gr.total_fold(fs)
    gr.gram_condition_of(total, keep=True)
    return fs, total, (m + p) * past + m * horizon


@pytest.fixture(scope="module")
def setup():
    return folds_setup()


def test_side_by_side_fold_errors_equal_the_total_factor_route(setup, monkeypatch):
    fs, total, n_b = setup
    w = np.linspace(0.5, 2.0, 8)
    assert hf.available(total, n_b)
    got = hf.fold_errors(fs, total, n_b, w)
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)  # the route replaced
    for i in range(3):
        train, val = total.plus(fs[i], -1.0), fs[i]
        assert got[i] == pytest.approx(gr.unregularised_fold_error(train, val, n_b, w, total), rel=1e-12)
        Gt, Gv = train.gram, val.gram  # and the definition, from both Grams
        theta = np.linalg.solve(Gt[:n_b, :n_b], Gt[:n_b, n_b:]).T
        R = Gv[n_b:, n_b:] - theta @ Gv[:n_b, n_b:] - Gv[n_b:, :n_b] @ theta.T + theta @ Gv[:n_b, :n_b] @ theta.T
        assert got[i] == pytest.approx(float(w ** 2 @ np.diagonal(R)), rel=1e-10)


def _fits(monkeypatch, use, session=None):
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)
    calls = []
    real = hf.fold_errors
    monkeypatch.setattr(hf, "fold_errors", lambda *a: calls.append(1) or real(*a))
    if not use:
        monkeypatch.setattr(hf, "available", lambda *a: False)
    return HankelPredictor(past_steps=5, horizon_steps=4).fit(session or _session()), len(calls)


def test_the_predictor_scores_its_folds_side_by_side_as_one_by_one(monkeypatch):
    with monkeypatch.context() as mp:
        old, n_old = _fits(mp, use=False)
    new, n_new = _fits(monkeypatch, use=True)
    assert (n_old, n_new) == (0, 1)
    np.testing.assert_allclose(new.cv_table_.to_numpy(float), old.cv_table_.to_numpy(float), rtol=1e-12)
    rng = np.random.default_rng(0)
    windows = rng.standard_normal((4, 5, 1)), rng.standard_normal((4, 5, 2)), rng.standard_normal((4, 4, 1))
    np.testing.assert_array_equal(new.predict_many(*windows), old.predict_many(*windows))
    assert new.lambda_g_ == old.lambda_g_


def test_a_refused_fold_is_scored_by_the_general_route(setup, monkeypatch):
    fs, total, n_b = setup
    monkeypatch.setattr(hf, "GRAM_CONDITION_LIMIT", 1.0)  # every training Gram "too ill-conditioned" here
    assert hf.fold_errors(fs, total, n_b, np.ones(8)) == {0: None, 1: None, 2: None}
    with monkeypatch.context() as mp:
        old, _ = _fits(mp, use=False)
    new, n_new = _fits(monkeypatch, use=True)
    assert n_new == 1
    np.testing.assert_array_equal(new.cv_table_.to_numpy(float), old.cv_table_.to_numpy(float))


def test_near_the_condition_limit_the_side_by_side_folds_predict_as_the_qr_route(monkeypatch):
    # One-signed inputs (as pulse amplitudes are) make the lagged Gram ill-conditioned: the Gram route's stated
    # tolerance against QR is eps·κ (Golub & Van Loan 2013, Matrix Computations, section 5.3.8).
    rng = np.random.default_rng(1)
    s = _session()
    s = Session(u=300.0 + np.abs(rng.standard_normal(s.u.shape)), y=s.y, sample_rate_hz=100.0, trials=s.trials)
    qr = HankelPredictor(past_steps=5, horizon_steps=4)
    qr._route = "qr"  # test hook of the direct predictors: the QR route whatever the conditioning
    qr.fit(s)
    new, n_new = _fits(monkeypatch, use=True, session=s)
    assert n_new == 1 and new.factor_route_ == "gram" and new.gram_condition_ > 1e6
    windows = 300.0 + np.abs(rng.standard_normal((4, 5, 1))), rng.standard_normal((4, 5, 2)), \
        300.0 + np.abs(rng.standard_normal((4, 4, 1)))
    a, b = qr.predict_many(*windows), new.predict_many(*windows)
    assert np.abs(a - b).max() <= 1e-8 * np.abs(a).max()
    np.testing.assert_allclose(new.cv_table_["validation_error"], qr.cv_table_["validation_error"], rtol=1e-6)


def test_row_blocks_made_in_the_factors_memory_and_the_projector_equal_their_copies():
    """Issue 14 (memory at past 100 / horizon 50): the factor made C-ordered in its own memory holds the numbers of
    ``np.ascontiguousarray`` (reference: NumPy's copy) with no second array of its size (tracemalloc: two tiles of
    256 columns at most), and the coordinate projector is ``np.diag``'s, bit for bit."""
    import tracemalloc

    from stimsteer.sysid.datadriven import kkt

    rng = np.random.default_rng(1)
    n = 700  # more than two 256-column tiles, not a multiple of 256: whole and partial tiles
    F = np.asfortranarray(np.tril(rng.standard_normal((n, n))))
    want = np.ascontiguousarray(F)
    tracemalloc.start()
    try:
        got = kkt.c_order_in_place(F)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert got.flags.c_contiguous and np.shares_memory(got, F)
    np.testing.assert_array_equal(got, want)
    assert peak <= 2 * 8 * 256 * 256 + 65536  # two 256 × 256 float64 tiles, plus 64 KiB for small Python objects
    d = np.r_[np.zeros(40), np.ones(n - 40)]  # n_b = 40: any leading block (chosen)
    np.testing.assert_array_equal(kkt._coordinate_projector(n, 40), np.diag(d))


@pytest.mark.parametrize("past", [None, "x", 0])
def test_bad_windows_are_refused_as_settings_before_the_first_fold_is_planned(past):
    # the first fold's plan is made once the settings are checked: a bad window is the settings error it always
    # was, not a TypeError or ValueError from the plan (a review found it read int(past_steps) before the check)
    from stimsteer.sysid.exceptions import InvalidParameterError

    with pytest.raises(InvalidParameterError):
        HankelPredictor(past_steps=past, horizon_steps=4).fit(_session())
