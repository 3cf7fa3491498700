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
