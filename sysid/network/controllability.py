"""Controllability of a network: reachability matrices, Gramians, the Kalman rank test and per-site figures.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla

from ..exceptions import ConditioningWarning, InvalidParameterError, SessionError, UnstableModelError
from .lyapunov import stable_gramian, stable_gramians
from .systems import _as_model, _check_horizon, _dynamics, _frozen

__all__ = ["reachability_matrix", "controllability_gramian", "controllability", "site_controllability",
           "modal_controllability_values", "ControllabilityReport", "SiteControllability"]


# ---------------------------------------------------------------------------------------------------- Gramians
def reachability_matrix(system, horizon_steps: int) -> np.ndarray:
    """The map from an input sequence over ``T`` steps to the state it adds at step ``T``.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    horizon_steps : int
        ``T >= 1``.

    Returns
    -------
    R : ndarray, shape (n_states, T * n_inputs)
        ``R = [A^(T-1) B, ..., A B, B]`` so that ``x[T] = A^T x[0] + R vec(u)`` with ``vec(u) = u.reshape(-1)``
        time-major (``u[0]`` first). ``R Rᵀ`` is the finite-horizon Gramian ``W_T``; for ``T = n_states``, ``R``
        is the Kalman controllability matrix with its blocks in reverse order.
    """
    model = _as_model(system)
    return _reach(model.A, model.B, _check_horizon(horizon_steps, allow_none=False))


def _reach(A, B, T) -> np.ndarray:
    n, m = B.shape
    R = np.empty((n, T * m))
    AT, MT = np.ascontiguousarray(np.asarray(A).T), np.array(B).T.copy()  # (A^k B)ᵀ as rows: see impulse_response
    for k in range(T - 1, -1, -1):
        R[:, k * m:(k + 1) * m] = MT.T
        MT = MT @ AT
    return R


#: Largest Kalman matrix kept on a model by :func:`model_reach` (a 922-state model of 3 sites: 20 MB).
_KEPT_REACH_BYTES = 64e6


def model_reach(model) -> np.ndarray:
    """``[A^(n-1) B, ..., A B, B]`` of ``model``'s own ``A`` and ``B`` (``n`` states; read-only), kept on the model up
    to :data:`_KEPT_REACH_BYTES`: the Kalman rank and both output reports read it."""
    kept = model.__dict__.get("_reach")
    if kept is None:
        kept = _reach(np.array(model.A), np.array(model.B), max(model.n_states, 1))
        kept.setflags(write=False)
        if kept.nbytes <= _KEPT_REACH_BYTES:
            model.__dict__["_reach"] = kept
    return kept


def _gramian(A, B, T) -> np.ndarray:
    if T is None:
        W = stable_gramian(A, B @ B.T)
    else:
        W = np.zeros((A.shape[0], A.shape[0]))
        M = B.copy()
        for _ in range(T):
            W += M @ M.T
            M = A @ M
    return 0.5 * (W + W.T)


def model_gramians(model, sites, T) -> list:
    """The controllability Gramians of ``model``'s own ``A`` (not normalised) for each entry of ``sites`` (a tuple
    of column indices of ``B``; ``T`` steps or None for the infinite horizon, the caller having checked stability),
    kept on the model (read-only arrays, like its poles): ``stimsteer network`` asks for the all-site Gramian twice
    (the Kalman report and the output report) and for each site's (the site sets). The ones not kept yet are
    solved together (:func:`~stimsteer.sysid.network.lyapunov.stable_gramians`: the doubled sums share ``A``'s
    powers; each the same numbers as alone)."""
    memo = model.__dict__.setdefault("_gramians", {})
    keys = [(tuple(int(j) for j in idx), None if T is None else int(T)) for idx in sites]
    todo = list(dict.fromkeys(k for k in keys if k not in memo))
    if todo:
        A, B = np.array(model.A), np.array(model.B)
        if T is None:
            solved = [0.5 * (W + W.T) for W in stable_gramians(A, [B[:, list(i)] @ B[:, list(i)].T
                                                                   for i, _t in todo])]
        else:
            solved = [_gramian(A, B[:, list(i)], T) for i, _t in todo]
        for k, W in zip(todo, solved):
            W.setflags(write=False)
            memo[k] = W
    return [memo[k] for k in keys]


def _require_stable(A, purpose: str, radius: float | None = None) -> None:
    """Refuse an unstable ``A``; ``radius``: its spectral radius where the caller has it (a model's poles)."""
    rho = radius if radius is not None else float(np.max(np.abs(np.linalg.eigvals(A)))) if A.size else 0.0
    if rho >= 1.0:
        raise UnstableModelError(
            f"{purpose} needs a stable model, but the spectral radius is {rho:.4f} >= 1. Give a finite "
            "horizon_steps, pass normalise=True (A / (1 + sigma_max(A))), or refit a stable model."
        )


def controllability_gramian(system, horizon_steps: int | None = None, *, normalise: bool = False) -> np.ndarray:
    """Controllability Gramian over a finite horizon, or over the infinite horizon.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    horizon_steps : int, optional
        ``T``: sum the first ``T`` terms. Default (None): the infinite horizon.
    normalise : bool, default False
        Use ``A / (1 + sigma_max(A))`` instead of ``A`` (see :func:`normalised_network`).

    Returns
    -------
    W : ndarray, shape (n_states, n_states)
        Symmetric positive semi-definite, in (input units)² · (state units / input units)².

    Raises
    ------
    UnstableModelError
        For the infinite horizon when ``A`` (after the optional normalisation) has spectral radius >= 1.

    Notes
    -----
    ``W_T = sum_{k<T} A^k B Bᵀ (A^k)ᵀ``; ``W_inf`` solves ``W = A W Aᵀ + B Bᵀ``
    (:func:`scipy.linalg.solve_discrete_lyapunov`), and ``W_T → W_inf`` as ``T → ∞`` for a stable ``A``.
    """
    model = _as_model(system)
    A, _ = _dynamics(model, normalise)
    T = _check_horizon(horizon_steps, allow_none=True)
    if T is None:
        _require_stable(A, "the infinite-horizon Gramian", None if normalise else model.spectral_radius)
    return _gramian(A, np.array(model.B), T)


@dataclass(frozen=True)
class ControllabilityReport:
    """Controllability of a linear model.

    Attributes
    ----------
    n_states : int
    rank : int
        Numerical rank of the Kalman matrix ``[B, AB, ..., A^(n-1) B]``.
    rank_tol : float
        Singular values above this count towards ``rank``.
    kalman_singular_values : ndarray, shape (n_states,)
        Singular values of the Kalman matrix, descending (padded with zeros when it has fewer columns than rows).
    is_controllable : bool
        ``rank == n_states``.
    horizon_steps : int or None
        Horizon of the Gramian; None for the infinite horizon.
    gramian : ndarray, shape (n_states, n_states)
    gramian_eigenvalues : ndarray, shape (n_states,)
        Descending.
    condition_number : float
        ``λ_max / λ_min`` of the Gramian; ``inf`` when it is singular to rounding.
    average_controllability : float
        ``trace(W)``: the mean output energy of the states driven by white unit inputs on every site.
    normalisation : str
        The scaling applied to ``A`` for the Gramian: ``"none"`` or ``"A / (1 + sigma_max(A)), sigma_max = ..."``.
        The Kalman rank always uses ``A`` itself (scaling does not change it).
    """

    n_states: int
    rank: int
    rank_tol: float
    kalman_singular_values: np.ndarray
    is_controllable: bool
    horizon_steps: int | None
    gramian: np.ndarray
    gramian_eigenvalues: np.ndarray
    condition_number: float
    average_controllability: float
    normalisation: str


def _kalman_rank(model, rank_tol):
    n = model.n_states
    K = model_reach(model)
    sv = np.linalg.svd(K, compute_uv=False) if K.size else np.zeros(0)
    sv = np.concatenate([sv, np.zeros(max(n - sv.size, 0))])[:n]
    if rank_tol is None:
        rank_tol = max(K.shape) * np.finfo(float).eps * (sv[0] if sv.size else 0.0)
    rank_tol = float(rank_tol)
    if not np.isfinite(rank_tol) or rank_tol < 0:
        raise SessionError(f"rank_tol must be a finite number >= 0; got {rank_tol}.")
    return int(np.sum(sv > rank_tol)), rank_tol, sv


def _condition(eig) -> float:
    if eig.size == 0:
        return 1.0
    top = eig[0]
    if top <= 0 or eig[-1] <= eig.size * np.finfo(float).eps * top:
        return float("inf")
    return float(top / eig[-1])


def controllability(system, *, horizon_steps: int | None = None, normalise: bool = False,
                    rank_tol: float | None = None) -> ControllabilityReport:
    """Kalman rank, Gramian, its spectrum and condition, and the average controllability of a model.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    horizon_steps : int, optional
        Gramian horizon; default the infinite horizon (needs a stable ``A``).
    normalise : bool, default False
        Scale ``A`` to ``A / (1 + sigma_max(A))`` for the Gramian (off by default for fitted models, whose ``A``
        already has the dynamics of the data; common for structural networks, Gu et al. 2015).
    rank_tol : float, optional
        Absolute tolerance on the Kalman matrix's singular values. Default
        ``max(n_states, n_states * n_inputs) * eps * sigma_max`` (the rule of :func:`numpy.linalg.matrix_rank`).

    Returns
    -------
    ControllabilityReport

    Raises
    ------
    UnstableModelError
        For the infinite horizon on an unstable ``A``.

    Notes
    -----
    The Kalman matrix holds powers of ``A`` up to ``n - 1`` and is badly scaled for many states (its columns shrink
    or grow geometrically), so for large ``n`` its numerical rank can understate controllability; the Gramian's
    smallest eigenvalue and condition number are then the more reliable figures.

    References
    ----------
    Kalman, Ho, Narendra (1963); Pasqualetti, Zampieri, Bullo (2014), Sec. III (trace of the Gramian).
    """
    model = _as_model(system)
    rank, tol, sv = _kalman_rank(model, rank_tol)
    A, norm = _dynamics(model, normalise)
    T = _check_horizon(horizon_steps, allow_none=True)
    if T is None:  # the model's poles (computed once per model) unless A was normalised
        _require_stable(A, "the infinite-horizon Gramian", None if normalise else model.spectral_radius)
    W = _gramian(A, np.array(model.B), T) if normalise else model_gramians(model, [range(model.n_inputs)], T)[0]
    eig = np.sort(np.linalg.eigvalsh(W))[::-1] if W.size else np.zeros(0)
    eig = np.clip(eig, 0.0, None)
    n = model.n_states
    return ControllabilityReport(
        n_states=n, rank=rank, rank_tol=tol, kalman_singular_values=_frozen(sv), is_controllable=rank == n,
        horizon_steps=T, gramian=_frozen(W), gramian_eigenvalues=_frozen(eig), condition_number=_condition(eig),
        average_controllability=float(np.trace(W)), normalisation=norm,
    )


# ---------------------------------------------------------------------------------------------------- per site
@dataclass(frozen=True)
class SiteControllability:
    """Average and modal controllability of each stimulation site (each column of ``B``).

    Attributes
    ----------
    site_names : tuple of str
    average : ndarray, shape (n_sites,)
        ``trace(W_j)`` with ``W_j`` the Gramian of site ``j`` alone (``b_j`` the ``j``-th column of ``B``).
    modal : ndarray, shape (n_sites,)
        ``phi_j = sum_i (1 - |lambda_i|²) |w_iᴴ b_j|²`` over the eigenvalues ``lambda_i`` of ``A`` with unit-norm
        left eigenvectors ``w_i``.
    horizon_steps : int or None
        Horizon of the average controllability; None for the infinite horizon.
    normalisation : str
        Scaling applied to ``A`` (see :class:`ControllabilityReport`).
    """

    site_names: tuple
    average: np.ndarray
    modal: np.ndarray
    horizon_steps: int | None
    normalisation: str

    def to_frame(self):
        """A table (pandas DataFrame) with one row per site."""
        import pandas as pd

        return pd.DataFrame({"site": list(self.site_names), "average_controllability": self.average,
                             "modal_controllability": self.modal})


def site_controllability(system, *, horizon_steps: int | None = None,
                         normalise: bool = False) -> SiteControllability:
    """Average and modal controllability of every stimulation site.

    For an explicit network matrix (``system=(A,)`` so that ``B = I``) the sites are the nodes, which gives the
    per-node values of Gu et al. (2015).

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    horizon_steps : int, optional
        Horizon of the average controllability; default infinite (needs a stable ``A``).
    normalise : bool, default False
        Use ``A / (1 + sigma_max(A))``; the result records which scaling was used.

    Returns
    -------
    SiteControllability

    Raises
    ------
    UnstableModelError
        When ``A`` (after the optional normalisation) is not stable and the infinite horizon is asked for, or
        always for modal controllability (its weights ``1 - |lambda|²`` assume decaying modes).

    Notes
    -----
    Average controllability of site ``j``: ``trace(W_j) = b_jᵀ P b_j`` with ``P = sum_k (A^k)ᵀ A^k``
    (``P`` solves ``P = Aᵀ P A + I``). For a symmetric ``A`` and ``b_j = e_j`` this is ``[(I - A²)⁻¹]_jj``.
    Modal controllability generalises Pasqualetti et al. (2014) / Gu et al. (2015), where ``A`` is symmetric and
    ``w_i = v_i``; then ``phi_j = 1 - sum_k A_jk²``. Both scale with ``||b_j||²``. See
    :func:`modal_controllability_values` for repeated eigenvalues, non-normal and defective ``A``.
    """
    model = _as_model(system)
    A, norm = _dynamics(model, normalise)
    T = _check_horizon(horizon_steps, allow_none=True)
    _require_stable(A, "modal controllability (and the infinite-horizon average controllability)",
                    None if normalise else model.spectral_radius)
    B = np.array(model.B)
    average = average_controllability_values(A, B, T)
    modal = modal_controllability_values(A, B)
    return SiteControllability(site_names=tuple(model.input_names), average=_frozen(average), modal=_frozen(modal),
                               horizon_steps=T, normalisation=norm)


def average_controllability_values(A, B, horizon_steps=None) -> np.ndarray:
    """``trace(W_j) = b_jᵀ P b_j`` of every column of ``B``, ``P = Aᵀ P A + I`` (or its ``T``-term sum).

    ``A`` must be stable for the infinite horizon (checked by the callers).
    """
    n = A.shape[0]
    if horizon_steps is None:
        P = stable_gramian(A.T, np.eye(n))
    else:
        P = _gramian(A.T, np.eye(n), horizon_steps)
    return np.einsum("ij,ik,kj->j", B, P, B)


# ---------------------------------------------------------------------------------------------------- modal
#: Eigenvector condition number above which a non-normal ``A`` is treated as defective (no eigenbasis to rounding).
DEFECTIVE_CONDITION = 1e10
#: Eigenvector condition number above which the warning for a non-normal ``A`` calls the figure fragile.
LARGE_CONDITION = 1e3


def modal_controllability_values(A, B) -> np.ndarray:
    """Modal controllability ``phi_j = sum_i (1 - |lambda_i|²) |w_iᴴ b_j|²`` of every column of ``B``.

    Parameters
    ----------
    A : ndarray, shape (n, n)
        Stable network matrix (spectral radius < 1).
    B : ndarray, shape (n, m)

    Returns
    -------
    ndarray, shape (m,)

    Raises
    ------
    InvalidParameterError
        When ``A`` is defective (no basis of eigenvectors: the eigenvector matrix has condition number above
        :data:`DEFECTIVE_CONDITION`), where modal controllability is not defined.

    Warns
    -----
    ConditioningWarning
        For a non-normal ``A``: the figure then depends on how the left eigenvectors are scaled (unit norm here,
        the definition of Pasqualetti et al. 2014) and, inside a repeated eigenvalue, on the basis chosen; the
        warning gives the eigenvector condition number.

    Notes
    -----
    For a normal ``A`` (``A Aᴴ = Aᴴ A``; symmetric ``A`` in particular) the complex Schur form ``A = Z T Zᴴ`` has a
    diagonal ``T`` and a unitary ``Z``: its columns are an orthonormal eigenbasis, also inside repeated eigenvalues,
    and then ``sum_i (1 - |lambda_i|²) |z_iᴴ b|² = bᵀ (I - A Aᴴ) b``, the closed form (for ``b = e_j``:
    ``1 - sum_k A_jk²``; Pasqualetti, Zampieri, Bullo 2014; Gu et al. 2015). Eigenvectors computed one by one
    (``scipy.linalg.eig``) are not orthogonal inside a repeated eigenspace, which made the figure wrong there.
    For a non-normal, diagonalisable ``A`` the left eigenvectors ``w_i`` (rows of ``V⁻¹``, scaled to unit norm)
    are used.
    """
    A = np.asarray(A, dtype=np.float64)
    B = np.asarray(B, dtype=np.float64)
    n = A.shape[0]
    if n == 0:
        return np.zeros(B.shape[1])
    scale = max(float(np.linalg.norm(A, 2)), np.finfo(float).tiny)
    if np.linalg.norm(A @ A.T - A.T @ A, 2) <= 1e3 * n * np.finfo(float).eps * scale ** 2:
        T, Z = sla.schur(A.astype(complex), output="complex")
        lam, W = np.diag(T), Z
    else:
        lam, V = sla.eig(A)
        cond = float(np.linalg.cond(V))
        if not np.isfinite(cond) or cond > DEFECTIVE_CONDITION:
            raise InvalidParameterError(
                f"A is defective (its eigenvectors do not form a basis; eigenvector condition number {cond:.3g}), so "
                "modal controllability is not defined. Use the average controllability or the output Gramian figures."
            )
        W = np.linalg.inv(V).conj().T
        W = W / np.linalg.norm(W, axis=0, keepdims=True)
        fragile = " (large: the figure is sensitive to rounding and to the scaling of the eigenvectors)" \
            if cond > LARGE_CONDITION else ""
        warnings.warn(
            f"A is not normal, so modal controllability uses unit-norm left eigenvectors and depends on that "
            f"convention; eigenvector condition number {cond:.3g}{fragile}.", ConditioningWarning, stacklevel=3)
    return ((1.0 - np.abs(lam) ** 2)[:, None] * np.abs(W.conj().T @ B) ** 2).sum(axis=0)
