"""Subspace identification that stays consistent under feedback: predictor-based subspace identification (PBSID).

Ordinary subspace methods project future outputs on future inputs and assume those inputs uncorrelated with the
future noise; a stimulation that depends on past recordings (a closed loop) breaks that assumption and biases the
estimate. The predictor form ``x⁺ = Ā x + B̄ u + K y``, ``Ā = A − K C``, ``B̄ = B − K D``, is driven by the measured
``y`` itself, and its one-step predictor ``y_k = Σ_l C Ā^(l−1) [B̄ K] z_{k−l} + e_k`` (``z = [u; y]``) is a
regression on the past alone, whose residual ``e_k`` is the innovation: uncorrelated with every past sample,
whatever the feedback. :class:`ClosedLoopSubspaceId` follows the VARX route of Chiuso (2007):

1. fit the vector ARX model of ``past_steps`` lags by least squares (its coefficients estimate the predictor
   Markov parameters ``Φ_l = C Ā^(l−1) [B̄ K]``);
2. build the product of the predictor's extended observability and controllability matrices from them,
   ``M[r, l] = Φ_{r+l}`` (``r = 0..f−1`` future block rows; zero where ``r + l`` exceeds the VARX order, the
   truncation ``Ā^p ≈ 0`` of the method), and take its SVD weighted by the past data (``M L``,
   ``L Lᵀ = Σ z_p z_pᵀ / N``): the leading ``n`` singular vectors give the state ``x̂_k = T z_p(k)``;
3. regress ``y_k`` on ``x̂_k`` (``C``; ``D = 0``: a loop needs a strictly causal plant) and ``x̂_{k+1}`` on
   ``[x̂_k; u_k; e_k]`` (``A``, ``B``, ``K``), with ``e_k`` the residual of the first regression.

Every regression is a linear function of the window ``w_k = [z_{k−p} … z_k]``, so the whole fit needs one pass
over the data for the Gram ``Σ w wᵀ`` (inside valid segments only) and then small dense algebra. Channels are
scaled to unit RMS before, and the model transformed back after.

References
----------
Chiuso A. (2007), The role of vector autoregressive modeling in predictor-based subspace identification,
Automatica 43:1034–1048.
Chiuso A., Picci G. (2005), Consistency analysis of some closed-loop subspace identification methods, Automatica
41:377–391.
Ljung L., McKelvey T. (1996), Subspace identification from closed loop data, Signal Processing 52:209–215.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import scipy.linalg as sla

from .._offsets import ShiftedOutputs as _ShiftedOutputs, output_mean as _output_mean
from ..exceptions import InvalidParameterError, SessionError
from ..statespace import StateSpaceModel
from .estimator import SubspaceId

__all__ = ["ClosedLoopSubspaceId"]

_DEFAULT_ORDER_CAP = 10
_RIDGE = 1e-10  # relative Tikhonov floor of the regressions (channels at unit RMS): rounding level only


class ClosedLoopSubspaceId(SubspaceId):
    """Predictor-based subspace identification (PBSID, VARX route), consistent for data recorded under feedback.

    Parameters
    ----------
    past_steps : int, default 10
        ``p``: lags of the VARX model and the past window of the state (``Ā^p`` must be negligible: longer for slow
        dynamics or a slow predictor).
    future_steps : int, default 10
        ``f``: block rows of the observability matrix (``p_out · f >= order``), at most ``past_steps``.
    order : int or None, default None
        States; None takes the largest ratio of consecutive singular values up to ``max_order``.
    max_order : int or None, default None
        Largest order considered; default ``min(10, p_out · f)``.
    feedthrough : False
        Only False: a feedback loop needs ``D = 0`` (kept as a setting for the file format of subspace models).
    centre_outputs : bool, default False
        As for :class:`SubspaceId`.

    Attributes
    ----------
    model_, order_, order_gap_, singular_values_, order_table_, selection_notes_, process_cov_, measurement_cov_,
    cross_cov_, is_stable_, past_steps_, max_horizon_steps_, n_columns_, heldout_, output_offset_, feedthrough_
        As for :class:`SubspaceId` (``order_table_.heldout_error`` is NaN: the order comes from the singular
        values; ``n_columns_`` counts the windows used).
    varx_coef_ : ndarray, shape (n_outputs, past_steps · (n_inputs + n_outputs))
        The VARX predictor coefficients, oldest lag first, each lag ``[u; y]``, in the session's units.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import Session
    >>> rng = np.random.default_rng(0)
    >>> y, u = np.zeros((3000, 1)), np.zeros((3000, 1))
    >>> x = 0.0
    >>> for k in range(3000):  # x+ = 0.8 x + u, y = x + e, under the feedback u = r − 0.5 y
    ...     y[k] = x + 0.1 * rng.standard_normal()
    ...     u[k] = rng.standard_normal() - 0.5 * y[k, 0]
    ...     x = 0.8 * x + u[k, 0]
    >>> est = ClosedLoopSubspaceId(past_steps=8, future_steps=4, order=1).fit(Session(u=u, y=y, sample_rate_hz=1.0))
    >>> round(float(est.model_.poles[0].real), 2)
    0.8
    """

    storage_kind = "subspace_closed_loop"
    in_default_bench = False  # the benchmark's designed stimulation is open loop: ordinary subspace serves it

    def __init__(self, *, past_steps=10, future_steps=10, order=None, max_order=None, feedthrough=False,
                 centre_outputs=False):
        self.past_steps = past_steps
        self.future_steps = future_steps
        self.order = order
        self.max_order = max_order
        self.feedthrough = feedthrough
        self.centre_outputs = centre_outputs

    def _check(self, session):
        i = self._int("past_steps", self.past_steps, 1)
        f = self._int("future_steps", self.future_steps, 1)
        if f > i:
            raise InvalidParameterError(f"future_steps ({f}) must not exceed past_steps ({i}): the observability rows "
                                        "come from the VARX lags.")
        if self.feedthrough is not False:
            raise InvalidParameterError(f"feedthrough must be False for closed-loop identification (a loop needs a "
                                        f"strictly causal plant, D = 0); got {self.feedthrough!r}.")
        if not isinstance(self.centre_outputs, (bool, np.bool_)):
            raise InvalidParameterError(f"centre_outputs must be True or False; got {self.centre_outputs!r}.")
        m, p = int(session.n_inputs), int(session.n_outputs)
        if m < 1:
            raise SessionError("subspace identification needs at least one input channel; the session has none.")
        cap = p * f
        order = None if self.order is None else self._int("order", self.order, 1)
        top = min(_DEFAULT_ORDER_CAP, cap) if self.max_order is None else self._int("max_order", self.max_order, 1)
        if max(order or 0, top) > cap:
            raise InvalidParameterError(f"order {max(order or 0, top)} is above the largest possible order {cap} = "
                                        f"n_outputs · future_steps; lower it or lengthen future_steps.")
        return i, f, m, p, order, max(top, order or 0)

    def fit(self, session) -> "ClosedLoopSubspaceId":
        """Identify the model from ``session`` (closed-loop or open-loop data; one pass, then small algebra).

        Parameters
        ----------
        session : Session or SessionFile
            Windows of ``past_steps + 1`` samples are taken inside ``session.segments()`` only.

        Returns
        -------
        self

        Raises
        ------
        InvalidParameterError
            Bad settings.
        SessionError
            Fewer windows than regressors, or segments shorter than ``past_steps + 1``.
        """
        i, f, m, p, order, top = self._check(session)
        offset = _output_mean(session) if self.centre_outputs else np.zeros(p)
        src = _ShiftedOutputs(session, offset) if self.centre_outputs else session
        from .._lagged import blas_threads  # the cached controller (a fresh limit re-scans the libraries)

        # small dense algebra: one BLAS thread (two threads only wait on each other at this size, worse under load)
        with blas_threads(1):
            G, n_win, scale = _window_gram(src, i, m, p)
            self._identify_pbsid(G, n_win, scale, (i, f, m, p, order, top), session)
        self.output_offset_ = offset
        if self.centre_outputs:
            self.model_ = self.model_.replace(info={**self.model_.info, "output_offset": offset.tolist()})
        return self

    def _identify_pbsid(self, G, n_win, scale, dims, session):
        i, f, m, p, order, top = dims
        nz, d_p = m + p, i * (m + p)
        Gpp, Gyp = G[:d_p, :d_p], G[d_p + m:, :d_p]
        coef = _ridge_solve(Gpp, Gyp.T).T  # the VARX predictor (scaled channels)
        M = np.zeros((f * p, d_p))
        for r in range(f):
            for lag in range(1, i + 1 - r):  # Φ_{r+lag} multiplies z_{k−lag}; its block is at i − lag
                j = i - (r + lag)
                M[r * p:(r + 1) * p, (i - lag) * nz:(i - lag + 1) * nz] = coef[:, j * nz:(j + 1) * nz]
        Lc = _chol(Gpp / n_win)
        U, sv, _ = np.linalg.svd(M @ Lc, full_matrices=False)
        rows, models = [], {}
        for n in range(1, top + 1):
            models[n] = _realise(G, U[:, :n] * (1.0 / np.sqrt(np.maximum(sv[:n], 1e-300))), M, n_win, i, m, p)
            rows.append(n)
        nxt = np.append(sv[1:], sv[-1])  # the last order has no successor: ratio 1
        gaps = (sv / np.maximum(nxt, 1e-300 * max(sv[0], 1e-300)))[:top]
        gap = int(np.argmax(gaps)) + 1
        chosen = order or gap
        self._store_pbsid(models, chosen, gap, gaps, sv, scale, coef, n_win, (i, m, p), session)

    def _store_pbsid(self, models, chosen, gap, gaps, sv, scale, coef, n_win, dims, session):
        i, m, p = dims
        su, sy = scale[:m], scale[m:]
        A, B, C, K, Re = models[chosen]
        Cu, Ku, Reu = sy[:, None] * C, K / sy[None, :], np.outer(sy, sy) * Re
        names = dict(input_names=getattr(session, "input_names", None),
                     output_names=getattr(session, "output_names", None))
        self.model_ = StateSpaceModel(A=A, B=B / su[None, :], C=Cu, D=np.zeros((p, m)), K=Ku, innovation_cov=Reu,
                                      sample_rate_hz=float(session.sample_rate_hz), past_steps=i,
                                      info={"source": "ClosedLoopSubspaceId", "method": "PBSID (VARX)"}, **names,
                                      input_units=getattr(session, "input_units", None),
                                      output_units=getattr(session, "output_units", None))
        stable = {n: bool(np.max(np.abs(np.linalg.eigvals(mod[0])), initial=0) < 1) for n, mod in models.items()}
        self.order_table_ = pd.DataFrame({
            "order": np.array(sorted(models), dtype=np.int64), "singular_value": sv[:len(models)],
            "gap_ratio": gaps[:len(models)], "heldout_error": np.full(len(models), np.nan),
            "stable": [stable[n] for n in sorted(models)], "selected": [n == chosen for n in sorted(models)]})
        self.order_, self.order_gap_, self.singular_values_ = int(chosen), int(gap), sv.copy()
        self.selection_notes_ = () if stable[chosen] else (
            f"the identified order-{chosen} model is unstable (spectral radius "
            f"{np.max(np.abs(np.linalg.eigvals(A))):.4f}); try another order or a longer past window.",)
        self.process_cov_ = Ku @ Reu @ Ku.T
        self.measurement_cov_, self.cross_cov_ = Reu, Ku @ Reu
        self.is_stable_ = stable[chosen]
        self.feedthrough_ = False
        self.past_steps_, self.max_horizon_steps_ = i, None
        self.n_columns_, self.heldout_ = int(n_win), "none (order from the singular values of the VARX predictor)"
        rep = np.tile(scale, i)
        self.varx_coef_ = (sy[:, None] * coef) / rep[None, :]
        self._set_channels(self.model_)


def _ridge_solve(G, rhs):
    """``G⁻¹ rhs`` for a PSD Gram with a relative floor (rounding-level Tikhonov term)."""
    lam = _RIDGE * max(float(np.trace(G)) / G.shape[0], 1e-300)
    return sla.solve(G + lam * np.eye(G.shape[0]), rhs, assume_a="pos")


def _chol(G):
    lam = _RIDGE * max(float(np.trace(G)) / G.shape[0], 1e-300)
    return np.linalg.cholesky(G + lam * np.eye(G.shape[0]))


def _realise(G, W, M, n_win, i, m, p):
    """``A, B, C, K, Re`` (scaled channels) for the state ``x̂ = Wᵀ M z_p``, from the window Gram alone."""
    nz, d_p = m + p, i * (m + p)
    d_w = d_p + nz
    T = W.T @ M  # x̂_k = T z_p(k)
    Tk = np.zeros((T.shape[0], d_w))
    Tk[:, :d_p] = T  # x̂_k from the window w_k = [z_p(k); z_k]
    Tn = np.zeros_like(Tk)
    Tn[:, nz:] = T  # x̂_{k+1} = T [z_{k−p+1} … z_k]
    Ey = np.zeros((p, d_w))
    Ey[:, d_p + m:] = np.eye(p)
    Eu = np.zeros((m, d_w))
    Eu[:, d_p:d_p + m] = np.eye(m)
    C = _ridge_solve(Tk @ G @ Tk.T, Tk @ G @ Ey.T).T
    Ee = Ey - C @ Tk  # the innovation e_k = y_k − C x̂_k
    S = np.vstack([Tk, Eu, Ee])
    theta = _ridge_solve(S @ G @ S.T, S @ G @ Tn.T).T
    n = T.shape[0]
    A, B, K = theta[:, :n], theta[:, n:n + m], theta[:, n + m:]
    Re = Ee @ G @ Ee.T / n_win
    return A, B, C, K, 0.5 * (Re + Re.T)


def _window_gram(source, i, m, p):
    """Gram ``Σ w wᵀ`` of the windows ``w_k = [z_{k−i} … z_k]`` (channels at unit RMS), their count and the scales."""
    segs = source.segments(min_length=i + 1)
    if not segs:
        raise SessionError(f"closed-loop subspace identification with past_steps={i} needs valid runs of at least "
                           f"{i + 1} samples inside a trial; none is that long. Lower past_steps or record longer "
                           "trials.")
    nz = m + p
    sq, n = np.zeros(nz), 0
    for a, b in source.segments():
        u, y, _ = source.read(a, b)
        z = np.hstack([np.asarray(u, np.float64), np.asarray(y, np.float64)])
        sq += np.einsum("ij,ij->j", z, z)
        n += z.shape[0]
    scale = np.sqrt(sq / max(n, 1))
    scale[~(scale > 0) | ~np.isfinite(scale)] = 1.0
    d_w = (i + 1) * nz
    G, n_win = np.zeros((d_w, d_w)), 0
    for a, b in segs:
        u, y, _ = source.read(a, b)
        z = np.hstack([np.asarray(u, np.float64), np.asarray(y, np.float64)]) / scale
        k = z.shape[0] - i
        W = np.hstack([z[j:j + k] for j in range(i + 1)])
        G += W.T @ W
        n_win += k
    if n_win < d_w:
        raise SessionError(f"closed-loop subspace identification needs at least {d_w} windows of {i + 1} samples "
                           f"(one per regressor); the session gives {n_win}. Record more samples or lower past_steps.")
    return G, n_win, scale


def method_for_session(session, route: str, method: str, settings: dict | None = None) -> str:
    """The method to fit: the closed-loop one where ordinary subspace was asked for data recorded under feedback.

    A session whose metadata says ``recorded_under_feedback`` (e.g. a run of ``stimsteer live``) biases
    ordinary subspace identification; ``("indirect", "subspace")`` then becomes ``("indirect", "pbsid")``
    (:class:`ClosedLoopSubspaceId`) with a warning, unless a setting given is one the closed-loop method does not
    take (then the asked method is kept, and the warning says why).
    """
    meta = getattr(session, "metadata", None) or {}
    if (route, method) != ("indirect", "subspace") or not meta.get("recorded_under_feedback"):
        return method
    import inspect
    import warnings

    from ..exceptions import StimsteerWarning

    own = set(inspect.signature(ClosedLoopSubspaceId.__init__).parameters) - {"self"}
    extra = sorted(set(settings or {}) - own)
    if extra:
        warnings.warn(f"the session was recorded under feedback, which biases ordinary subspace identification, but "
                      f"the settings {extra} are not settings of the closed-loop method; fitting 'subspace' as asked "
                      "(use --method pbsid without them).", StimsteerWarning, stacklevel=3)
        return method
    warnings.warn("the session was recorded under feedback (its metadata says recorded_under_feedback), which biases "
                  "ordinary subspace identification; fitting the closed-loop method 'pbsid' (predictor-based "
                  "subspace, Chiuso 2007) instead.", StimsteerWarning, stacklevel=3)
    return "pbsid"
