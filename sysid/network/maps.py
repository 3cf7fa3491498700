"""Network maps given by the user: an adjacency matrix with node names, read as a linear model whose states mean
something (the nodes).

Reading a map
    A CSV file whose first row names the nodes (``,a,b,c`` with row labels in the first column, or ``a,b,c``
    without), then one row per node; or a NumPy ``.npy`` file holding the square matrix (node names given
    separately, default ``node0, node1, ...``). ``weights[i, j]`` is the connection **from node j to node i**
    (rows receive, columns send: ``x_i[k+1] = sum_j A_ij x_j[k]``), so a symmetric map reads the same either way.

Time conventions and normalisations (a map only: a fitted model is never rescaled)
    ==============  =================================  ================================================================
    time            normalisation                      dynamics used
    ==============  =================================  ================================================================
    ``discrete``    ``none``                           ``A`` as given (must have spectral radius < 1)
    ``discrete``    ``sigma``                          ``A / (c + sigma_max(A))`` (Gu et al. 2015), any signs
    ``discrete``    ``eigenvalue``                     ``A / (c + lambda_max(A))`` (Karrer et al. 2020), weights >= 0
    ``continuous``  ``none``                           ``dx/dt = A x + B u`` (all eigenvalues must have Re < 0)
    ``continuous``  ``sigma``                          ``A / (c + sigma_max(A)) − I``, any signs
    ``continuous``  ``eigenvalue``                     ``A / (c + lambda_max(A)) − I`` (Karrer et al. 2020), weights >= 0
    ==============  =================================  ================================================================
    ``c`` defaults to 1. ``lambda_max`` is the largest eigenvalue, which bounds the spectrum only for a
    non-negative map (Perron-Frobenius); so the ``eigenvalue`` normalisation refuses negative weights. A continuous
    map is sampled with a zero-order hold over ``time_step`` (map time units per model step): ``A_d = e^{A dt}``,
    ``B_d = ∫_0^dt e^{A s} ds B``, so every figure is that of piecewise-constant stimulation, in model steps.

References
----------
Gu S. et al. (2015), Controllability of structural brain networks, Nat. Commun. 6:8414 (Methods).
Karrer T.M. et al. (2020), A practical guide to methodological considerations in the controllability of structural
brain networks, J. Neural Eng. 17:026031.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.linalg as sla

from ..exceptions import FileFormatError, InvalidParameterError, UnstableModelError
from ..statespace import StateSpaceModel

__all__ = ["NetworkMap", "read_network_map", "map_model", "TIME_CONVENTIONS", "NORMALISATIONS"]

TIME_CONVENTIONS = ("discrete", "continuous")
NORMALISATIONS = ("none", "sigma", "eigenvalue")


@dataclass(frozen=True)
class NetworkMap:
    """A square weighted map with named nodes (``weights[i, j]``: from node ``j`` to node ``i``).

    Raises
    ------
    InvalidParameterError
        Not square, not finite (the first bad entry is named), or names that are missing, repeated or too few.
    """

    node_names: tuple
    weights: np.ndarray
    source: str = "the network map"

    def __post_init__(self):
        W = np.asarray(self.weights, dtype=np.float64)
        if W.ndim != 2 or W.shape[0] != W.shape[1] or W.shape[0] == 0:
            raise InvalidParameterError(f"{self.source} must be a square matrix (one row and one column per node); "
                                        f"got shape {W.shape}. Give n rows of n weights.")
        bad = np.argwhere(~np.isfinite(W))
        names = tuple(str(x) for x in self.node_names)
        if len(names) != W.shape[0]:
            raise InvalidParameterError(f"{self.source} has {W.shape[0]} nodes but {len(names)} node names; give "
                                        "one name per node.")
        if bad.size:
            i, j = bad[0]
            raise InvalidParameterError(f"{self.source} holds {W[i, j]} at row {names[i]}, column {names[j]} "
                                        f"({len(bad)} non-finite entries); give a number (0 for no connection).")
        dupes = sorted({s for s in names if names.count(s) > 1 or not s.strip()})
        if dupes:
            raise InvalidParameterError(f"{self.source}: node names must be unique and non-empty; got {dupes}.")
        W = W.copy()
        W.setflags(write=False)
        object.__setattr__(self, "weights", W)
        object.__setattr__(self, "node_names", names)

    @property
    def n_nodes(self) -> int:
        return self.weights.shape[0]

    def indices(self, names, what: str) -> list:
        """Positions of the named nodes; a clear error for an unknown or repeated name."""
        out = []
        for s in names:
            if s not in self.node_names:
                raise InvalidParameterError(f"unknown node {s!r} in the {what}; the map's nodes are "
                                            f"{', '.join(self.node_names)}.")
            if self.node_names.index(s) in out:
                raise InvalidParameterError(f"node {s!r} is named twice in the {what}; name each node once.")
            out.append(self.node_names.index(s))
        if not out:
            raise InvalidParameterError(f"the {what} must name at least one node.")
        return out


def _csv_map(path: Path) -> NetworkMap:
    with path.open(newline="", encoding="utf-8-sig") as f:
        rows = [[c.strip() for c in r] for r in csv.reader(f) if r and not r[0].lstrip().startswith("#")]
    if len(rows) < 2:
        raise FileFormatError(f"{path} needs a header row of node names and one row per node; got {len(rows)} rows.")
    header = rows[0]
    labelled = header[0] == "" or any(_not_number(r[0]) for r in rows[1:] if r)
    names = header[1:] if labelled else header
    body = [r[1:] for r in rows[1:]] if labelled else rows[1:]
    if labelled and [r[0] for r in rows[1:]] != list(names):
        raise FileFormatError(f"{path}: the row labels {[r[0] for r in rows[1:]]} must be the column names "
                              f"{list(names)} in the same order.")
    if any(len(r) != len(names) for r in body) or len(body) != len(names):
        raise InvalidParameterError(f"{path} must be square: {len(names)} named columns but rows of "
                                    f"{sorted({len(r) for r in body})} values and {len(body)} rows.")
    try:
        W = np.array([[float(c) for c in r] for r in body], dtype=np.float64)
    except ValueError as exc:
        raise FileFormatError(f"{path}: every weight must be a number ({exc}).") from None
    return NetworkMap(node_names=tuple(names), weights=W, source=str(path))


def _not_number(cell: str) -> bool:
    try:
        float(cell)
        return False
    except ValueError:
        return True


def read_network_map(path, node_names=None) -> NetworkMap:
    """Read a network map from a CSV file (node names in the header) or a ``.npy`` file.

    Parameters
    ----------
    path : str or Path
    node_names : sequence of str, optional
        Names of the nodes of a ``.npy`` map (default ``node0, node1, ...``); for a CSV they must equal the header.

    Returns
    -------
    NetworkMap

    Raises
    ------
    FileFormatError, InvalidParameterError
        Unreadable file, not square, non-finite weights, bad names.
    """
    path = Path(path)
    if not path.is_file():
        raise FileFormatError(f"network map {path} does not exist; give a CSV (header of node names) or a .npy file.")
    if path.suffix.lower() == ".npy":
        try:
            W = np.load(path, allow_pickle=False)
        except (ValueError, OSError) as exc:
            raise FileFormatError(f"{path} is not a readable .npy array ({exc}).") from None
        n = W.shape[0] if W.ndim >= 1 else 0
        names = tuple(node_names) if node_names is not None else tuple(f"node{i}" for i in range(n))
        return NetworkMap(node_names=names, weights=W, source=str(path))
    net = _csv_map(path)
    if node_names is not None and tuple(node_names) != net.node_names:
        raise InvalidParameterError(f"{path} names its nodes {list(net.node_names)}; the node names given "
                                    f"{list(node_names)} differ. Leave them out for a CSV map.")
    return net


# ---------------------------------------------------------------------------------------------------- model
def _normalised(W, time: str, normalisation: str, c: float) -> tuple[np.ndarray, str]:
    if normalisation == "none":
        return W.copy(), "none"
    if normalisation == "sigma":
        scale, what = float(np.linalg.norm(W, 2)), "sigma_max"
    else:
        if np.any(W < 0):
            i, j = np.argwhere(W < 0)[0]
            raise InvalidParameterError(
                f"the eigenvalue normalisation (Karrer et al. 2020) needs non-negative weights, whose largest "
                f"eigenvalue bounds the spectrum; the map has {int(np.sum(W < 0))} negative weights (e.g. {W[i, j]:g} "
                f"at row {i}, column {j}, counted from 0). Use --normalisation sigma for a signed map.")
        scale, what = float(np.max(np.real(np.linalg.eigvals(W)))), "lambda_max"
    if c + scale <= 0:
        raise InvalidParameterError(f"c + {what} must be positive to normalise; got c = {c:g}, {what} = {scale:g}.")
    A = W / (c + scale)
    label = f"A / ({c:g} + {what}(A)), {what} = {scale:.6g}"
    if time == "continuous":
        return A - np.eye(W.shape[0]), label + ", minus I"
    return A, label


def _zoh(Ac, Bc, dt):
    n, m = Bc.shape
    M = np.zeros((n + m, n + m))
    M[:n, :n], M[:n, n:] = Ac * dt, Bc * dt
    E = sla.expm(M)
    return E[:n, :n], E[:n, n:]


def _check_reach(A, net, stim):
    """Every node must be reachable along the map's edges (j -> i where A[i, j] != 0) from a stimulated node."""
    seen = set(stim)
    frontier = list(stim)
    adj = A != 0
    while frontier:
        j = frontier.pop()
        for i in np.flatnonzero(adj[:, j]):
            if int(i) not in seen:
                seen.add(int(i))
                frontier.append(int(i))
    missing = [net.node_names[i] for i in range(net.n_nodes) if i not in seen]
    if missing:
        raise InvalidParameterError(
            f"node(s) {', '.join(missing)} cannot be reached from any stimulated node ("
            f"{', '.join(net.node_names[i] for i in stim)}) along the map's connections, so no stimulation moves "
            "them; stimulate one of them too, or leave them out of the map.")


