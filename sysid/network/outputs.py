"""Network figures that do not depend on the state coordinates: everything seen through the recorded channels.

A fitted model's states are defined only up to a change of basis ``x → T x`` (``A → T A T⁻¹``, ``B → T B``,
``C → C T⁻¹``): any figure of a fitted model that a reader may quote must be unchanged by it. The figures here are:

- the output Gramian ``C W Cᵀ`` (``W`` the controllability Gramian), per site ``C W_j Cᵀ``; its trace is the site's
  squared H2 norm to the recorded channels, ``sum_k ||C A^k b_j||²`` (the feed-through ``D`` left out);
- output controllability: the rank of the output reachability matrix ``C [B, AB, ..., A^(n-1) B]`` (Bertram and
  Sarachik 1959; Kreindler and Sarachik 1964), i.e. whether every pattern of the recorded channels can be reached;
- the minimum energy to reach an output pattern, ``min ||u||²`` subject to ``C_S x_T = y_S`` over the constrained
  channels ``S`` (the others left free), and site and site-set rankings on it.

Under ``x → T x`` every one of them is unchanged (tested to 1e-9 with random ``T``). The state-coordinate figures
(average and modal controllability of ``A``) are in :mod:`.controllability`; they mean something only when the
states do (a network map given by the user, :mod:`.maps`).

References
----------
Bertram J.E., Sarachik P.E. (1959), On optimal computer control, Proc. IFAC World Congress (output controllability).
Kreindler E., Sarachik P.E. (1964), On the concepts of controllability and observability of linear systems, IEEE
Trans. Autom. Control 9:129.
Zhou K., Doyle J.C., Glover K. (1996), Robust and Optimal Control, Sec. 4.4 (H2 norm from the Gramian).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from ..exceptions import SessionError
from .controllability import _gramian, _reach, _require_stable, model_gramians, model_reach
from .energy import _check_rtol, _solve_energy
from .ranking import RankedSets
from .systems import _as_model, _check_horizon, _frozen, _output_offset, _site_indices

__all__ = ["output_gramian", "site_output_gramians", "output_controllability", "site_output_controllability",
           "output_transition", "rank_sites_by_output", "OutputControllability", "SiteOutputControllability",
           "OutputTransition", "OutputSiteRanking"]

_MAX_SETS = 200_000


def _gram(model, horizon_steps):
    A, B = np.array(model.A), np.array(model.B)
    T = _check_horizon(horizon_steps, allow_none=True)
    if T is None:
        _require_stable(A, "the infinite-horizon output Gramian", model.spectral_radius)  # poles computed once
    return A, B, T


def output_gramian(system, horizon_steps: int | None = None, *, sites=None) -> np.ndarray:
    """``C W Cᵀ``: the output controllability Gramian of the given sites (default all).

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    horizon_steps : int, optional
        Finite horizon ``T``; default the infinite horizon (needs a stable ``A``).
    sites : sequence of int or str, optional

    Returns
    -------
    ndarray, shape (n_outputs, n_outputs)
        In (output units)² per (input unit)²·sample.
    """
    model = _as_model(system)
    _A, _B, T = _gram(model, horizon_steps)
    C = np.array(model.C)
    G = C @ model_gramians(model, [_site_indices(model, sites)], T)[0] @ C.T
    return 0.5 * (G + G.T)


def site_output_gramians(system, horizon_steps: int | None = None) -> list:
    """:func:`output_gramian` of each site alone (``C W_j Cᵀ``, in site order), the Gramians solved together."""
    model = _as_model(system)
    _A, _B, T = _gram(model, horizon_steps)
    model_gramians(model, [(j,) for j in range(model.n_inputs)], T)  # solved together, kept on the model
    return [output_gramian(model, horizon_steps, sites=[j]) for j in range(model.n_inputs)]


def _rank_of(M, rank_tol=None):
    sv = np.linalg.svd(M, compute_uv=False) if M.size else np.zeros(0)
    tol = max(M.shape) * np.finfo(float).eps * (sv[0] if sv.size else 0.0) if rank_tol is None else float(rank_tol)
    return int(np.sum(sv > tol)), tol


def _eig_desc(G):
    return np.clip(np.sort(np.linalg.eigvalsh(G))[::-1], 0.0, None) if G.size else np.zeros(0)


@dataclass(frozen=True)
class OutputControllability:
    """Output controllability of a model from all its sites (coordinate-free).

    Attributes
    ----------
    n_channels : int
    output_rank : int
        Rank of ``C [B, AB, ..., A^(n-1) B]``: the dimension of the reachable output patterns.
    rank_tol : float
    is_output_controllable : bool
        ``output_rank == n_channels``: every pattern of the recorded channels can be reached.
    horizon_steps : int or None
        Horizon of the Gramian (None: infinite).
    gramian : ndarray, shape (n_channels, n_channels)
        ``C W Cᵀ``.
    gramian_eigenvalues : ndarray, shape (n_channels,)
        Descending.
    condition_number : float
        ``λ_max / λ_min`` (``inf`` when singular).
    h2_squared : float
        ``trace(C W Cᵀ)``: the squared H2 norm from all sites to the recorded channels.
    """

    n_channels: int
    output_rank: int
    rank_tol: float
    is_output_controllable: bool
    horizon_steps: int | None
    gramian: np.ndarray
    gramian_eigenvalues: np.ndarray
    condition_number: float
    h2_squared: float


def _condition(eig) -> float:
    if eig.size == 0:
        return 1.0
    if eig[0] <= 0 or eig[-1] <= eig.size * np.finfo(float).eps * eig[0]:
        return float("inf")
    return float(eig[0] / eig[-1])


def output_controllability(system, *, horizon_steps: int | None = None,
                           rank_tol: float | None = None) -> OutputControllability:
    """Output reachability rank, output Gramian, its spectrum and condition, and the squared H2 norm.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    horizon_steps : int, optional
        Gramian horizon; default infinite (needs a stable ``A``).
    rank_tol : float, optional
        Tolerance on the singular values of ``C [B, ..., A^(n-1) B]``; default the rule of
        :func:`numpy.linalg.matrix_rank`.

    Returns
    -------
    OutputControllability
    """
    model = _as_model(system)
    A, B, T = _gram(model, horizon_steps)
    C = np.array(model.C)
    rank, tol = _rank_of(C @ model_reach(model), rank_tol)
    G = C @ model_gramians(model, [range(model.n_inputs)], T)[0] @ C.T
    G = 0.5 * (G + G.T)
    eig = _eig_desc(G)
    p = model.n_outputs
    return OutputControllability(
        n_channels=p, output_rank=rank, rank_tol=tol, is_output_controllable=rank == p, horizon_steps=T,
        gramian=_frozen(G), gramian_eigenvalues=_frozen(eig), condition_number=_condition(eig),
        h2_squared=float(np.trace(G)))


@dataclass(frozen=True)
class SiteOutputControllability:
    """Per-site output figures (coordinate-free).

    Attributes
    ----------
    site_names : tuple of str
    h2_squared : ndarray, shape (n_sites,)
        ``trace(C W_j Cᵀ)``: site ``j``'s squared H2 norm to the recorded channels.
    output_rank : ndarray of int, shape (n_sites,)
        Dimension of the output patterns site ``j`` alone can reach.
    horizon_steps : int or None
    """

    site_names: tuple
    h2_squared: np.ndarray
    output_rank: np.ndarray
    horizon_steps: int | None

    def to_frame(self):
        """A table (pandas DataFrame), one row per site."""
        import pandas as pd

        return pd.DataFrame({"site": list(self.site_names), "h2_squared_to_channels": self.h2_squared,
                             "output_rank": self.output_rank})


def site_output_controllability(system, *, horizon_steps: int | None = None) -> SiteOutputControllability:
    """Squared H2 norm and output reachability rank of every stimulation site alone.

    Notes
    -----
    ``trace(C W_j Cᵀ) = b_jᵀ Wo b_j`` with ``Wo`` the observability Gramian of ``(A, C)`` (``Wo = Aᵀ Wo A + CᵀC``,
    or its ``T``-term sum): one Lyapunov solve for all sites.
    """
    model = _as_model(system)
    A, B, T = _gram(model, horizon_steps)
    C = np.array(model.C)
    Wo = _gramian(A.T, C.T, T)
    h2 = np.einsum("ij,ik,kj->j", B, Wo, B)
    K = model_reach(model).reshape(model.n_states, -1, model.n_inputs)
    ranks = np.array([_rank_of(C @ K[:, :, j])[0] for j in range(model.n_inputs)], dtype=np.int64)
    return SiteOutputControllability(site_names=tuple(model.input_names), h2_squared=_frozen(h2),
                                     output_rank=_frozen(ranks, np.int64), horizon_steps=T)


# ---------------------------------------------------------------------------------------------------- energy
def _pattern(model, name, y) -> np.ndarray:
    v = np.asarray(y, dtype=np.float64).reshape(-1)
    if v.shape != (model.n_outputs,):
        raise SessionError(f"{name} needs one value per recorded channel ({model.n_outputs}: "
                           f"{', '.join(model.output_names)}); got shape {np.shape(y)}.")
    bad = [model.output_names[i] for i in np.flatnonzero(~np.isfinite(v))]
    if bad:
        raise SessionError(f"{name} must be finite; channel(s) {', '.join(bad)} hold {v[~np.isfinite(v)].tolist()}. "
                           "Give a number for every channel (leave channels free with free_channels).")
    return v - _output_offset(model)


def _channel_indices(model, free_channels) -> np.ndarray:
    names = list(model.output_names)
    keep = np.ones(model.n_outputs, dtype=bool)
    for c in ([] if free_channels is None else list(free_channels)):
        if isinstance(c, str) and c in names:
            keep[names.index(c)] = False
        elif isinstance(c, (int, np.integer)) and not isinstance(c, bool) and 0 <= int(c) < len(names):
            keep[int(c)] = False
        else:
            raise SessionError(f"unknown free channel {c!r}; the recorded channels are {names}.")
    if not keep.any():
        raise SessionError("every channel was left free, so there is no target to reach; constrain at least one.")
    return np.flatnonzero(keep)


def _start_state(model, y_start, T):
    """The least-energy state with the start pattern: ``W Cᵀ (C W Cᵀ)⁺ y`` (coordinate-free)."""
    if y_start is None:
        return np.zeros(model.n_states)
    y = _pattern(model, "the start pattern", y_start)
    A, B, C = np.array(model.A), np.array(model.B), np.array(model.C)
    W = _gramian(A, B, None if np.max(np.abs(np.linalg.eigvals(A))) < 1 else T)
    return W @ C.T @ np.linalg.pinv(C @ W @ C.T) @ y


@dataclass(frozen=True)
class OutputTransition:
    """The least-energy input that brings the recorded channels to a pattern.

    Attributes
    ----------
    u : ndarray, shape (horizon_steps, n_inputs)
    energy : float
        ``sum_k ||u[k]||²`` (input units² · samples).
    y_target, y_reached : ndarray, shape (n_outputs,)
        Target and reached pattern (the model's resting output added back); free channels go where they go.
    constrained : tuple of str
        The channels held to the target.
    residual : float
        ``||y_reached - y_target||`` over the constrained channels.
    reachable : bool
    horizon_steps : int
    site_names : tuple of str
    """

    u: np.ndarray
    energy: float
    y_target: np.ndarray
    y_reached: np.ndarray
    constrained: tuple
    residual: float
    reachable: bool
    horizon_steps: int
    site_names: tuple


def _setup(model, y_target, horizon_steps, y_start, free_channels, reach_rtol):
    T = _check_horizon(horizon_steps, allow_none=False)
    yt = _pattern(model, "the target pattern", y_target)
    rows = _channel_indices(model, free_channels)
    x0 = _start_state(model, y_start, T)
    A, C = np.array(model.A), np.array(model.C)
    free_y = C @ np.linalg.matrix_power(A, T) @ x0
    d = (yt - free_y)[rows]
    scale = max(float(np.linalg.norm(yt[rows])), float(np.linalg.norm(free_y[rows])))
    return T, yt, rows, x0, d, scale, _check_rtol(reach_rtol)


def output_transition(system, y_target, *, horizon_steps: int, y_start=None, sites=None, free_channels=None,
                      reach_rtol: float = 1e-8) -> OutputTransition:
    """``min ||u||²`` subject to ``C_S x_T = y_S``: the least energy that produces an output pattern.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    y_target : array_like, shape (n_outputs,)
        Pattern in output units (the model's resting output, ``info["output_offset"]``, is subtracted first).
    horizon_steps : int
    y_start : array_like, shape (n_outputs,), optional
        Start pattern; the start state is the least-energy state showing it, ``W Cᵀ (C W Cᵀ)⁺ y_start`` (the state
        the least-energy input from rest leaves with that pattern; ``W`` infinite-horizon when ``A`` is stable,
        else over ``horizon_steps``). Default rest.
    sites : sequence of int or str, optional
    free_channels : sequence of str or int, optional
        Channels whose final value is not constrained.
    reach_rtol : float, default 1e-8

    Returns
    -------
    OutputTransition

    Notes
    -----
    With ``R`` the reachability matrix of the allowed sites, the constraint is ``C_S R v = d`` with
    ``d = y_S − C_S A^T x_0``; the least-norm ``v`` is ``(C_S R)⁺ d`` and its energy ``dᵀ (C_S W_T C_Sᵀ)⁺ d``. It is
    never more than the energy of any state ``x`` with ``C x = y`` (the old ``C⁺ y`` rule), which is one feasible
    choice among many.
    """
    model = _as_model(system)
    T, yt, rows, x0, d, scale, rtol = _setup(model, y_target, horizon_steps, y_start, free_channels, reach_rtol)
    idx = _site_indices(model, sites)
    A, B, C = np.array(model.A), np.array(model.B), np.array(model.C)
    R = C[rows] @ _reach(A, B[:, idx], T)
    v, _, _, _, _, _ = _solve_energy(R, d, scale, rtol)
    u = np.zeros((T, model.n_inputs))
    u[:, idx] = v.reshape(T, len(idx))
    x = x0.copy()
    for k in range(T):
        x = A @ x + B @ u[k]
    off = _output_offset(model)
    reached = C @ x
    residual = float(np.linalg.norm((reached - yt)[rows]))
    rel = residual / scale if scale > 0 else 0.0
    return OutputTransition(
        u=_frozen(u), energy=float(np.sum(u ** 2)), y_target=_frozen(yt + off), y_reached=_frozen(reached + off),
        constrained=tuple(model.output_names[i] for i in rows), residual=residual, reachable=bool(rel <= rtol),
        horizon_steps=T, site_names=tuple(model.input_names[i] for i in idx))


@dataclass(frozen=True)
class OutputSiteRanking(RankedSets):
    """Single sites and site sets ranked by the least energy that gives an output pattern (coordinate-free).

    Attributes
    ----------
    sets : tuple of tuple of int
    names : tuple of str
    size : ndarray of int
    energy : ndarray
        ``inf`` where the pattern cannot be reached from the set.
    residual : ndarray
    reachable : ndarray of bool
    horizon_steps : int
    """


def site_sets(n_sites: int, max_set_size: int) -> list:
    """All sets of 1..max_set_size sites (at most 200,000)."""
    if isinstance(max_set_size, bool) or max_set_size not in (1, 2, 3):
        raise SessionError(f"max_set_size must be 1, 2 or 3 sites; got {max_set_size!r}.")
    k_max = min(int(max_set_size), n_sites)
    sets = [c for k in range(1, k_max + 1) for c in itertools.combinations(range(n_sites), k)]
    if len(sets) > _MAX_SETS:
        raise SessionError(f"ranking {len(sets)} site sets of up to {k_max} sites from {n_sites} is too many "
                           f"(limit {_MAX_SETS}); use max_set_size=2 or fewer sites.")
    return sets


def rank_sites_by_output(system, y_target, *, horizon_steps: int, y_start=None, free_channels=None,
                         max_set_size: int = 2, reach_rtol: float = 1e-8) -> OutputSiteRanking:
    """Rank single sites, pairs (and triples) by the least energy of :func:`output_transition` from each set.

    Rows are sorted by energy (unreachable last, ``inf``), then by set size.
    """
    model = _as_model(system)
    T, _, rows, _, d, scale, rtol = _setup(model, y_target, horizon_steps, y_start, free_channels, reach_rtol)
    m = model.n_inputs
    sets = site_sets(m, max_set_size)
    A, B, C = np.array(model.A), np.array(model.B), np.array(model.C)
    R = (C[rows] @ _reach(A, B, T)).reshape(len(rows), T, m)
    energy, residual, ok = np.empty(len(sets)), np.empty(len(sets)), np.empty(len(sets), dtype=bool)
    for i, c in enumerate(sets):
        v, _, _, res, _, good = _solve_energy(R[:, :, list(c)].reshape(len(rows), -1), d, scale, rtol)
        energy[i] = float(v @ v) if good else np.inf
        residual[i], ok[i] = res, good
    size = np.array([len(c) for c in sets])
    order = np.lexsort((np.arange(len(sets)), size, energy))
    return OutputSiteRanking(
        sets=tuple(sets[i] for i in order), names=tuple("+".join(model.input_names[j] for j in sets[i]) for i in order),
        size=_frozen(size[order], np.int64), energy=_frozen(energy[order]), residual=_frozen(residual[order]),
        reachable=_frozen(ok[order], bool), horizon_steps=T)
