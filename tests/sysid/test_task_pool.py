"""The prioritised worker threads of the Hankel predictor's folds (``datadriven._task_pool``) and the fold plan's
errors (``datadriven._hankel_folds``).

References: the run order is that of ``sorted`` on ``(priority, submission count)`` (Python's ``heapq`` is a
min-heap: the smallest first; the count breaks ties first come first served); results and errors come back as
``concurrent.futures.Future`` objects do (``result()`` raises the task's exception)."""

from __future__ import annotations

import threading
import time

import numpy as np
import pytest

from stimsteer.sysid.datadriven import _hankel_folds as hf
from stimsteer.sysid.datadriven import gram as gr
from stimsteer.sysid.datadriven._task_pool import TaskPool


def test_ready_tasks_run_lowest_priority_first_and_first_come_among_equals():
    pool = TaskPool(threads=2, cores=1)
    gate, order = threading.Event(), []
    pool.submit(0, gate.wait)  # holds the one core while the others are queued
    tasks = [(3, "a"), (1, "b"), (2, "c"), (1, "d"), (0, "e"), (3, "f")]  # chosen: ties and priorities out of order
    futures = [pool.submit(p, order.append, name) for p, name in tasks]
    gate.set()
    pool.close()
    assert order == [name for _p, _k, name in sorted((p, k, name) for k, (p, name) in enumerate(tasks))]
    assert all(f.result() is None for f in futures)


def test_at_most_cores_tasks_run_at_once_until_raised():
    pool = TaskPool(threads=3, cores=1)
    lock, running, peak = threading.Lock(), [0], []

    def task():
        with lock:
            running[0] += 1
            peak.append(running[0])
        time.sleep(0.02)  # 20 ms per task, chosen: long beside the pool's own overhead
        with lock:
            running[0] -= 1
    for _ in range(4):
        pool.submit(0, task)
    deadline = time.monotonic() + 10.0  # wait (not a fixed sleep) until two tasks began under one core
    while len(peak) < 2 and time.monotonic() < deadline:
        time.sleep(0.001)
    pool.set_cores(3)
    for _ in range(6):
        pool.submit(0, task)
    pool.close()
    # the first two began one at a time; then more than one at once, never above 3 cores; 10 = 4 + 6 tasks
    assert max(peak[:2]) == 1 and max(peak) > 1 and max(peak) <= 3 and len(peak) == 10


def test_a_task_error_comes_back_by_its_future_and_close_waits_for_tasks_submitted_by_tasks():
    pool = TaskPool(threads=2, cores=2)
    seen = []

    def fail():
        raise ValueError("boom")
    bad = pool.submit(0, fail)
    # 20 ms: the inner task still runs when close() begins (chosen)
    pool.submit(0, lambda: pool.submit(5, lambda: time.sleep(0.02) or seen.append("later")))
    pool.close()
    with pytest.raises(ValueError, match="boom"):
        bad.result()
    assert seen == ["later"]


def _setup():
    from tests.sysid.test_hankel_folds import folds_setup

    return folds_setup()


def test_an_error_in_a_folds_step_is_raised_by_fold_errors_not_waited_for(monkeypatch):
    fs, total, n_b = _setup()
    real = hf._factor_fold
    calls = []

    def factor(train, n, *args):
        calls.append(1)
        if len(calls) == 2:
            raise MemoryError("fold 1")
        return real(train, n, *args)
    monkeypatch.setattr(hf, "_factor_fold", factor)
    with pytest.raises(MemoryError, match="fold 1"):
        hf.fold_errors(fs, total, n_b, np.ones(8))  # 8 weights: p · horizon outputs of folds_setup
    assert len(calls) == 2  # the plan stopped: no fold begun after the error


def test_a_stopped_plan_ends_its_threads_and_pieces_cover_the_rows_in_multiples_of_16(monkeypatch):
    fs, total, n_b = _setup()
    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)  # 1 row: the small folds take the large folds' route
    folds = type("F", (list,), {"total": total, "first_fold": None})(fs)
    plan = hf.start_first_fold(folds, n_b)
    plan.stop()
    assert not any(t.is_alive() for t in plan.pool._threads)
    # 16: the pieces' granularity in _hankel_folds._pieces; sizes chosen below, above and not multiples of it
    for pN in (1, 17, 1000, 1001):
        cuts = hf._pieces(pN)
        assert [a for a, _b in cuts][0] == 0 and cuts[-1][1] == pN
        assert all(b == c for (_a, b), (c, _d) in zip(cuts[:-1], cuts[1:]))
        assert all((a - (0 if a < pN // 2 else pN // 2)) % 16 == 0 for a, _b in cuts)


def test_a_plan_begun_before_a_refused_gram_is_stopped_and_the_fit_is_the_qr_routes(monkeypatch):
    from stimsteer.sysid.datadriven import base
    from stimsteer.sysid.datadriven.hankel_predictor import HankelPredictor
    from tests.sysid.test_hankel_folds import _session

    qr = HankelPredictor(past_steps=5, horizon_steps=4)
    qr._route = "qr"  # test hook of the direct predictors: the QR route whatever the conditioning
    qr.fit(_session())
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)  # 1 row: the small session takes the large fits' routes
    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)
    # 1.0: every condition number is >= 1 (common practice, no source), so every Gram is refused
    monkeypatch.setattr(base, "GRAM_CONDITION_LIMIT", 1.0)  # every total Gram refused after the plan began
    plans = []
    real = hf.start_first_fold
    monkeypatch.setattr(hf, "start_first_fold", lambda *a: plans.append(real(*a)) or plans[-1])
    before = threading.active_count()
    new = HankelPredictor(past_steps=5, horizon_steps=4).fit(_session())
    assert len(plans) == 1 and plans[0] is not None and new.factor_route_ == "qr"
    assert not any(t.is_alive() for t in plans[0].pool._threads) and threading.active_count() == before
    np.testing.assert_array_equal(new.cv_table_.to_numpy(float), qr.cv_table_.to_numpy(float))


def test_the_totals_rows_are_assembled_after_the_first_folds_and_the_folds_share_one_array(monkeypatch):
    # Two assemblies at once hold the GIL in turns (issue 14, measured): the plan begun before the condition check
    # assembles its first fold's rows, the total's wait for them (``before_rows``); the folds' arrays, one after
    # the other, are one buffer (a fresh array's first touch costs more than its assembly).
    from stimsteer.sysid.datadriven.hankel_predictor import HankelPredictor
    from tests.sysid.test_hankel_folds import _session

    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)  # 1 row: the small session takes the large fits' routes
    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)
    calls = []
    real = gr._GramFold.gram_rows

    def rows(self, r0, r1, fortran=False, out=None):
        t0 = time.perf_counter()
        time.sleep(0.02)  # long enough that an assembly begun meanwhile would overlap
        G = real(self, r0, r1, fortran, out)
        calls.append((t0, time.perf_counter(), r1 == self.n_rows, out is not None and np.shares_memory(G, out),
                      None if out is None else out.__array_interface__["data"][0]))
        return G
    monkeypatch.setattr(gr._GramFold, "gram_rows", rows)
    HankelPredictor(past_steps=5, horizon_steps=4).fit(_session())
    total = [c for c in calls if c[2]]
    folds = sorted(c for c in calls if not c[2])
    assert len(total) == 1 and len(folds) == 3
    assert total[0][0] >= folds[0][1]  # begun once the first fold's rows were done
    assert total[0][3] and all(f[3] for f in folds)  # written into the arrays given
    assert len({f[4] for f in folds}) == 1 and folds[0][4] != total[0][4]  # one buffer for the three folds