def map_model(net: NetworkMap, *, stimulated, recorded=None, time: str = "discrete", normalisation: str = "none",
              c: float = 1.0, time_step: float = 1.0, sample_rate_hz: float = 1.0) -> StateSpaceModel:
    """The linear model of a network map: states are nodes, sites are the stimulated nodes, channels the recorded.

    Parameters
    ----------
    net : NetworkMap
    stimulated : sequence of str
        Nodes that receive stimulation (``B`` = their columns of the identity, one site each).
    recorded : sequence of str, optional
        Recorded nodes (``C`` = their rows of the identity); default every node.
    time : {"discrete", "continuous"}
    normalisation : {"none", "sigma", "eigenvalue"}
        See the module docstring.
    c : float, default 1.0
        The constant of the normalisation.
    time_step : float, default 1.0
        Continuous maps: map time units per model step (zero-order hold).
    sample_rate_hz : float, default 1.0
        Model steps per second, for reports in seconds.

    Returns
    -------
    StateSpaceModel
        With ``info["network_map"]`` recording the map, the convention and the normalisation, and
        ``info["state_names"]`` the node names (the states mean something).

    Raises
    ------
    InvalidParameterError
        Bad convention, normalisation or constant; unknown node names; negative weights under the eigenvalue
        normalisation; a node no stimulated node can reach (named).
    UnstableModelError
        An unstable map without normalisation.
    """
    if time not in TIME_CONVENTIONS:
        raise InvalidParameterError(f"time must be one of {TIME_CONVENTIONS}; got {time!r}.")
    if normalisation not in NORMALISATIONS:
        raise InvalidParameterError(f"normalisation must be one of {NORMALISATIONS}; got {normalisation!r}.")
    for name, v in (("c", c), ("time_step", time_step)):
        if not np.isfinite(float(v)) or (name == "time_step" and float(v) <= 0) or (name == "c" and float(v) < 0):
            raise InvalidParameterError(f"{name} must be a finite number {'> 0' if name == 'time_step' else '>= 0'}; "
                                        f"got {v!r}.")
    stim = net.indices(list(stimulated), "stimulated nodes")
    rec = list(range(net.n_nodes)) if recorded is None else net.indices(list(recorded), "recorded nodes")
    _check_reach(net.weights, net, stim)
    A, label = _normalised(np.array(net.weights), time, normalisation, float(c))
    n = net.n_nodes
    B, C = np.eye(n)[:, stim], np.eye(n)[rec]
    if time == "continuous":
        top = float(np.max(np.real(np.linalg.eigvals(A))))
        if top >= 0:
            raise UnstableModelError(f"the continuous-time map is not stable (largest real part of an eigenvalue "
                                     f"{top:.4g} >= 0; normalisation: {label}); use --normalisation eigenvalue or "
                                     "sigma with c > 0.")
        A, B = _zoh(A, B, float(time_step))
    rho = float(np.max(np.abs(np.linalg.eigvals(A))))
    if rho >= 1.0:
        raise UnstableModelError(f"the map is unstable (spectral radius {rho:.4g} >= 1 with normalisation {label}); "
                                 "its Gramians do not exist. Normalise it (--normalisation sigma or eigenvalue).")
    info = {"network_map": {"source": net.source, "time": time, "normalisation": label, "c": float(c),
                            "time_step": float(time_step) if time == "continuous" else None},
            "state_names": list(net.node_names)}
    return StateSpaceModel(A=A, B=B, C=C, sample_rate_hz=sample_rate_hz, info=info,
                           input_names=tuple(net.node_names[i] for i in stim),
                           output_names=tuple(net.node_names[i] for i in rec))
