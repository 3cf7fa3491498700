"""Map-constrained identification: a linear model whose states are a network map's nodes and whose ``A`` is zero
outside the map's connections, fitted to a stimulation session.

The model is ``x[k+1] = A x[k] + B u[k]``, ``y[k] = M x[k]`` with ``M`` the known mixing of nodes into recorded
channels (default: each channel is the node of the same name). ``M`` must have full column rank (every node seen,
possibly through mixtures), so the node activity is ``x = M⁺ y`` and each row ``i`` of ``[A, B]`` is a least-squares
regression of ``x_i[k+1]`` on the nodes connected to ``i`` in the map (``A_ij`` free where the map has a connection
``j → i`` or ``i == j``, zero elsewhere) and on the inputs of the sites stimulating node ``i``. With ``shrink > 0``
each free ``A_ij`` is pulled toward the map's weight by a ridge term ``shrink · (A_ij − W_ij)²`` per row (scaled
by the number of regression rows). Rows never straddle a trial boundary or a masked sample.

:func:`compare_with_unconstrained` scores it on held-out trials against the unconstrained least-squares fit of the
same order (all ``A_ij`` and ``B`` entries free, same states), one-step and free-run.

Exact data from a network with known sparse ``A`` give back ``A`` on the support to rounding (tested to 1e-8).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._base import BaseEstimator, check_fitted
from .exceptions import InvalidParameterError, SessionError
from .statespace import StateSpaceModel

__all__ = ["MapConstrainedFit", "MapFitScores", "compare_with_unconstrained", "node_states"]


def node_states(session, mixing) -> np.ndarray:
    """Node activity ``x = M⁺ y`` of every sample (masked samples stay, unused)."""
    return np.asarray(session.y) @ np.linalg.pinv(mixing).T


def _rows(session, X):
    """Regression rows ``(x[k], u[k]) → x[k+1]`` inside valid segments only."""
    Z, Y = [], []
    U = np.asarray(session.u)
    for a, b in session.segments(min_length=2):
        Z.append(np.hstack([X[a:b - 1], U[a:b - 1]]))
        Y.append(X[a + 1:b])
    if not Z:
        raise SessionError("the session has no two consecutive valid samples inside a trial; nothing to fit.")
    return np.vstack(Z), np.vstack(Y)


class MapConstrainedFit(BaseEstimator):
    """Fit ``A`` on a network map's support (and ``B`` on the stimulated nodes) from a stimulation session.

    Parameters
    ----------
    network_map : NetworkMap
        The map (:func:`stimsteer.sysid.network.read_network_map`); its nodes are the states.
    stimulated : sequence of str
        The node each session input stimulates, in the order of the session's inputs.
    mixing : ndarray, shape (n_outputs, n_nodes), optional
        How the recorded channels mix the nodes; default: channel ``c`` is the node named ``c`` (the session's
        output names must then be node names, every node recorded).
    shrink : float, default 0.0
        Ridge weight toward the map's weights (0: plain least squares on the support).
    constrained : bool, default True
        False fits every entry of ``A`` and ``B`` (the unconstrained fit of the same order, for comparison).

    Attributes
    ----------
    A_ : ndarray, shape (n_nodes, n_nodes)
    B_ : ndarray, shape (n_nodes, n_inputs)
    support_ : ndarray of bool, shape (n_nodes, n_nodes)
        Where ``A_`` was free.
    mixing_ : ndarray, shape (n_outputs, n_nodes)
    n_rows_ : int
        Regression rows used.
    model_ : StateSpaceModel
        ``(A_, B_, mixing_)``, with the node names in ``info["state_names"]`` and the map in ``info["network_map"]``.
    """

    def __init__(self, *, network_map, stimulated, mixing=None, shrink=0.0, constrained=True):
        self.network_map = network_map
        self.stimulated = stimulated
        self.mixing = mixing
        self.shrink = shrink
        self.constrained = constrained

    def _mixing(self, session):
        net = self.network_map
        if self.mixing is None:
            missing = [s for s in net.node_names if s not in session.output_names]
            unknown = [s for s in session.output_names if s not in net.node_names]
            if unknown or missing:
                raise SessionError(
                    f"without a mixing matrix every recorded channel must be a map node and every node recorded; "
                    f"channels not in the map: {unknown or 'none'}; nodes not recorded: {missing or 'none'}. Give "
                    "--mixing (rows: channels, columns: nodes).")
            return np.eye(net.n_nodes)[[net.node_names.index(s) for s in session.output_names]]
        M = np.asarray(self.mixing, dtype=np.float64)
        if M.shape != (session.n_outputs, net.n_nodes) or not np.all(np.isfinite(M)):
            raise InvalidParameterError(f"mixing must be finite with shape ({session.n_outputs} channels, "
                                        f"{net.n_nodes} nodes); got {M.shape}.")
        rank = np.linalg.matrix_rank(M)
        if rank < net.n_nodes:
            raise InvalidParameterError(
                f"the mixing of nodes into channels has rank {rank} < {net.n_nodes} nodes, so the node activity is "
                "not determined by the recording; record more channels (map-constrained fits with hidden nodes are "
                "not supported).")
        return M

    def _check(self, session):
        s = float(self.shrink)
        if not np.isfinite(s) or s < 0:
            raise InvalidParameterError(f"shrink must be a finite number >= 0; got {self.shrink!r}.")
        stim = self.network_map.indices(list(self.stimulated), "stimulated nodes")
        if len(stim) != session.n_inputs:
            raise InvalidParameterError(f"name one stimulated node per session input ({session.n_inputs}: "
                                        f"{', '.join(session.input_names)}); got {len(stim)}.")
        return s, stim

    def fit(self, session):
        """Fit on every trial of ``session``; returns ``self``."""
        shrink, stim = self._check(session)
        net = self.network_map
        M = self._mixing(session)
        n, m = net.n_nodes, session.n_inputs
        Z, Y = _rows(session, node_states(session, M))
        W = np.asarray(net.weights)
        support = (W != 0) | np.eye(n, dtype=bool) if self.constrained else np.ones((n, n), dtype=bool)
        b_support = np.zeros((n, m), dtype=bool)
        b_support[stim, np.arange(m)] = True
        if not self.constrained:
            b_support[:] = True
        A, B = np.zeros((n, n)), np.zeros((n, m))
        for i in range(n):
            cols = np.concatenate([np.flatnonzero(support[i]), n + np.flatnonzero(b_support[i])])
            prior = np.concatenate([W[i, support[i]], np.zeros(int(b_support[i].sum()))])
            pen = np.concatenate([np.full(int(support[i].sum()), shrink), np.zeros(int(b_support[i].sum()))])
            theta = _ridge(Z[:, cols], Y[:, i], prior, pen * len(Y))
            A[i, support[i]] = theta[:support[i].sum()]
            B[i, b_support[i]] = theta[support[i].sum():]
        self.A_, self.B_, self.support_, self.mixing_, self.n_rows_ = A, B, support, M, int(len(Y))
        info = {"network_map": {"source": net.source, "time": "discrete (fitted on the map's support)"
                                if self.constrained else "discrete (unconstrained fit)",
                                "normalisation": "none", "c": None, "time_step": None},
                "state_names": list(net.node_names)}
        self.model_ = StateSpaceModel(A=A, B=B, C=M, sample_rate_hz=session.sample_rate_hz, info=info,
                                      input_names=session.input_names, output_names=session.output_names)
        return self

    def state_space_model(self) -> StateSpaceModel:
        """The fitted model (the :class:`~stimsteer.sysid.protocols.StateSpaceForm` capability)."""
        check_fitted(self, "model_")
        return self.model_


def _ridge(Z, y, prior, pen):
    """``argmin ||Z θ − y||² + Σ pen_k (θ_k − prior_k)²`` by an augmented least-squares solve."""
    if Z.shape[1] == 0:
        return np.zeros(0)
    keep = pen > 0
    if keep.any():
        R = np.diag(np.sqrt(pen[keep]))
        E = np.zeros((int(keep.sum()), Z.shape[1]))
        E[:, keep] = R
        Z = np.vstack([Z, E])
        y = np.concatenate([y, R @ prior[keep]])
    return np.linalg.lstsq(Z, y, rcond=None)[0]


@dataclass(frozen=True)
class MapFitScores:
    """Held-out scores of the map-constrained and the unconstrained fit of the same order.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per fit and score (``one_step_r2``, ``free_run_r2``: mean over channels of held-out trials).
    test_trials : tuple of int
    seed : int
    """

    table: object
    test_trials: tuple
    seed: int


def _score(fit, session):
    X = node_states(session, fit.mixing_)
    Z, Y = _rows(session, X)
    M = fit.mixing_
    pred = (Z[:, :fit.A_.shape[0]] @ fit.A_.T + Z[:, fit.A_.shape[0]:] @ fit.B_.T) @ M.T
    true = Y @ M.T
    one = _r2(true, pred)
    sims, trues = [], []
    for a, b in session.segments(min_length=2):
        x = X[a].copy()
        for k in range(a, b):
            sims.append(M @ x)
            trues.append(np.asarray(session.y[k]))
            x = fit.A_ @ x + fit.B_ @ np.asarray(session.u[k])
    return one, _r2(np.array(trues), np.array(sims))


def _r2(true, pred):
    ss = np.sum((true - true.mean(axis=0)) ** 2, axis=0)
    res = np.sum((true - pred) ** 2, axis=0)
    return float(np.mean(1.0 - res / np.where(ss > 0, ss, np.nan)))


def compare_with_unconstrained(session, network_map, stimulated, *, mixing=None, shrink=0.0, seed=0,
                               test_fraction=0.25) -> tuple[MapConstrainedFit, MapFitScores]:
    """Fit on training trials, score both fits on held-out trials; returns the map-constrained fit on all trials.

    Raises
    ------
    SessionError
        With fewer than two trials (no held-out trial).
    """
    if session.n_trials < 2:
        raise SessionError("held-out scores need at least 2 trials; the session has 1. Label the trials (events) "
                           "or split the recording.")
    import pandas as pd

    split = session.split(test_fraction=test_fraction, seed=seed)
    train, test = session.train_test(split)
    rows = []
    for label, constrained in (("map-constrained", True), ("unconstrained (same order)", False)):
        f = MapConstrainedFit(network_map=network_map, stimulated=stimulated, mixing=mixing,
                              shrink=shrink if constrained else 0.0, constrained=constrained).fit(train)
        one, free = _score(f, test)
        rows.append((label, int(f.support_.sum()) + int((f.B_ != 0).sum()), one, free))
    table = pd.DataFrame(rows, columns=["fit", "free_parameters", "one_step_r2", "free_run_r2"])
    full = MapConstrainedFit(network_map=network_map, stimulated=stimulated, mixing=mixing, shrink=shrink).fit(session)
    return full, MapFitScores(table=table, test_trials=tuple(int(i) for i in split.test), seed=int(seed))
