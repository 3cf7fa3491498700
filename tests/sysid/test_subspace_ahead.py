"""Subspace identification scores its candidate orders while the SVD of all data still runs (``SubspaceId._ahead``,
``order_tables``' memo): the fitted model and the order table must be those of scoring after the SVD, bit for bit.

Reference: the same estimator with the scoring ahead switched off (scoring after the SVD, the order of before): an
internal equivalence, not an outside source; the claim checked is that the reordering changes no number.
"""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest

from stimsteer.sysid.subspace import SubspaceId, factor, prepare, selection

from tests.sysid.test_subspace_factor import _session  # the simulated three-state session of the factor tests


_AHEAD = SubspaceId._ahead


def _fit(monkeypatch, mode, **kw):
    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)  # 0: the factor route at this small size
    decompose = factor._FactorProjection.decompose

    def slow(self, *args):  # all data's SVD (on its own thread) still runs when the scores start: the scoring
        if "svd-all" in threading.current_thread().name:  # ahead is taken
            time.sleep(0.5)  # chosen: long beside the scoring of this small session (not measured)
        decompose(self, *args)

    monkeypatch.setattr(factor._FactorProjection, "decompose", slow)
    calls = []
    score = selection.score_orders
    monkeypatch.setattr(selection, "score_orders", lambda *a, **k: calls.append(a[3]) or score(*a, **k))
    if mode == "after":  # the reference: wait for the SVD, score nothing ahead
        def after(self, cfg, proj_all, proj_fit, check):
            proj_all.pending.result()
            return None, None

        monkeypatch.setattr(SubspaceId, "_ahead", after)
        # (nor on the fitting part's thread, where the factor route takes them once its part is ready)
        monkeypatch.setattr(SubspaceId, "_score_ahead", lambda self, cfg, proj_fit, check: (None, 0))
    elif mode == "mismatch":  # all data as if supporting fewer orders: what was scored ahead is dropped
        monkeypatch.setattr(SubspaceId, "_ahead", lambda self, *a: (_AHEAD(self, *a)[0], -1))
    # past 6 / future 5, noise 0.3: the sizes of the factor tests' sessions (chosen for speed)
    est = SubspaceId(past_steps=6, future_steps=5, **kw).fit(_session(noise=0.3, seed=4))
    return est, calls


# the default, another weighting with a direct term, and a capped order (3: the simulated system's order)
@pytest.mark.parametrize("kw", [{}, {"weighting": "cva", "feedthrough": True}, {"max_order": 3}])
def test_scoring_ahead_of_the_svd_changes_no_number(monkeypatch, kw):
    with monkeypatch.context() as mp:
        ref, ref_calls = _fit(mp, "after", **kw)
    for mode in ("ahead", "mismatch"):
        with monkeypatch.context() as mp:
            est, calls = _fit(mp, mode, **kw)
        assert est.order_ == ref.order_ and est.feedthrough_ == ref.feedthrough_
        assert est.order_table_.equals(ref.order_table_)
        assert np.array_equal(est.singular_values_, ref.singular_values_)
        for name in ("A", "B", "C", "D", "K", "innovation_cov"):
            assert np.array_equal(getattr(est.model_, name), getattr(ref.model_, name)), (mode, name)
        # ahead: every round scored once (before the SVD ended); mismatch: scored ahead, then all again (hence 2 ×)
        assert len(calls) == (len(ref_calls) if mode == "ahead" else 2 * len(ref_calls))
