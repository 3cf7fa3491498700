"""One solve of a controller's compiled cvxpy problem: tolerances, a serial Clarabel, one retry at the defaults.

Clarabel's default tolerances (1e-8) leave plans ~1e-5 apart on flat objectives; tighter ones (below) cost a few
iterations and make the plain path a reference for the fast one. On some data the tight tolerances end in a
numerical failure where the defaults solve (seen on a robust ensemble loop under a binding energy budget: step 24
of 60 failed on one machine); such a solve is tried once more with the solver's own defaults before the plan falls
back. The answer is checked and projected onto the hard limits by the controller either way, so a looser solve is
never a looser limit. ``solver_options`` given by the caller replace the tight tolerances and are not retried.
"""

from __future__ import annotations

import warnings


from ...sysid._threads import serial_clarabel
from ...sysid._lazy import lazy_module

cp = lazy_module("cvxpy")  # imported at the first plan that needs it (sysid/_lazy.py)

__all__: list = []

_TIGHT = {"CLARABEL": {"tol_gap_abs": 1e-9, "tol_gap_rel": 1e-9, "tol_feas": 1e-9}}


class LazyProblem:
    """A controller's cvxpy problem, built by its method ``build`` at the first use (a cvxpy solve, or any attribute
    of the problem: ``is_dpp()``, ``parameters()`` …, which it passes on).

    Plans that the dense path solves never need it, and then cvxpy is not even imported (2–3 s of a command's
    start-up, and of each benchmark worker's). It keeps its controller, so a copy of the controller copies it whole.
    """

    def __init__(self, owner, build: str):
        self._owner, self._build, self._problem = owner, build, None

    def ready(self):
        """The cvxpy problem, built now if it was not yet (its Parameters and Variables set on the controller)."""
        if self._problem is None:
            self._problem = getattr(self._owner, self._build)()
        return self._problem

    def __getattr__(self, name):
        if name.startswith("__") or name in ("_owner", "_build", "_problem"):
            raise AttributeError(name)
        return getattr(self.ready(), name)

    def __repr__(self) -> str:
        return f"LazyProblem({'built' if self._problem is not None else 'not built yet'})"


def ready(problem):
    """The cvxpy problem of a :class:`LazyProblem` (built now), or ``problem`` itself."""
    return problem.ready() if isinstance(problem, LazyProblem) else problem


def solve_compiled(problem, solver: str, solver_options=None) -> str:
    """Solve ``problem`` in place; ``""`` on success (any status), else the failure's text."""
    tries = [{**_TIGHT.get(solver, {}), **(solver_options or {})}]
    if not solver_options and solver in _TIGHT:
        tries.append({})
    for i, opts in enumerate(tries):
        try:
            with warnings.catch_warnings():  # an inaccurate solve is reported in the plan's status instead
                warnings.simplefilter("ignore", UserWarning)
                # the compiled problem is reused (DPP cache) either way; no solver warm start, so that the same
                # data give the same plan whatever was solved before; serial: a forked worker never waits on a pool
                problem.solve(warm_start=False, **serial_clarabel({"solver": solver, **opts}))
            return ""
        except (cp.error.SolverError, ArithmeticError, ValueError) as exc:
            if i == len(tries) - 1:
                return f"{solver} failed: {exc}"
    return ""  # pragma: no cover - the loop always returns
