"""Every large fold's SPC grid by strength as tasks of one pool (``datadriven._strength_folds``): the same numbers,
bit for bit, as the folds scored one after the other by ``gram.ridge_grid_errors`` (reference: that route, itself
checked against the definition of the held-out error in ``test_gram_total.py``)."""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid.datadriven import _strength_folds as sf
from stimsteer.sysid.datadriven import gram as gr
from stimsteer.sysid.datadriven import lsq
from stimsteer.sysid.datadriven.lsq import LsqPredictor

from .test_gram_total import _system


def _by_strength_everywhere(monkeypatch):
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)  # 1 row: the small test folds scored as large ones
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", False)  # by strength, not by two eigendecompositions


@pytest.mark.parametrize("n_alphas", [9, 4, 1])  # an odd strength split in halves, none, and only that one
def test_the_folds_as_one_plan_equal_fold_by_fold(n_alphas, monkeypatch):
    _by_strength_everywhere(monkeypatch)
    P, N = 5, 8  # past 5, horizon 8: chosen for speed
    n_b = 5 * P + 2 * N  # 2 inputs + 3 outputs in the past, 2 inputs in the future (the system of _system)
    # strengths 1e-8 to 1 (a grid of the kind the fit scores); weights for the 3 · N outputs, chosen unequal
    alphas, w = np.logspace(-8, 0, n_alphas), np.linspace(0.5, 2.0, 3 * N)
    fs, *_ = gr.collect_gram(_system(), [(0, 750, 0), (750, 1500, 1), (1500, 2250, 2), (2250, 3000, 0)], 3,
                             2, 3, P, N)
    total = gr.total_fold(fs)
    gr.gram_condition_of(total, keep_gram=True)
    assert sf.wanted(total, n_b)
    plan = sf.StrengthPlan(total, n_b)  # the first fold's rows assembled from here
    got = [plan.errors(f, alphas, w) for f in fs]
    old = [gr.ridge_grid_errors(total.plus(f, -1.0), f, n_b, alphas, w, total) for f in fs]
    for a, b in zip(got, old):
        np.testing.assert_array_equal(a, b)


def test_lsq_fits_through_the_plan_predict_bit_for_bit_as_fold_by_fold(monkeypatch):
    _by_strength_everywhere(monkeypatch)
    s, P, N = _system(), 5, 8  # chosen for speed
    plans = []
    real = sf.StrengthPlan.errors
    monkeypatch.setattr(sf.StrengthPlan, "errors", lambda self, *a: plans.append(self) or real(self, *a))
    given = []
    real_map = gr._ridge_map_from_kept
    monkeypatch.setattr(gr, "_ridge_map_from_kept", lambda *a: given.append(a[-1] is not None) or real_map(*a))
    new = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    assert len(plans) == 3 and len(set(map(id, plans))) == 1  # one plan scored the three folds (n_splits=3)
    assert given == [True]  # and assembled the final map's rows
    monkeypatch.setattr(lsq, "first_fold_hook", lambda *a: None)
    old = LsqPredictor(past_steps=P, horizon_steps=N).fit(s)
    assert new.alpha_ == old.alpha_
    np.testing.assert_array_equal(np.hstack([new.Kp_, new.Kf_]), np.hstack([old.Kp_, old.Kf_]))
    np.testing.assert_array_equal(new.cv_table_.to_numpy(), old.cv_table_.to_numpy())


def test_no_plan_where_the_eigen_route_or_too_few_folds_score_them(monkeypatch):
    _by_strength_everywhere(monkeypatch)
    fs, *_ = gr.collect_gram(_system(), [(0, 1500, 0), (1500, 3000, 1)], 2, 2, 3, 5, 8)
    total = gr.total_fold(fs)
    assert sf.wanted(total, 41)  # n_b = 41 = 5 · 5 + 2 · 8 (2 inputs, 3 outputs, past 5, horizon 8)
    assert not sf.wanted(gr.total_fold(fs[:1]), 41)  # one fold
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", True)  # mid-sized folds: two eigendecompositions side by side
    assert not sf.wanted(total, 41)


def test_folds_whose_strengths_cannot_be_factored_go_back_to_the_caller(monkeypatch):
    _by_strength_everywhere(monkeypatch)
    fs, *_ = gr.collect_gram(_system(), [(0, 1000, 0), (1000, 2000, 1), (2000, 3000, 2)], 3, 2, 3, 5, 8)
    total = gr.total_fold(fs)
    gr.gram_condition_of(total, keep_gram=True)
    monkeypatch.setattr(sf._Grid, "_factor", lambda *a: False)  # some G11 + sI not positive definite
    plan = sf.StrengthPlan(total, 41)
    # 9 strengths as the fit's grid; 24 = 3 outputs · horizon 8 weights
    assert [plan.errors(f, np.logspace(-8, 0, 9), np.ones(24)) for f in fs] == [None] * 3  # the caller's route


def test_a_stopped_plan_assembles_nothing_more():
    fs, *_ = gr.collect_gram(_system(), [(0, 1000, 0), (1000, 2000, 1), (2000, 3000, 2)], 3, 2, 3, 5, 8)
    plan = sf.StrengthPlan(gr.total_fold(fs), 41)
    plan.stop()  # (the Gram route refused: base._collect stops the plan)
    begun = plan._next
    plan._held = 0
    plan._assemble()  # (as a fold's end would)
    assert plan._next == begun <= 2  # 2: _strength_folds.MAX_HELD, the folds' rows held at most
