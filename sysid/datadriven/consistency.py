"""Choosing the Hankel predictor's regularisation strength when held-out prediction cannot: plan/predictor
consistency.

When ``D = [Up; Yp; Uf]`` has full row rank (noisy data), every strength ``λ_g > 0`` of the ℓ2 and projection
regularisers gives the same prediction (``g = D⁺ b`` meets the constraints with zero slack and zero penalty;
Dörfler, Coulson, Markovsky 2023), so held-out errors tie to rounding (issue 13 measured a spread of 1e-15). Inside
a controller, however, the plan chooses ``g`` together with the inputs: along directions ``δ`` that keep the inputs
(``Up δ = 0``, ``Uf δ = 0``) it can move the predicted outputs ``Yf δ`` at the price of the slack and the penalty
only, ``λ_y ||Yp δ||² + λ_g R(δ)``. The **plan gap**

    γ(λ_g) = max_δ ||Yf δ||² / (λ_y ||Yp δ||² + λ_g ||M δ||²)     over δ with [Up; Uf] δ = 0,

(a generalised eigenvalue) is how much squared output a plan can claim per unit of that price: the larger, the
further the plan's predicted outputs can drift from the predictor's own prediction of the same inputs (issue 13
measured 0.69 at a small strength). The rule of :class:`~stimsteer.sysid.datadriven.HankelPredictor`: the lowest
held-out error wins; candidates within :data:`TIE_TOLERANCE` (relative) of it are ranked by the plan gap, the
smallest winning. It is computed on the unit-RMS channels the predictor is fitted on.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

__all__ = ["TIE_TOLERANCE", "plan_gaps", "plan_gaps_coordinate", "choose_consistent", "consistent_choice"]

#: Held-out errors within this relative distance of the best count as a tie (rounding of the fold solves is
#: ~1e-15; real differences between strengths on held-out trials are many orders larger). Our own threshold.
TIE_TOLERANCE = 1e-6


def plan_gaps(blocks, M, lambdas_abs, lam_y: float) -> np.ndarray:
    """``γ(λ_g)`` for each absolute strength (``M`` None: the identity, the ℓ2 regulariser)."""
    A = np.vstack([blocks.Up, blocks.Uf])
    N = sla.null_space(A)
    if N.shape[1] == 0:
        return np.zeros(len(lambdas_abs))
    YfN, YpN = blocks.Yf @ N, blocks.Yp @ N
    S = YfN.T @ YfN
    base = lam_y * (YpN.T @ YpN)
    R = N.T @ N if M is None else N.T @ (M @ N)
    out = []
    for lam in lambdas_abs:
        H = base + lam * R
        H = 0.5 * (H + H.T)
        try:
            top = sla.eigh(0.5 * (S + S.T), H, eigvals_only=True, subset_by_index=[S.shape[0] - 1] * 2)
            out.append(float(top[0]))
        except (np.linalg.LinAlgError, ValueError):
            out.append(np.inf)
    return np.asarray(out)


def _tied(table) -> tuple[np.ndarray, int]:
    """Indices of the candidates tied with the lowest held-out error (within TIE_TOLERANCE; all of them where no
    error is finite), and the number of candidates."""
    err = table["validation_error"].to_numpy(dtype=np.float64)
    if not np.isfinite(err).any():
        return np.arange(err.size), err.size
    return np.flatnonzero(err <= np.nanmin(err) * (1.0 + TIE_TOLERANCE) + 1e-300), err.size


def choose_consistent(table, gaps: np.ndarray) -> int:
    """Index of the chosen candidate: lowest held-out error, ties (TIE_TOLERANCE) broken by the smallest gap."""
    tied, _n = _tied(table)
    return int(tied[np.argmin(np.asarray(gaps)[tied])])


def consistent_choice(table, gaps: np.ndarray, strengths) -> tuple[float, tuple]:
    """The chosen strength (:func:`choose_consistent`) and the selection's notes: when held-out errors tie, one note
    saying so and that the plan gap chose among them (a user reading equal errors in the table learns why)."""
    chosen = choose_consistent(table, gaps)
    tied, n = _tied(table)
    if tied.size < 2:
        return float(strengths[chosen]), ()
    return float(strengths[chosen]), (
        f"the held-out errors of {tied.size} of {n} strengths tie (within {TIE_TOLERANCE:g}, relative): on data "
        "whose past and future-input rows have full rank every strength predicts alike. The smallest plan gap chose "
        f"among them: {float(strengths[chosen]):g}, whose plans can drift least from the predictor's own prediction "
        "(column plan_gap).",)


def plan_gaps_coordinate(theta_y: np.ndarray, yf2: np.ndarray, lambdas_abs, lam_y: float) -> np.ndarray:
    """``γ(λ_g)`` of the projection regulariser when ``D = [D1 0]`` and ``M = diag(0, I)`` (a Cholesky factor).

    Directions keeping the inputs are ``δ = [D1⁻¹ E_Y w; δ2]`` (``w`` a past-output direction, ``δ2`` free), with
    ``Yp δ = w``, ``||M δ|| = ||δ2||`` and ``Yf δ = Θ_Y w + Yf2 δ2`` (``Θ_Y`` the past-output columns of
    ``Yf1 D1⁻¹``), so ``γ(λ_g) = λ_max(Θ_Y Θ_Yᵀ / λ_y + Yf2 Yf2ᵀ / λ_g)``: one symmetric eigenvalue of the size of
    the predicted outputs per strength, the same number :func:`plan_gaps` finds over the null space.
    """
    P = (theta_y @ theta_y.T) / lam_y
    S = yf2 @ yf2.T
    n = P.shape[0]
    out = []
    for lam in lambdas_abs:
        H = S / lam
        H += P  # P + S / lam (the same numbers), one n × n temporary fewer
        top = _largest_eigenvalue(H) if n >= LANCZOS_ROWS else None
        if top is None:
            try:
                top = float(sla.eigh(H, eigvals_only=True, subset_by_index=[n - 1, n - 1], check_finite=False)[0])
            except (np.linalg.LinAlgError, ValueError):
                top = np.inf
        out.append(top)
    return np.asarray(out)


#: Size of ``H`` from which :func:`plan_gaps_coordinate` finds its largest eigenvalue by Lanczos iterations
#: (ARPACK, to machine precision) instead of a tridiagonal reduction: at 1,000 rows (past 100 / horizon 50,
#: 20 outputs) 7 reductions took 0.9 s of CPU. Below it, the dense computation of before.
LANCZOS_ROWS = 512


def _largest_eigenvalue(H: np.ndarray) -> float | None:
    """``λ_max`` of the symmetric positive semi-definite ``H`` by implicitly restarted Lanczos (ARPACK ``dsaupd``;
    Lehoucq, Sorensen & Yang 1998, ARPACK Users' Guide), fixed start vector; None where it does not converge
    (the caller then reduces ``H``)."""
    from scipy.sparse.linalg import ArpackError, ArpackNoConvergence, eigsh

    try:
        top = eigsh(H, k=1, which="LA", tol=0.0, v0=np.ones(H.shape[0]), return_eigenvectors=False)
    except (ArpackNoConvergence, ArpackError):
        return None
    return float(top[0]) if np.isfinite(top[0]) else None
