"""The factor route's schedule (``prepare._factor_route``): the two Gram assemblies one after the other, all data's
into a buffer paged in beforehand, with the numbers of the fresh-buffer route.

Reference: the same estimator with the paging switched off (a new buffer per Gram, as before) — an internal
equivalence: the claim checked is that the schedule changes no number.
"""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest

from stimsteer.sysid.subspace import SubspaceId, factor, prepare
from stimsteer.sysid._pages import touched

from tests.sysid.test_subspace_factor import _session, _windows


def test_a_paged_buffer_is_a_new_writable_array_of_the_size_asked():
    a, b = touched(100_000), touched(100_000)
    assert a.shape == (100_000,) and a.dtype == np.float64 and a.flags.writeable and not np.shares_memory(a, b)


def test_the_two_grams_are_assembled_one_after_the_other_and_fit_as_with_fresh_buffers(monkeypatch):
    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)  # 0: the factor route at this small size
    session = _session(noise=0.3, seed=4)
    kw = dict(past_steps=6, future_steps=5)
    spans, assemble = [], prepare._gram_from_sums

    def timed(acc, L, order=None, rows=None, out=None):
        t0 = time.perf_counter()
        time.sleep(0.05)  # (chosen: long beside the rest of this small fit, so an overlap could not be missed)
        got = assemble(acc, L, order, rows, out)
        if rows is None:  # a whole Gram (not the held-out rows)
            spans.append((t0, time.perf_counter(), threading.current_thread().name))
        return got

    monkeypatch.setattr(prepare, "_gram_from_sums", timed)
    got = SubspaceId(**kw).fit(session)
    (s0, e0, _t0), (s1, e1, _t1) = sorted(spans)
    assert e0 <= s1  # the fitting part's whole Gram, then all data's
    monkeypatch.setattr(prepare, "touched", np.empty)  # a new buffer, never paged in beforehand
    ref = SubspaceId(**kw).fit(session)
    assert got.order_ == ref.order_ and got.order_table_.equals(ref.order_table_)
    np.testing.assert_array_equal(got.predict_many(*_windows()), ref.predict_many(*_windows()))


@pytest.mark.parametrize("outcome", ["raises", "ill-conditioned"])
def test_the_held_out_rows_wait_for_no_buffer_when_the_fitting_part_has_no_projection(monkeypatch, outcome):
    """The main thread waits for the fitting part's buffer (``handed``): a fitting part whose projection raises or
    is refused must not leave it waiting: the error is raised, or the covariance route fits (as before)."""
    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)
    session = _session(noise=0.3, seed=4)
    project = prepare.factor_projection

    def failing(S, L, weighting):
        if "subspace-fit" in threading.current_thread().name:
            if outcome == "raises":
                raise RuntimeError("the fitting part's projection failed")
            return None
        return project(S, L, weighting)

    monkeypatch.setattr(prepare, "factor_projection", failing)
    done = []
    worker = threading.Thread(target=lambda: done.append(_outcome(session)), daemon=True)
    worker.start()
    worker.join(60)  # 60 s: chosen far beyond this small fit, only against a hang
    assert done, "the fit hung"
    if outcome == "raises":
        assert isinstance(done[0], RuntimeError)
    else:  # the covariance route's fit
        monkeypatch.setattr(prepare, "_FACTOR_FROM", 10**9)
        ref = SubspaceId(past_steps=6, future_steps=5).fit(session)
        assert done[0].order_ == ref.order_ and done[0].order_table_.equals(ref.order_table_)


def _outcome(session):
    try:
        return SubspaceId(past_steps=6, future_steps=5).fit(session)
    except Exception as exc:  # noqa: BLE001 - the error itself is the outcome checked
        return exc


def test_the_held_out_rows_are_the_same_whichever_thread_assembles_them(monkeypatch):
    """The held-out rows go to the thread free first (``_HeldOut.take``): made slow in turn, each thread leaves
    them to the other; the fits are equal bit for bit."""
    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)
    session = _session(noise=0.3, seed=4)
    held_out, decompose, project = prepare._held_out, factor._FactorProjection.decompose, prepare._projection
    fits = {}
    for slow in ("fit", "main"):
        who = []

        def rows(*a):
            who.append("fit" if "subspace-fit" in threading.current_thread().name else "main")
            return held_out(*a)

        def slow_decompose(self, *a):  # the fitting part's decomposition (its thread's last step before the rows)
            if slow == "fit" and "subspace-fit" in threading.current_thread().name:
                time.sleep(0.3)  # chosen: long beside the rest of this small fit
            return decompose(self, *a)

        def slow_projection(*a):  # all data's projection (the main thread's last step before the rows)
            if slow == "main" and "subspace-fit" not in threading.current_thread().name:
                time.sleep(0.3)
            return project(*a)

        monkeypatch.setattr(prepare, "_held_out", rows)
        monkeypatch.setattr(factor._FactorProjection, "decompose", slow_decompose)
        monkeypatch.setattr(prepare, "_projection", slow_projection)
        fits[slow] = SubspaceId(past_steps=6, future_steps=5).fit(session)
        assert who == ["main" if slow == "fit" else "fit"]
    a, b = fits["fit"], fits["main"]
    assert a.order_ == b.order_ and a.order_table_.equals(b.order_table_)
    np.testing.assert_array_equal(a.predict_many(*_windows()), b.predict_many(*_windows()))


def test_the_orders_are_scored_on_the_fitting_parts_thread_once_its_part_is_ready(monkeypatch):
    """The factor route scores the candidate orders ahead on the fitting part's thread (``cfg["ahead"]``), not
    after the main thread's projection of all data; the real call finds every round in the memo (the numbers:
    tests/sysid/test_subspace_ahead.py)."""
    from stimsteer.sysid.subspace import selection

    monkeypatch.setattr(prepare, "_FACTOR_FROM", 0)
    threads, score = [], selection.score_orders

    def recorded(*a, **k):
        threads.append(threading.current_thread().name)
        return score(*a, **k)

    monkeypatch.setattr(selection, "score_orders", recorded)
    SubspaceId(past_steps=6, future_steps=5).fit(_session(noise=0.3, seed=4))
    assert threads and all("subspace-fit" in name for name in threads)
