"""Networks as linear models: building one from matrices, reading any system argument, normalising ``A``.
"""

from __future__ import annotations

import numpy as np

from ..exceptions import SessionError
from ..statespace import StateSpaceModel
from ._lag_forms import companion_of
from .lyapunov import stable_gramian_pair

__all__ = ["network_model", "normalised_network", "minimal_realisation", "MINIMAL_RTOL", "NORMALISATION_NONE",
           "NORMALISATION_SIGMA"]


NORMALISATION_NONE = "none"
NORMALISATION_SIGMA = "A / (1 + sigma_max(A))"


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


def _output_offset(model: StateSpaceModel) -> np.ndarray:
    off = model.info.get("output_offset")
    if off is None:
        return np.zeros(model.n_outputs)
    off = np.asarray(off, dtype=np.float64).reshape(-1)
    if off.shape != (model.n_outputs,) or not np.all(np.isfinite(off)):
        return np.zeros(model.n_outputs)
    return off


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


# ---------------------------------------------------------------------------------------------- minimal realisation
#: Hankel singular values below this fraction of the largest are removed by :func:`minimal_realisation`. They are
#: products of Gramian square roots, so a zero one comes out near the square root of the rounding error of the
#: Gramians (about 1e-8 of the largest on a badly scaled basis): the tolerance sits above that.
MINIMAL_RTOL = 1e-6


#: An unstable model is balanced as ``A / c`` with ``c`` this many times its spectral radius (``A / c``'s: 0.5).
UNSTABLE_SCALE = 2.0


def _sqrt_psd(W) -> np.ndarray:
    """A square root ``L`` with ``L Lᵀ = W`` of a symmetric positive semi-definite matrix (eigenvalues clipped at 0;
    a Cholesky factor would fail on the singular Gramians of a non-minimal model)."""
    w, V = np.linalg.eigh(0.5 * (W + W.T))
    return V * np.sqrt(np.clip(w, 0.0, None))


def minimal_realisation(system, *, rtol: float = MINIMAL_RTOL, horizon_steps: int | None = None):
    """The model with its uncontrollable and unobservable states removed, by square-root balanced truncation of the
    Hankel singular values below ``rtol`` times the largest.

    A realisation built from lags (ridge ARX as a state-space model, one state per lagged output and input) holds
    many states no input reaches or no channel sees; controllability computed on it reports those artefacts. Every
    minimal realisation of a transfer function is controllable and observable, and all of them are similar (Kalman
    1963, "Mathematical description of linear dynamical systems"; Ho & Kalman 1966); its order is the rank of the
    Hankel matrix of the Markov parameters. Balanced truncation (Moore 1981, "Principal component analysis in
    linear systems"; square-root form of Tombs & Postlethwaite 1987) keeps the states whose Hankel singular values
    ``sqrt(eig(Wc Wo))`` exceed the tolerance; the removed part changes the transfer function by at most twice the
    sum of the removed values in the H-infinity norm (Enns 1984; Glover 1984), hence every impulse-response sample
    by at most that much.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    rtol : float, default :data:`MINIMAL_RTOL`
    horizon_steps : int, optional
        Finite Gramian horizon; default infinite. An unstable model is then balanced as ``A / c`` with ``c`` twice
        its spectral radius (:data:`UNSTABLE_SCALE`): a scalar factor on ``A`` changes no reachable or observable
        subspace (the Kalman matrices' block columns are only rescaled), and the removed states are the same as the
        model's, whereas its finite-horizon Hankel singular values span the growth of its unstable modes, so a
        relative tolerance removed states that are reached and seen (an 18-state model of spectral radius 2.2 kept
        one state over 36 steps); ``info["minimal_realisation"]["scaled_by"]`` records ``c``, and the impulse error
        bound is then that of ``A / c``: sample ``k`` of the model's response moves by at most the bound times
        ``c^(k-1)``.

    Returns
    -------
    model : StateSpaceModel
        ``D``, the rate, names, units and ``info`` are kept; ``info["minimal_realisation"]`` records the orders, the
        tolerance and the error bound.
    hankel_singular_values : ndarray
        All of them (one per state), largest first; a ridge ARX's realisation on its lags is balanced on its
        companion form (:mod:`._lag_forms`: the same Markov parameters on fewer states), the states that form does
        without given 0.
    """
    model = _as_model(system)
    A, B, C = np.asarray(model.A), np.asarray(model.B), np.asarray(model.C)
    n = A.shape[0]
    stable = n == 0 or model.spectral_radius < 1.0  # the model's poles, computed once
    T = horizon_steps
    c = 1.0 if stable or T is not None else UNSTABLE_SCALE * model.spectral_radius  # balanced as A / c
    # a ridge ARX's realisation on its lags: the same Markov parameters on fewer states (its companion form), the
    # others' Hankel singular values 0 (the finite-horizon ones too: they are those of the Markov parameters' block
    # Hankel matrix)
    A, B, C = companion_of(A, B, C, model.D) or (A, B, C)
    if T is None:
        Wc, Wo = stable_gramian_pair(A / c, B @ B.T, C.T @ C)
    else:
        Wc, Wo = np.zeros(A.shape), np.zeros(A.shape)
        Mb, Mc = B.copy(), C.T.copy()
        for _ in range(int(T)):
            Wc += Mb @ Mb.T
            Wo += Mc @ Mc.T
            Mb, Mc = A @ Mb, A.T @ Mc
    Lc, Lo = _sqrt_psd(Wc), _sqrt_psd(Wo)
    U, s, Vt = np.linalg.svd(Lo.T @ Lc)
    r = int(np.sum(s > float(rtol) * s[0])) if s.size and s[0] > 0 else 0
    r = max(r, 1) if n else 0
    half = 1.0 / np.sqrt(s[:r])
    Tm = Lc @ Vt[:r].T * half          # x = Tm z
    Ti = (half[:, None] * U[:, :r].T) @ Lo.T  # z = Ti x (Ti Tm = I)
    info = {**dict(model.info), "minimal_realisation": {
        "states": r, "of_states": n, "rtol": float(rtol), "gramian_horizon_steps": T, "scaled_by": c,
        "impulse_error_bound": float(2.0 * np.sum(s[r:]))}}
    reduced = StateSpaceModel(A=Ti @ A @ Tm, B=Ti @ B, C=C @ Tm, D=model.D, sample_rate_hz=model.sample_rate_hz,
                              input_names=model.input_names, output_names=model.output_names, info=info,
                              input_units=model.input_units, output_units=model.output_units)
    return reduced, np.concatenate([s, np.zeros(n - s.size)])
