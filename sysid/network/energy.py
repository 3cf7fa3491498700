"""Minimum-energy transitions of a network between states or output patterns.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import SessionError
from .controllability import _reach
from .patterns import PatternState, pattern_to_state
from .systems import _as_model, _check_horizon, _frozen, _site_indices, _state

__all__ = ["minimum_energy_transition", "pattern_transition", "EnergyTransition", "PatternTransition"]


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
    """The least-energy input moving the state of one activity pattern to the state of another.

    Each pattern becomes a state through :func:`pattern_to_state` (check ``PatternState.unique``: when ``C`` has a
    null space the pattern fixes the state only up to it, and the minimum-norm state is used), then
    :func:`minimum_energy_transition` links the two states. With fewer channels than states the minimum-norm state
    depends on the state coordinates and its energy can be far above the least energy that produces the pattern
    (thousands of times on the demo); for a fitted model use :func:`~stimsteer.sysid.network.output_transition`.

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
