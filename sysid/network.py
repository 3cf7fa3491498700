"""Network-control figures of a linear model: responses, controllability, minimum-energy transitions.

A fitted :class:`~stimsteer.sysid.statespace.StateSpaceModel` (or any matrices ``(A, B, C)``) is read as a network
whose nodes are the states, whose stimulation sites are the columns of ``B`` and whose recorded channels are the
rows of ``C``:

    x[k+1] = A x[k] + B u[k],        y[k] = C x[k] + D u[k].

Everything here is noise-free and deterministic. Every function takes ``system``: a ``StateSpaceModel`` or a tuple
``(A,)``, ``(A, B)``, ``(A, B, C)`` or ``(A, B, C, D)`` (missing ``B`` / ``C`` default to the identity: one input
site and one recorded channel per node, the setting of the network-control literature).

References
----------
Kalman R.E., Ho Y.C., Narendra K.S. (1963), Controllability of linear dynamical systems, Contrib. Diff. Eq. 1:189.
Pasqualetti F., Zampieri S., Bullo F. (2014), Controllability metrics, limitations and algorithms for complex
networks, IEEE Trans. Control Netw. Syst. 1:40.
Gu S. et al. (2015), Controllability of structural brain networks, Nat. Commun. 6:8414.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
import scipy.signal as ssig

from .exceptions import SessionError, UnstableModelError
from .statespace import StateSpaceModel

__all__ = [
    "network_model",
    "normalised_network",
    "impulse_responses",
    "controlled_response",
    "reachability_matrix",
    "controllability_gramian",
    "controllability",
    "site_controllability",
    "pattern_to_state",
    "minimum_energy_transition",
    "pattern_transition",
    "rank_sites",
    "ControlledResponse",
    "ControllabilityReport",
    "SiteControllability",
    "PatternState",
    "EnergyTransition",
    "PatternTransition",
    "SiteRanking",
    "NORMALISATION_NONE",
    "NORMALISATION_SIGMA",
]

NORMALISATION_NONE = "none"
NORMALISATION_SIGMA = "A / (1 + sigma_max(A))"

# Sets of sites ranked in one call; beyond this the ranking is slow and the table unreadable.
_MAX_SETS = 200_000


def _frozen(a, dtype=np.float64) -> np.ndarray:
    a = np.array(a, dtype=dtype, copy=True)
    a.setflags(write=False)
    return a


# ---------------------------------------------------------------------------------------------------- systems
def network_model(A, B=None, C=None, D=None, *, sample_rate_hz: float = 1.0) -> StateSpaceModel:
    """A noise-free :class:`StateSpaceModel` from explicit network matrices.

    Parameters
    ----------
    A : array_like, shape (n_nodes, n_nodes)
        Network (coupling) matrix, one step of the dynamics.
    B : array_like, shape (n_nodes, n_sites), optional
        Input matrix; default the identity (every node is a stimulation site, named ``node0, node1, ...``).
    C : array_like, shape (n_channels, n_nodes), optional
        Read-out matrix; default the identity (every node is recorded).
    D : array_like, shape (n_channels, n_sites), optional
        Feed-through; default zero.
    sample_rate_hz : float, default 1.0

    Returns
    -------
    StateSpaceModel

    Raises
    ------
    SessionError
        When a matrix has the wrong shape or holds NaN / inf.
    """
    A = np.atleast_2d(np.asarray(A, dtype=np.float64))
    if A.ndim != 2 or A.shape[0] != A.shape[1]:
        raise SessionError(f"the network matrix A must be square (n_nodes, n_nodes); got shape {A.shape}.")
    n = A.shape[0]
    nodes = tuple(f"node{i}" for i in range(n))
    B = np.eye(n) if B is None else B
    C = np.eye(n) if C is None else C
    B_arr = np.asarray(B, dtype=np.float64)
    C_arr = np.asarray(C, dtype=np.float64)
    if B_arr.ndim == 1:
        B_arr = B_arr[:, None]
    if B_arr.ndim != 2 or B_arr.shape[0] != n:
        raise SessionError(f"B must have shape ({n}, n_sites) for a {n}-node network; got {B_arr.shape}.")
    if C_arr.ndim == 1:
        C_arr = C_arr[None, :]
    if C_arr.ndim != 2 or C_arr.shape[1] != n:
        raise SessionError(f"C must have shape (n_channels, {n}) for a {n}-node network; got {C_arr.shape}.")
    in_names = nodes if B_arr.shape == (n, n) and np.array_equal(B_arr, np.eye(n)) else None
    out_names = nodes if C_arr.shape == (n, n) and np.array_equal(C_arr, np.eye(n)) else None
    return StateSpaceModel(A=A, B=B_arr, C=C_arr, D=D, sample_rate_hz=sample_rate_hz,
                           input_names=in_names, output_names=out_names)


def _as_model(system) -> StateSpaceModel:
    if isinstance(system, StateSpaceModel):
        return system
    if isinstance(system, (tuple, list)) and 1 <= len(system) <= 4:
        return network_model(*system)
    raise SessionError(
        f"system must be a StateSpaceModel or a tuple (A,), (A, B), (A, B, C) or (A, B, C, D); got "
        f"{type(system).__name__}. Build one with network_model(A, B, C)."
    )


def normalised_network(A) -> tuple[np.ndarray, float]:
    """The network matrix scaled as ``A / (1 + sigma_max(A))`` and the ``sigma_max`` used.

    Notes
    -----
    Dividing by one plus the largest singular value makes every singular value, hence the spectral radius, smaller
    than one, so infinite-horizon Gramians exist (Gu et al. 2015, Methods; the common choice in network neuroscience).

    Examples
    --------
    >>> An, s = normalised_network(np.diag([3.0, 1.0]))
    >>> float(An[0, 0]), s
    (0.75, 3.0)
    """
    A = np.atleast_2d(np.asarray(A, dtype=np.float64))
    smax = float(np.linalg.norm(A, 2)) if A.size else 0.0
    return A / (1.0 + smax), smax


def _dynamics(model: StateSpaceModel, normalise: bool) -> tuple[np.ndarray, str]:
    if not normalise:
        return np.array(model.A), NORMALISATION_NONE
    An, smax = normalised_network(model.A)
    return An, f"{NORMALISATION_SIGMA}, sigma_max = {smax:.6g}"


def _check_horizon(horizon_steps, allow_none: bool) -> int | None:
    if horizon_steps is None:
        if allow_none:
            return None
        raise SessionError("horizon_steps is required (a whole number of samples >= 1).")
    if isinstance(horizon_steps, bool) or int(horizon_steps) != horizon_steps or int(horizon_steps) < 1:
        raise SessionError(
            f"horizon_steps must be a whole number of samples >= 1; got {horizon_steps!r}. Give the number of "
            "model steps (seconds x sample_rate_hz)."
        )
    return int(horizon_steps)


# ---------------------------------------------------------------------------------------------------- responses
@dataclass(frozen=True)
class ControlledResponse:
    """The response of a linear model to an input pattern, split into its free and driven parts.

    Attributes
    ----------
    y : ndarray, shape (n_samples, n_outputs)
        Total response ``free + forced``.
    free : ndarray, shape (n_samples, n_outputs)
        Response to the initial state alone, ``C A^k x0``.
    forced : ndarray, shape (n_samples, n_outputs)
        Convolution of the impulse responses with the input, ``sum_j h[j] u[k - j]``.
    x0 : ndarray, shape (n_states,)
    """

    y: np.ndarray
    free: np.ndarray
    forced: np.ndarray
    x0: np.ndarray


def impulse_responses(system, n_steps: int) -> np.ndarray:
    """Impulse responses from every stimulation site to every recorded channel.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    n_steps : int
        Number of samples, at least 1.

    Returns
    -------
    h : ndarray, shape (n_steps, n_outputs, n_inputs)
        ``h[k, i, j]`` is the output on channel ``i``, ``k`` samples after a unit impulse at site ``j``:
        ``h[0] = D``, ``h[k] = C A^(k-1) B`` (the Markov parameters).
    """
    return _as_model(system).impulse_response(_check_horizon(n_steps, allow_none=False))


def controlled_response(system, u, x0=None) -> ControlledResponse:
    """Response to an input pattern as the free part plus the convolution of impulse responses with the input.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    u : array_like, shape (n_samples, n_inputs)
        Input pattern (units of the model's inputs).
    x0 : array_like, shape (n_states,), optional
        Initial state; default rest (zero).

    Returns
    -------
    ControlledResponse

    Notes
    -----
    ``y[k] = C A^k x0 + sum_{j=0}^{k} h[j] u[k-j]``; the convolution is done by :func:`scipy.signal.fftconvolve`
    along time. It equals :meth:`StateSpaceModel.simulate` up to rounding (tested).
    """
    model = _as_model(system)
    u = model._check_u(u)
    n, T = model.n_states, u.shape[0]
    x0 = np.zeros(n) if x0 is None else np.asarray(x0, dtype=np.float64).reshape(-1)
    if x0.shape != (n,) or not np.all(np.isfinite(x0)):
        raise SessionError(f"x0 must be a finite vector of {n} states; got shape {x0.shape}.")
    free = np.empty((T, model.n_outputs))
    x = x0.copy()
    for k in range(T):
        free[k] = model.C @ x
        x = model.A @ x
    if T == 0:
        forced = np.zeros((0, model.n_outputs))
    else:
        h = model.impulse_response(T)
        forced = ssig.fftconvolve(h, u[:, None, :], axes=0)[:T].sum(axis=2)
    return ControlledResponse(y=_frozen(free + forced), free=_frozen(free), forced=_frozen(forced), x0=_frozen(x0))


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
    M = B.copy()
    for k in range(T - 1, -1, -1):
        R[:, k * m:(k + 1) * m] = M
        M = A @ M
    return R


def _gramian(A, B, T) -> np.ndarray:
    if T is None:
        W = sla.solve_discrete_lyapunov(A, B @ B.T)
    else:
        W = np.zeros((A.shape[0], A.shape[0]))
        M = B.copy()
        for _ in range(T):
            W += M @ M.T
            M = A @ M
    return 0.5 * (W + W.T)


def _require_stable(A, purpose: str) -> None:
    rho = float(np.max(np.abs(np.linalg.eigvals(A)))) if A.size else 0.0
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
        _require_stable(A, "the infinite-horizon Gramian")
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


def _kalman_rank(A, B, rank_tol):
    n = A.shape[0]
    K = _reach(A, B, max(n, 1))
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
    rank, tol, sv = _kalman_rank(np.array(model.A), np.array(model.B), rank_tol)
    A, norm = _dynamics(model, normalise)
    T = _check_horizon(horizon_steps, allow_none=True)
    if T is None:
        _require_stable(A, "the infinite-horizon Gramian")
    W = _gramian(A, np.array(model.B), T)
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
    ``w_i = v_i``; then ``phi_j = 1 - sum_k A_jk²``. Both scale with ``||b_j||²``.
    """
    model = _as_model(system)
    A, norm = _dynamics(model, normalise)
    T = _check_horizon(horizon_steps, allow_none=True)
    _require_stable(A, "modal controllability (and the infinite-horizon average controllability)")
    B = np.array(model.B)
    n = A.shape[0]
    if T is None:
        P = sla.solve_discrete_lyapunov(A.T, np.eye(n))
    else:
        P = _gramian(A.T, np.eye(n), T)
    average = np.einsum("ij,ik,kj->j", B, P, B)
    lam, W = sla.eig(A, left=True, right=False)
    W = W / np.linalg.norm(W, axis=0, keepdims=True)
    modal = ((1.0 - np.abs(lam) ** 2)[:, None] * np.abs(W.conj().T @ B) ** 2).sum(axis=0)
    return SiteControllability(site_names=tuple(model.input_names), average=_frozen(average), modal=_frozen(modal),
                               horizon_steps=T, normalisation=norm)


# ---------------------------------------------------------------------------------------------------- patterns
@dataclass(frozen=True)
class PatternState:
    """The state that best explains a recorded activity pattern through ``C``.

    Attributes
    ----------
    pattern : ndarray, shape (n_outputs,)
        The activity pattern given (one value per recorded channel, output units).
    x : ndarray, shape (n_states,)
        Minimum-norm least-squares solution of ``C x = pattern``.
    residual : float
        ``||C x - pattern||``: zero when the pattern is reachable by some state exactly.
    rank : int
        Numerical rank of ``C``.
    null_space_dim : int
        ``n_states - rank``: the dimension of the set of states that give the same pattern.
    unique : bool
        ``null_space_dim == 0``. When False, ``x`` is the smallest of many states with that pattern; a transition
        to it is one choice among many.
    output_offset : ndarray, shape (n_outputs,)
        Resting output subtracted from the pattern first (the model's ``info["output_offset"]``, e.g. of a ridge
        ARX fit with intercept, whose model describes deviations from rest; zero otherwise).
    """

    pattern: np.ndarray
    x: np.ndarray
    residual: float
    rank: int
    null_space_dim: int
    unique: bool
    output_offset: np.ndarray


def pattern_to_state(system, pattern) -> PatternState:
    """Map an activity pattern (one value per recorded channel) to a state by least squares through ``C``.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    pattern : array_like, shape (n_outputs,)
        Recorded output values (output units) at a moment without stimulation, so the feed-through ``D u`` is zero.
        A model that carries ``info["output_offset"]`` describes deviations from that resting output; the offset
        is subtracted first.

    Returns
    -------
    PatternState

    Raises
    ------
    SessionError
        When the pattern has the wrong length or holds NaN / inf.

    Notes
    -----
    ``x = C⁺ (pattern − offset)`` (:func:`numpy.linalg.lstsq`, singular values below
    ``max(p, n) * eps * sigma_max`` dropped); the solution is unique only when ``C`` has full column rank.
    """
    model = _as_model(system)
    y = np.asarray(pattern, dtype=np.float64).reshape(-1)
    if y.shape != (model.n_outputs,) or not np.all(np.isfinite(y)):
        raise SessionError(
            f"an activity pattern needs one finite value per recorded channel ({model.n_outputs}: "
            f"{', '.join(model.output_names)}); got shape {np.shape(pattern)}. Give the pattern in output units."
        )
    offset = _output_offset(model)
    C = np.array(model.C)
    x, _, rank, _ = np.linalg.lstsq(C, y - offset, rcond=None)
    residual = float(np.linalg.norm(C @ x - (y - offset)))
    null = model.n_states - int(rank)
    return PatternState(pattern=_frozen(y), x=_frozen(x), residual=residual, rank=int(rank), null_space_dim=null,
                        unique=null == 0, output_offset=_frozen(offset))


def _output_offset(model: StateSpaceModel) -> np.ndarray:
    off = model.info.get("output_offset")
    if off is None:
        return np.zeros(model.n_outputs)
    off = np.asarray(off, dtype=np.float64).reshape(-1)
    if off.shape != (model.n_outputs,) or not np.all(np.isfinite(off)):
        return np.zeros(model.n_outputs)
    return off


# ---------------------------------------------------------------------------------------------------- energy
@dataclass(frozen=True)
class EnergyTransition:
    """The minimum-energy input that moves a model from one state to another over a fixed horizon.

    Attributes
    ----------
    u : ndarray, shape (horizon_steps, n_inputs)
        The input, time-major, in input units; zero on sites not used.
    energy : float
        ``sum_k ||u[k]||²`` (input units² · samples).
    x0, x_target, x_reached : ndarray, shape (n_states,)
        Start, target, and the state the input reaches (by simulation).
    residual : float
        ``||x_reached - x_target||``.
    reachable : bool
        The target is reached to ``relative_residual <= reach_rtol``. When False, ``u`` is the least-energy input
        among those that come closest to the target.
    relative_residual : float
        ``residual`` divided by ``max(||x_target||, ||A^T x0||)`` (or 1 when both are zero).
    horizon_steps : int
    sites : tuple of int
        Columns of ``B`` (input sites) allowed to move.
    site_names : tuple of str
    gramian_rank : int
        Numerical rank of the horizon Gramian of the allowed sites.
    gramian_condition : float
        Its ``λ_max / λ_min`` (``inf`` when singular).
    """

    u: np.ndarray
    energy: float
    x0: np.ndarray
    x_target: np.ndarray
    x_reached: np.ndarray
    residual: float
    reachable: bool
    relative_residual: float
    horizon_steps: int
    sites: tuple
    site_names: tuple
    gramian_rank: int
    gramian_condition: float


def _site_indices(model: StateSpaceModel, sites) -> tuple[int, ...]:
    if sites is None:
        return tuple(range(model.n_inputs))
    names = list(model.input_names)
    out = []
    for s in ([sites] if isinstance(sites, (str, int, np.integer)) else list(sites)):
        if isinstance(s, str):
            if s not in names:
                raise SessionError(f"unknown stimulation site {s!r}; the model's sites are {names}.")
            out.append(names.index(s))
        elif isinstance(s, (int, np.integer)) and not isinstance(s, bool) and 0 <= int(s) < model.n_inputs:
            out.append(int(s))
        else:
            raise SessionError(
                f"sites must be names or indices 0..{model.n_inputs - 1} of the model's sites {names}; got {s!r}."
            )
    if not out or len(set(out)) != len(out):
        raise SessionError(f"sites must name at least one site, each once; got {list(sites)!r}.")
    return tuple(out)


def _state(model, name, x) -> np.ndarray:
    n = model.n_states
    x = np.zeros(n) if x is None else np.asarray(x, dtype=np.float64).reshape(-1)
    if x.shape != (n,) or not np.all(np.isfinite(x)):
        raise SessionError(f"{name} must be a finite vector of the model's {n} states; got shape {x.shape}.")
    return x


def _check_rtol(reach_rtol) -> float:
    r = float(reach_rtol)
    if not np.isfinite(r) or r <= 0:
        raise SessionError(f"reach_rtol must be a positive number; got {reach_rtol!r} (1e-8 is the default).")
    return r


def _solve_energy(R, d, scale, reach_rtol):
    """Minimum-norm ``v`` with ``R v = d`` on the numerical range of ``R`` (its SVD is the Gramian's square root)."""
    n = R.shape[0]
    U, s, Vt = np.linalg.svd(R, full_matrices=False)
    tol = max(R.shape) * np.finfo(float).eps * (s[0] if s.size else 0.0)
    r = int(np.sum(s > tol))
    v = Vt[:r].T @ ((U[:, :r].T @ d) / s[:r])
    residual = float(np.linalg.norm(R @ v - d))
    rel = residual / scale if scale > 0 else 0.0
    cond = float(s[0] ** 2 / s[n - 1] ** 2) if r == n and n > 0 else (1.0 if n == 0 else float("inf"))
    return v, r, cond, residual, rel, rel <= reach_rtol


def minimum_energy_transition(system, x_target, *, horizon_steps: int, x0=None, sites=None,
                              reach_rtol: float = 1e-8) -> EnergyTransition:
    """The least-energy input that drives the state from ``x0`` to ``x_target`` in exactly ``horizon_steps``.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    x_target : array_like, shape (n_states,)
    horizon_steps : int
        ``T >= 1`` samples.
    x0 : array_like, shape (n_states,), optional
        Start state; default rest (zero).
    sites : sequence of int or str, optional
        Input sites allowed to move (indices or names); default all.
    reach_rtol : float, default 1e-8
        Relative residual below which the target counts as reached.

    Returns
    -------
    EnergyTransition

    Raises
    ------
    SessionError
        On a malformed state, horizon, site list or tolerance.

    Notes
    -----
    With ``d = x_target - A^T x0`` and ``R = [A^(T-1) B_S, ..., B_S]`` (:func:`reachability_matrix` of the
    allowed sites ``S``), the input is ``vec(u) = Rᵀ W_T⁻¹ d`` and its energy is ``dᵀ W_T⁻¹ d``, where
    ``W_T = R Rᵀ`` is the finite-horizon reachability Gramian. It is computed from the SVD of ``R``
    (``W_T = U Σ² Uᵀ``), which avoids squaring the condition number; ``W_T⁻¹`` becomes the pseudo-inverse when
    ``W_T`` is singular, and then only targets with ``d`` in its range are reachable.

    References
    ----------
    Kailath T. (1980), Linear Systems, Sec. 2.3 (minimum-energy control); Pasqualetti, Zampieri, Bullo (2014).

    Examples
    --------
    >>> A, B = np.array([[1.0, 1.0], [0.0, 1.0]]), np.array([[0.5], [1.0]])
    >>> tr = minimum_energy_transition((A, B), [1.0, 0.0], horizon_steps=2)
    >>> np.round(tr.u.ravel(), 12).tolist(), round(tr.energy, 12)
    ([1.0, -1.0], 2.0)
    """
    model = _as_model(system)
    T = _check_horizon(horizon_steps, allow_none=False)
    x0 = _state(model, "x0", x0)
    xt = _state(model, "x_target", x_target)
    idx = _site_indices(model, sites)
    reach_rtol = _check_rtol(reach_rtol)
    A = np.array(model.A)
    free = np.linalg.matrix_power(A, T) @ x0
    d = xt - free
    scale = max(float(np.linalg.norm(xt)), float(np.linalg.norm(free)))
    R = _reach(A, np.array(model.B)[:, idx], T)
    v, r, cond, _, _, _ = _solve_energy(R, d, scale, reach_rtol)
    u = np.zeros((T, model.n_inputs))
    u[:, idx] = v.reshape(T, len(idx))
    x = x0.copy()
    for k in range(T):
        x = A @ x + model.B @ u[k]
    residual = float(np.linalg.norm(x - xt))
    rel = residual / scale if scale > 0 else 0.0
    return EnergyTransition(
        u=_frozen(u), energy=float(np.sum(u ** 2)), x0=_frozen(x0), x_target=_frozen(xt), x_reached=_frozen(x),
        residual=residual, reachable=bool(rel <= reach_rtol), relative_residual=float(rel), horizon_steps=T,
        sites=idx, site_names=tuple(model.input_names[i] for i in idx), gramian_rank=r, gramian_condition=cond,
    )


@dataclass(frozen=True)
class PatternTransition:
    """A minimum-energy transition between two activity patterns.

    Attributes
    ----------
    start : PatternState or None
        The start pattern's state; None when the transition starts at rest.
    target : PatternState
    transition : EnergyTransition
        Between ``start.x`` (or zero) and ``target.x``.
    """

    start: PatternState | None
    target: PatternState
    transition: EnergyTransition


def pattern_transition(system, y_target, *, horizon_steps: int, y_start=None, sites=None,
                       reach_rtol: float = 1e-8) -> PatternTransition:
    """The least-energy input moving one recorded activity pattern to another.

    Each pattern becomes a state through :func:`pattern_to_state` (check ``PatternState.unique``: when ``C`` has a
    null space the pattern fixes the state only up to it, and the minimum-norm state is used), then
    :func:`minimum_energy_transition` links the two states.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    y_target : array_like, shape (n_outputs,)
    horizon_steps : int
    y_start : array_like, shape (n_outputs,), optional
        Default: start at rest (zero state).
    sites : sequence of int or str, optional
    reach_rtol : float, default 1e-8

    Returns
    -------
    PatternTransition
    """
    model = _as_model(system)
    target = pattern_to_state(model, y_target)
    start = None if y_start is None else pattern_to_state(model, y_start)
    tr = minimum_energy_transition(model, target.x, horizon_steps=horizon_steps,
                                   x0=None if start is None else start.x, sites=sites, reach_rtol=reach_rtol)
    return PatternTransition(start=start, target=target, transition=tr)


# ---------------------------------------------------------------------------------------------------- ranking
@dataclass(frozen=True)
class SiteRanking:
    """Single sites and small site sets ranked by the minimum energy they need to reach a target.

    Rows are sorted by energy (ascending; unreachable sets last with ``energy = inf``), then by set size.

    Attributes
    ----------
    sets : tuple of tuple of int
        Site indices of each set.
    names : tuple of str
        ``"+"``-joined site names of each set.
    size : ndarray of int, shape (n_sets,)
    energy : ndarray, shape (n_sets,)
        Minimum energy (input units² · samples); ``inf`` where the target is unreachable from that set.
    residual : ndarray, shape (n_sets,)
        Distance to the target left by the least-energy closest input (zero to rounding when reachable).
    reachable : ndarray of bool, shape (n_sets,)
    horizon_steps : int
    x0, x_target : ndarray, shape (n_states,)
    """

    sets: tuple
    names: tuple
    size: np.ndarray
    energy: np.ndarray
    residual: np.ndarray
    reachable: np.ndarray
    horizon_steps: int
    x0: np.ndarray
    x_target: np.ndarray

    @property
    def n_unreachable(self) -> int:
        return int(np.sum(~self.reachable))

    def to_frame(self):
        """A table (pandas DataFrame), one row per site set, best first."""
        import pandas as pd

        return pd.DataFrame({"rank": np.arange(1, len(self.sets) + 1), "sites": list(self.names),
                             "n_sites": self.size, "energy": self.energy, "reachable": self.reachable,
                             "residual": self.residual})


def rank_sites(system, x_target, *, horizon_steps: int, x0=None, max_set_size: int = 2,
               reach_rtol: float = 1e-8) -> SiteRanking:
    """Rank single stimulation sites, pairs and (optionally) triples by the energy they need for a target.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    x_target : array_like, shape (n_states,)
        Use :func:`pattern_to_state` for an activity pattern.
    horizon_steps : int
    x0 : array_like, shape (n_states,), optional
        Default rest.
    max_set_size : {1, 2, 3}, default 2
        Largest number of sites stimulated together.
    reach_rtol : float, default 1e-8

    Returns
    -------
    SiteRanking

    Raises
    ------
    SessionError
        On a bad ``max_set_size`` or when more than 200,000 sets would be ranked.

    Notes
    -----
    Each set's energy is that of :func:`minimum_energy_transition` restricted to its sites.
    """
    model = _as_model(system)
    T = _check_horizon(horizon_steps, allow_none=False)
    x0 = _state(model, "x0", x0)
    xt = _state(model, "x_target", x_target)
    reach_rtol = _check_rtol(reach_rtol)
    m = model.n_inputs
    if isinstance(max_set_size, bool) or max_set_size not in (1, 2, 3):
        raise SessionError(f"max_set_size must be 1, 2 or 3 sites; got {max_set_size!r}.")
    k_max = min(int(max_set_size), m)
    sets = [c for k in range(1, k_max + 1) for c in itertools.combinations(range(m), k)]
    if len(sets) > _MAX_SETS:
        raise SessionError(
            f"ranking {len(sets)} site sets of up to {k_max} sites from {m} is too many (limit {_MAX_SETS}); "
            "use max_set_size=2 or fewer sites."
        )
    A = np.array(model.A)
    free = np.linalg.matrix_power(A, T) @ x0
    d = xt - free
    scale = max(float(np.linalg.norm(xt)), float(np.linalg.norm(free)))
    R = _reach(A, np.array(model.B), T).reshape(model.n_states, T, m)
    energy, residual, ok = np.empty(len(sets)), np.empty(len(sets)), np.empty(len(sets), dtype=bool)
    for i, c in enumerate(sets):
        v, _, _, res, _, good = _solve_energy(R[:, :, list(c)].reshape(model.n_states, -1), d, scale, reach_rtol)
        energy[i] = float(v @ v) if good else np.inf
        residual[i], ok[i] = res, good
    size = np.array([len(c) for c in sets])
    order = np.lexsort((np.arange(len(sets)), size, energy))
    names = tuple("+".join(model.input_names[j] for j in sets[i]) for i in order)
    return SiteRanking(
        sets=tuple(sets[i] for i in order), names=names, size=_frozen(size[order], np.int64),
        energy=_frozen(energy[order]), residual=_frozen(residual[order]), reachable=_frozen(ok[order], bool),
        horizon_steps=T, x0=_frozen(x0), x_target=_frozen(xt),
    )
