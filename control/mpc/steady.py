"""The steady-state target of a tracking cost, and the centre of the Riccati terminal cost built on it.

For the stage cost ``ℓ(x, u) = |G [x; u] − r|²_Q + |u|²_R`` (output kind: ``G = [C, D]``; state kind: ``G = [I, 0]``)
the steady-state target ``(x_s, u_s)`` minimises ``ℓ`` over the equilibria ``x = A x + B u`` (Rawlings, Mayne,
Diehl 2017, Model Predictive Control, Sec. 1.5, target calculation with input set-point zero). Its KKT system

    H z − Mᵀ μ = 2 Gᵀ Q r,    M z = 0,    H = 2 (Gᵀ Q G + diag(0, R)),    M = [I − A, −B]

depends on the target only through its right-hand side, so its pseudo-inverse is formed once. The multiplier ``μ``
turns the sum of stage costs into a constant, ``μᵀ(Δx_0 − Δx_N)`` and a quadratic in the deviations (the linear
terms telescope along the dynamics); a terminal cost ``Δx_Nᵀ W Δx_N + gᵀ Δx_N`` cancels the ``Δx_N`` term, and is
the quadratic ``(x_N − x_T)ᵀ W (x_N − x_T)`` centred at ``x_T = x_s − W⁺ g / 2`` up to a constant.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...sysid import InvalidParameterError

__all__ = ["SteadyState"]


@dataclass(frozen=True)
class SteadyState:
    """The equilibrium a tracking plan settles at.

    Attributes
    ----------
    x : ndarray, shape (n_states,)
        ``x_s``, with ``x_s = A x_s + B u_s``.
    u : ndarray, shape (n_inputs,)
        ``u_s``, µA.
    tracked : ndarray
        ``C x_s + D u_s`` (output kind, model units: the output offset removed) or ``x_s`` (state kind).
    exact : bool
        Some equilibrium gives the target exactly (then ``tracked`` misses it only by what the input weight
        trades for energy). False: no equilibrium gives it; ``(x_s, u_s)`` is the closest compromise.
    exact_residual : float
        Distance from the target to the closest equilibrium output (least squares, no input cost).
    """

    x: np.ndarray
    u: np.ndarray
    tracked: np.ndarray
    exact: bool
    exact_residual: float


class _SteadyTarget:
    """Pre-factored steady-state problem of one controller (model, weights, target kind)."""

    def __init__(self, model, Q, R, target_kind, W):
        A, B = np.asarray(model.A), np.asarray(model.B)
        n, m = B.shape
        if target_kind == "state":
            G = np.hstack([np.eye(n), np.zeros((n, m))])
        else:
            G = np.hstack([np.asarray(model.C), np.asarray(model.D)])
        J = np.zeros((n + m, n + m))
        J[n:, n:] = R
        H = 2.0 * (G.T @ Q @ G + J)
        M = np.hstack([np.eye(n) - A, -B])
        K = np.block([[H, -M.T], [M, np.zeros((n, n))]])
        self._n, self._m, self._G, self._Q, self._kind = n, m, G, Q, target_kind
        self._K, self._Kpinv = K, np.linalg.pinv(K)
        self._exact = np.vstack([M, G])
        self._exact_pinv = np.linalg.pinv(self._exact)
        self._W, self._Wpinv = W, np.linalg.pinv(W)

    def _kkt(self, r):
        n = self._n
        rhs = np.concatenate([2.0 * self._G.T @ self._Q @ r, np.zeros(n)])
        sol = self._Kpinv @ rhs
        if np.linalg.norm(self._K @ sol - rhs) > 1e-8 * max(1.0, float(np.linalg.norm(rhs))):
            raise InvalidParameterError(
                "the steady-state target problem has no solution for this target (its optimality conditions are "
                "inconsistent); use terminal_weight=None or a matrix terminal weight.")
        return sol[:n + self._m], sol[n + self._m:]

    def solve(self, r) -> SteadyState:
        """The steady state for target ``r`` (model units)."""
        z, _ = self._kkt(r)
        n = self._n
        rhs = np.concatenate([np.zeros(n), r])
        resid = float(np.linalg.norm(self._exact @ (self._exact_pinv @ rhs) - rhs))
        exact = resid <= 1e-8 * max(1.0, float(np.linalg.norm(r)))
        return SteadyState(x=z[:n].copy(), u=z[n:].copy(), tracked=self._G @ z, exact=bool(exact),
                           exact_residual=resid)

    def centre(self, r) -> np.ndarray:
        """``x_T = x_s − W⁺ g / 2``: the centre of the terminal quadratic for target ``r`` (read-only).

        A closed loop asks for the same target at most steps: the last answer is kept and given again for an equal
        ``r`` (a function of ``r`` alone, the same numbers)."""
        key = np.asarray(r, np.float64).tobytes()
        memo = getattr(self, "_centre_memo", None)
        if memo is not None and memo[0] == key:
            return memo[1]
        out = self._centre(r)
        out.flags.writeable = False
        self._centre_memo = (key, out)
        return out

    def _centre(self, r) -> np.ndarray:
        z, mu = self._kkt(r)
        xs = z[:self._n]
        g = mu - 2.0 * self._Q @ (xs - r) if self._kind == "state" else mu
        shift = self._Wpinv @ g
        if np.linalg.norm(self._W @ shift - g) > 1e-8 * max(1.0, float(np.linalg.norm(g))):
            raise InvalidParameterError(
                "the Riccati terminal cost is singular in a direction the steady-state target needs, so no "
                "quadratic terminal cost makes the plan the LQR tracking law; use terminal_weight=None.")
        return xs - 0.5 * shift
