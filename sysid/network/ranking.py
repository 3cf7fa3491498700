"""Ranking of stimulation sites and site sets by the energy of a transition.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from ..exceptions import SessionError
from .controllability import _reach
from .energy import _check_rtol, _solve_energy
from .systems import _as_model, _check_horizon, _frozen, _state

__all__ = ["rank_sites", "SiteRanking"]


# Sets of sites ranked in one call; beyond this the ranking is slow and the table unreadable.
_MAX_SETS = 200_000


# ---------------------------------------------------------------------------------------------------- ranking
@dataclass(frozen=True)
class RankedSets:
    """What every ranking of site sets shares: its fields, the count of unreachable sets and the table, best first."""

    sets: tuple
    names: tuple
    size: np.ndarray
    energy: np.ndarray
    residual: np.ndarray
    reachable: np.ndarray
    horizon_steps: int

    @property
    def n_unreachable(self) -> int:
        return int(np.sum(~self.reachable))

    def to_frame(self):
        """A table (pandas DataFrame), one row per site set, best first."""
        import pandas as pd

        return pd.DataFrame({"rank": np.arange(1, len(self.sets) + 1), "sites": list(self.names),
                             "n_sites": self.size, "energy": self.energy, "reachable": self.reachable,
                             "residual": self.residual})


@dataclass(frozen=True)
class SiteRanking(RankedSets):
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

    x0: np.ndarray
    x_target: np.ndarray


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
