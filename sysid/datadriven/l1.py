"""The ℓ1-regularised Hankel problem, built once in cvxpy (:class:`_L1Solver`), for :class:`HankelPredictor`."""

from __future__ import annotations

import numpy as np

from .._threads import serial_clarabel
from ..exceptions import SolverError


class _L1Solver:
    """The ℓ1 problem built once in cvxpy with Parameters (DPP); each solve only assigns values."""

    def __init__(self, blocks: HankelBlocks, lam_y: float, solver_options):
        import cvxpy as cp

        self._cp = cp
        Up, Yp, Uf = blocks.Up, blocks.Yp, blocks.Uf
        self.g = cp.Variable(Up.shape[1])
        self.up, self.yp, self.uf = (cp.Parameter(B.shape[0]) for B in (Up, Yp, Uf))
        self.lam = cp.Parameter(nonneg=True)
        cost = lam_y * cp.sum_squares(Yp @ self.g - self.yp) + self.lam * cp.norm1(self.g)
        self.problem = cp.Problem(cp.Minimize(cost), [Up @ self.g == self.up, Uf @ self.g == self.uf])
        self.sizes = (Up.shape[0], Yp.shape[0])
        # serial: a forked worker never waits on the parent's thread pool (sysid/_threads.py)
        self.options = serial_clarabel({"solver": "CLARABEL", **(solver_options or {})})

    def solve(self, b: np.ndarray, lam: float) -> np.ndarray:
        nu, ny = self.sizes
        self.up.value, self.yp.value, self.uf.value = b[:nu], b[nu:nu + ny], b[nu + ny:]
        self.lam.value = float(lam)
        try:
            self.problem.solve(**self.options)
        except self._cp.error.SolverError as exc:
            raise SolverError(f"the l1 Hankel problem could not be solved ({exc}); try solver_options="
                              "{'solver': 'CLARABEL'} or the 'projection' regularizer.") from None
        if self.problem.status not in ("optimal", "optimal_inaccurate") or self.g.value is None:
            raise SolverError(
                f"the l1 Hankel problem ended with status {self.problem.status!r}; expected 'optimal'. Try another "
                "solver via solver_options or the 'projection' regularizer."
            )
        return np.asarray(self.g.value, dtype=np.float64)
