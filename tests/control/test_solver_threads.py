"""Clarabel solves stay serial, so that a worker forked after a parallel solve never waits on a thread pool.

Clarabel 0.11 (faer) factors a large KKT system on a rayon thread pool. A forked child inherits the pool's state but
not its threads, and its first large solve waits forever: seen here in the demo's bench workers, and reproduced
below (every child of a parent that had run one 400-variable solve hung). Checked on the installed Clarabel:
the reproduction is this project's own (no source).
"""

import multiprocessing
import os

import cvxpy as cp
import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid._threads import _clarabel_has_max_threads, serial_clarabel

pytestmark = pytest.mark.skipif(not _clarabel_has_max_threads(), reason="this Clarabel has no max_threads setting")


def _large_solve(**options):
    rng = np.random.default_rng(0)
    n = 400  # large enough for faer's parallel supernodal factorisation
    x = cp.Variable(n)
    A = rng.standard_normal((2 * n, n))
    problem = cp.Problem(cp.Minimize(cp.sum_squares(A @ x - 1) + cp.norm1(x)), [cp.abs(x) <= 1])
    problem.solve(**options)
    return problem.value


def _child():
    _large_solve(**serial_clarabel({"solver": "CLARABEL"}))
    os._exit(0)


@pytest.mark.skipif(multiprocessing.get_start_method(allow_none=True) not in (None, "fork"),
                    reason="the hang needs the fork start method")
def test_a_child_forked_after_a_parallel_solve_finishes_its_own_solve():
    _large_solve(solver="CLARABEL")  # the parent starts Clarabel's thread pool
    child = multiprocessing.get_context("fork").Process(target=_child)
    child.start()
    child.join(timeout=120)
    hung = child.exitcode is None
    if hung:
        child.kill()
        child.join()
    assert not hung, "the forked child's Clarabel solve waited on the parent's thread pool"
    assert child.exitcode == 0


def test_serial_options_keep_what_the_caller_set():
    assert serial_clarabel({"solver": "CLARABEL", "tol_feas": 1e-9}) == {"solver": "CLARABEL", "tol_feas": 1e-9,
                                                                       "max_threads": 1}
    assert serial_clarabel({"solver": "CLARABEL", "max_threads": 2})["max_threads"] == 2  # an explicit choice stays
    assert serial_clarabel({"solver": "OSQP"}) == {"solver": "OSQP"}


def test_the_controllers_cone_programs_are_solved_serially(monkeypatch):
    seen = []
    original = cp.Problem.solve

    def spy(self, *args, **kwargs):
        seen.append(kwargs)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(cp.Problem, "solve", spy)
    model = StateSpaceModel(A=np.array([[0.5]]), B=np.array([[1.0]]), C=np.array([[1.0]]), past_steps=1)
    limits = StimLimits(amplitude_min_ua=[-1.0], amplitude_max_ua=[1.0])
    ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=4).fit()
    plan = ctrl.plan(np.zeros((1, 1)), np.zeros((1, 1)), target=np.ones((4, 1)), use_fast_path=False)
    assert plan.status == "optimal"
    assert seen and all(kw.get("max_threads") == 1 for kw in seen if kw.get("solver") == "CLARABEL")


def test_the_l1_hankel_problem_is_solved_serially():
    from stimsteer.sysid.datadriven.l1 import _L1Solver
    from stimsteer.sysid import HankelBlocks

    rng = np.random.default_rng(1)
    blocks = HankelBlocks(Up=rng.normal(size=(2, 12)), Yp=rng.normal(size=(2, 12)), Uf=rng.normal(size=(3, 12)),
                          Yf=rng.normal(size=(3, 12)), compressed=False)
    assert _L1Solver(blocks, 1.0, None).options["max_threads"] == 1
    assert _L1Solver(blocks, 1.0, {"solver": "SCS"}).options == {"solver": "SCS"}


class _FailsAtTightTolerances:
    """A stand-in compiled problem: Clarabel's numerical failure at the tight tolerances, a solve at its defaults."""

    def __init__(self):
        self.calls = []

    def solve(self, **kwargs):
        self.calls.append(kwargs)
        if "tol_feas" in kwargs:
            raise cp.error.SolverError("Solver 'CLARABEL' failed.")


def test_a_numerical_failure_at_the_tight_tolerances_is_retried_once_at_the_solvers_defaults():
    from stimsteer.control.mpc._cone_solve import solve_compiled

    problem = _FailsAtTightTolerances()
    assert solve_compiled(problem, "CLARABEL") == ""
    assert [("tol_feas" in c, c["max_threads"]) for c in problem.calls] == [(True, 1), (False, 1)]
    # the caller's own options are the caller's choice: no retry, the failure is reported
    problem = _FailsAtTightTolerances()
    assert "CLARABEL failed" in solve_compiled(problem, "CLARABEL", {"tol_feas": 1e-10})
    assert len(problem.calls) == 1
