"""Subspace identification of a state-space model from block-Hankel data (N4SID, MOESP and CVA weightings).

The data of all trials are summarised by one Gram matrix of the multi-trial (mosaic) block-Hankel matrix of the
joint signal ``[u y]``; Hankel columns are built only inside valid segments (:meth:`Session.segments`), so none
straddles a trial boundary or touches a masked sample. The LQ factorisation ``[Uf; Up; Yp; Yf] = L Q`` of the
stacked data has ``L Lᵀ`` equal to that Gram matrix, so every projection the LQ route forms is written here with
Gram blocks (Schur complements) instead: after the one data pass nothing depends on the number of samples, and
fitting costs about one Gram of the Hankel matrix however many orders are tried.
"""

from __future__ import annotations

import contextlib
import functools
import json
import warnings

import numpy as np
import pandas as pd

from ._base import check_fitted
from .exceptions import ExcitationError, SessionError, StimsteerWarning
from ._lagged import _stream_sums
from ._offsets import ShiftedOutputs as _ShiftedOutputs, output_mean as _output_mean
from .statespace import StateSpaceModel, kalman_gain

try:  # installed with scikit-learn; limits BLAS threads for the many small matrix operations after the data pass
    from threadpoolctl import threadpool_limits as _threadpool_limits
except ImportError:  # pragma: no cover - scikit-learn always brings it
    _threadpool_limits = None

__all__ = ["SubspaceId"]

_WEIGHTINGS = ("n4sid", "moesp", "cva")
_SELECTION_DEFAULTS = {"holdout_fraction": 0.25, "tolerance": 0.05, "seed": 0}
_DEFAULT_ORDER_CAP = 10
# Relative cut-off for eigenvalues of (scaled, unit-RMS) covariance matrices treated as zero. Noise-free data make
# several conditional covariances exactly singular; their rounding-level eigenvalues (~1e-15) must not be inverted.
_RTOL = 1e-10
# Below this (relative to the unit output power of the scaled data) the residual covariances count as zero.
_NOISE_FREE = 1e-12
# Singular values below this share of the largest are rounding noise: orders beyond them are not supported by data.
_SV_RTOL = 1e-8
_THREADED_WIDTH = 256
_TABLE_COLUMNS = ("order", "singular_value", "gap_ratio", "heldout_error", "stable", "selected")


# ----------------------------------------------------------------------------------------------------- layout
_STREAM_ROWS = 16384  # rows per chunk of the Hankel Gram's data pass


class _Layout:
    """Row indices of the blocks of one Hankel column ``vec([u y]_{t-i..t+f-1})`` (time-major, see CONTRACTS)."""

    def __init__(self, past: int, future: int, m: int, p: int):
        self.i, self.f, self.m, self.p = past, future, m, p
        self.c = m + p
        self.width = past + future
        self.nz = self.width * self.c
        self.Up = self._idx(0, past, 0, m)
        self.Yp = self._idx(0, past, m, self.c)
        self.Uf = self._idx(past, self.width, 0, m)
        self.Yf = self._idx(past, self.width, m, self.c)
        self.P = np.concatenate([self.Up, self.Yp])
        # one step later: the past grows by the first future block, the future loses it
        self.P1 = np.concatenate([self._idx(0, past + 1, 0, m), self._idx(0, past + 1, m, self.c)])
        self.Uf1 = self._idx(past + 1, self.width, 0, m)
        self.Yf1 = self._idx(past + 1, self.width, m, self.c)
        self.u0 = self._idx(past, past + 1, 0, m)
        self.y0 = self._idx(past, past + 1, m, self.c)

    def _idx(self, t0, t1, ch0, ch1):
        return np.array([t * self.c + ch for t in range(t0, t1) for ch in range(ch0, ch1)], dtype=np.intp)

    def select(self, rows) -> np.ndarray:
        """The selection matrix ``E`` with ``E @ z = z[rows]``, shape (len(rows), nz)."""
        E = np.zeros((len(rows), self.nz))
        E[np.arange(len(rows)), rows] = 1.0
        return E

    @property
    def max_order(self) -> int:
        # shift invariance needs p (f − 1) >= n; a state read from i past outputs needs p i >= n
        return min(self.p * (self.f - 1), self.p * self.i)


# ----------------------------------------------------------------------------------------------------- data pass
def _hankel_gram(source, segments, layout: _Layout):
    """Gram matrix ``Σ_t z_t z_tᵀ`` of the Hankel columns inside ``segments`` and the number of columns.

    The column of window ``t`` holds the samples ``t … t + w − 1``: the lagged vector ``[Z_k; …; Z_{k−w+1}]`` of
    ``k = t + w − 1`` in reversed time order and with the channels as ``[u y]`` instead of ``[y u]``. Its Gram is
    therefore the lagged-sum stream's (:mod:`._lagged`: ``w`` products of ``(n × c)`` chunks per chunk instead of
    one product of ``(n × w c)`` columns), permuted. Memory stays bounded by a few chunks.
    """
    w, c, p = layout.width, layout.c, layout.p
    lag = w - 1
    pieces = [(int(a) + lag, int(b), 0) for a, b in segments if b - a >= w]
    if not pieces:
        return np.zeros((layout.nz, layout.nz)), 0
    (acc,), _lo, _hi = _stream_sums(source, pieces, 1, lag, _STREAM_ROWS, np.zeros(c))
    W = acc.moments().W
    # Hankel row (τ, channel in [u y] order) <- lagged row (lag w − 1 − τ, channel in [y u] order)
    in_z = np.concatenate([np.arange(p, c), np.arange(p)])  # [u y] channel j sits at in_z[j] of [y u]
    perm = np.array([(lag - tau) * c + in_z[j] for tau in range(w) for j in range(c)], dtype=np.intp)
    G = W[np.ix_(perm, perm)]
    return 0.5 * (G + G.T), int(acc.n)


def _partition(session, width: int, fraction: float, seed: int):
    """Split the usable segments into fitting and held-out checking parts.

    With two or more trials holding usable segments, whole trials are held out (seeded). With one such trial the
    last ``fraction`` of each segment is held out as one contiguous stretch; no column crosses the cut.
    """
    segs = session.segments(min_length=width)
    trials = np.asarray(session.trials)
    owner = [int(np.searchsorted(trials[:, 0], a, side="right") - 1) for a, _ in segs]
    usable = sorted(set(owner))
    if len(usable) >= 2:
        n_check = min(len(usable) - 1, max(1, int(round(fraction * len(usable)))))
        rng = np.random.default_rng(seed)
        check_trials = {usable[k] for k in rng.permutation(len(usable))[:n_check]}
        fit = [s for s, o in zip(segs, owner) if o not in check_trials]
        check = [s for s, o in zip(segs, owner) if o in check_trials]
        return fit, check, f"held-out trials {sorted(check_trials)}"
    fit, check = [], []
    for a, b in segs:
        cut = b - int(round(fraction * (b - a)))
        if cut - a >= width and b - cut >= width:
            fit.append((a, cut))
            check.append((cut, b))
        else:
            fit.append((a, b))
    return fit, check, f"held-out last {fraction:g} of each segment (single trial)"


# ----------------------------------------------------------------------------------------------------- linear algebra
def _psd_parts(M: np.ndarray):
    """Eigenvectors and eigenvalues of a symmetric PSD matrix above the relative cut-off ``_RTOL``."""
    lam, V = np.linalg.eigh(0.5 * (M + M.T))
    keep = lam > _RTOL * max(float(lam[-1]), np.finfo(float).tiny)
    return V[:, keep], lam[keep]


def _cond_text(lam: np.ndarray) -> str:
    """Condition number of a symmetric PSD matrix from its ascending eigenvalues, as text ("inf" if singular)."""
    return f"{lam[-1] / lam[0]:.2e}" if lam[0] > 0 and lam[-1] / lam[0] < 1e300 else "inf"


def _pinv_psd(M: np.ndarray) -> np.ndarray:
    V, lam = _psd_parts(M)
    return (V / lam) @ V.T


def _conditional(S: np.ndarray, a, b, given) -> np.ndarray:
    """``S_ab − S_a,g S_gg⁺ S_g,b``: the covariance of the parts of ``a`` and ``b`` not explained by ``given``."""
    Sgg_inv = _pinv_psd(S[np.ix_(given, given)])
    return S[np.ix_(a, b)] - S[np.ix_(a, given)] @ Sgg_inv @ S[np.ix_(given, b)]


class _Projection:
    """Oblique projection, weighting and SVD of one (scaled) Hankel covariance; shared by every candidate order.

    Notes
    -----
    With ``Σ_{·|U}`` the covariances conditioned on the future inputs ``Uf`` and ``Wp = [Up; Yp]`` the past, the
    oblique projection of ``Yf`` along ``Uf`` onto ``Wp`` is ``O = Θ Wp`` with ``Θ = Σ_{YfWp|U} Σ_{WpWp|U}⁺``
    (Van Overschee & De Moor 1996, Theorem 2). The weighted matrix whose SVD gives the observability matrix is

    - N4SID: ``O`` itself (W1 = I, W2 = I), i.e. ``Θ Σ_{WpWp}^{1/2}``;
    - MOESP: ``O Π_{Uf⊥}`` (W2 = Π_{Uf⊥}), i.e. ``Σ_{YfWp|U} Σ_{WpWp|U}^{−1/2}`` (the ``L32`` of the LQ);
    - CVA:   ``Σ_{YfYf|U}^{−1/2} O Π_{Uf⊥}``; its singular values are canonical correlations.

    ``Γ = W1⁻¹ U₁ S₁^{1/2}`` for the leading ``n`` singular triplets.
    """

    def __init__(self, S: np.ndarray, layout: _Layout, weighting: str):
        L = layout
        Sc_pp = _conditional(S, L.P, L.P, L.Uf)
        Sc_yp = _conditional(S, L.Yf, L.P, L.Uf)
        V, lam = _psd_parts(Sc_pp)
        self.theta = Sc_yp @ ((V / lam) @ V.T)
        w_inv = None
        if weighting == "n4sid":
            E, xi = _psd_parts(S[np.ix_(L.P, L.P)])
            mat = self.theta @ (E * np.sqrt(xi))
        else:
            mat = Sc_yp @ (V / np.sqrt(lam))
            if weighting == "cva":
                H, om = _psd_parts(_conditional(S, L.Yf, L.Yf, L.Uf))
                mat = ((H / np.sqrt(om)) @ H.T) @ mat
                w_inv = (H * np.sqrt(om)) @ H.T
        U, sv, _ = np.linalg.svd(mat, full_matrices=False)
        k = len(L.Yf)
        self.singular_values = np.concatenate([sv, np.zeros(max(0, k - sv.size))])[:k]
        self.U = U
        self.w_inv = w_inv
        self.S = S
        self.layout = L

    @functools.cached_property
    def given_past(self):
        """Covariances of ``Uf`` and of ``Yf`` with ``Uf`` conditioned on the past ``Wp`` (for ``B, D``)."""
        S, L = self.S, self.layout
        return _conditional(S, L.Uf, L.Uf, L.P), _conditional(S, L.Yf, L.Uf, L.P)

    @functools.cached_property
    def theta_next(self) -> np.ndarray:
        """``Θ₊``: the oblique projection one step later (past one block longer, future one shorter)."""
        S, L = self.S, self.layout
        return _conditional(S, L.Yf1, L.P1, L.Uf1) @ _pinv_psd(_conditional(S, L.P1, L.P1, L.Uf1))

    def gamma(self, n: int) -> np.ndarray:
        """Extended observability matrix for order ``n``, shape (p f, n)."""
        G = self.U[:, :n] * np.sqrt(self.singular_values[:n])
        return G if self.w_inv is None else self.w_inv @ G


# ----------------------------------------------------------------------------------------------------- estimation
def _a_c(gamma: np.ndarray, p: int):
    """``C`` = first block row of Γ; ``A`` from the shift invariance ``Γ_up A = Γ_down`` by least squares."""
    C = gamma[:p].copy()
    A = np.linalg.lstsq(gamma[:-p], gamma[p:], rcond=None)[0]
    return A, C


def _toeplitz_basis(A, C, layout: _Layout, feedthrough: bool) -> np.ndarray:
    """Basis ``H_k`` of the block-Toeplitz matrix of Markov parameters, linear in ``θ = [vec(B); vec(D)]``.

    Shape (n_theta, p f, m f); ``vec`` is column-major, so ``B = θ[:n m].reshape(n, m, order="F")``.
    """
    n, m, p, f = A.shape[0], layout.m, layout.p, layout.f
    CA = [C]
    for _ in range(f - 2):
        CA.append(CA[-1] @ A)
    n_theta = n * m + (p * m if feedthrough else 0)
    Hs = np.zeros((n_theta, p * f, m * f))
    for l in range(m):
        for j in range(n):
            k = l * n + j
            for r in range(1, f):
                for s in range(r):
                    Hs[k, r * p:(r + 1) * p, s * m + l] = CA[r - s - 1][:, j]
    if feedthrough:
        for l in range(m):
            for a in range(p):
                k = n * m + l * p + a
                for r in range(f):
                    Hs[k, r * p + a, r * m + l] = 1.0
    return Hs


def _b_d(proj: _Projection, gamma, A, C, feedthrough: bool):
    """``B`` and ``D`` by least squares on the block-Hankel data given ``A`` and ``C``.

    Notes
    -----
    Minimises ``‖Yf − Γ Z Wp − H(B, D) Uf‖²`` over ``B``, ``D`` and the free map ``Z`` from the past to the column
    states. Eliminating ``Z`` leaves ``tr(P₁ R Π_{Wp⊥} Rᵀ) + tr(P₂ R Rᵀ)``, ``R = Yf − H Uf``, ``P₁`` the projector
    on range(Γ) and ``P₂ = I − P₁``: a quadratic in ``θ`` written with Hankel covariances only. Exact for
    noise-free data; consistent for open-loop data, where future noise is uncorrelated with past and future inputs.
    """
    L, S = proj.layout, proj.S
    n, m, p = A.shape[0], L.m, L.p
    Hs = _toeplitz_basis(A, C, L, feedthrough)
    Q = np.linalg.qr(gamma)[0]
    P1 = Q @ Q.T
    S_uu, S_yu = S[np.ix_(L.Uf, L.Uf)], S[np.ix_(L.Yf, L.Uf)]
    Sc_uu, Sc_yu = proj.given_past
    target = S_yu + P1 @ (Sc_yu - S_yu)
    image = Hs @ S_uu + P1 @ (Hs @ (Sc_uu - S_uu))
    flat = Hs.reshape(Hs.shape[0], -1)
    M = flat @ image.reshape(Hs.shape[0], -1).T
    M = 0.5 * (M + M.T)
    rhs = flat @ target.reshape(-1)
    lam = np.linalg.eigvalsh(M)
    if lam[0] <= 1e-12 * max(lam[-1], np.finfo(float).tiny):
        raise ExcitationError(
            "the inputs do not excite the model enough to estimate B"
            + (" and D" if feedthrough else "")
            + f" (normal equations of condition {_cond_text(lam)}). "
            "Use a richer stimulation schedule (`stimsteer schedule`), or a lower order."
        )
    theta = np.linalg.solve(M, rhs)
    B = theta[:n * m].reshape(n, m, order="F")
    D = theta[n * m:].reshape(p, m, order="F") if feedthrough else np.zeros((p, m))
    return B, D


def _state_maps(proj: _Projection, gamma):
    """Linear maps from a Hankel column ``z`` to the estimated states at its first and second future sample.

    ``x̂_t = Γ⁺ Θ Wp`` and ``x̂_{t+1} = Γ₋⁺ Θ₊ Wp₊`` (past one step longer, future one shorter, Γ₋ = Γ without its
    last block row): Van Overschee & De Moor 1996, sec. 4.3.
    """
    L = proj.layout
    n = gamma.shape[1]
    X0 = np.zeros((n, L.nz))
    X0[:, L.P] = np.linalg.pinv(gamma) @ proj.theta
    X1 = np.zeros((n, L.nz))
    X1[:, L.P1] = np.linalg.pinv(gamma[:-L.p]) @ proj.theta_next
    return X0, X1


def _noise(proj: _Projection, gamma, A, B, C, D):
    """Process, measurement and cross covariances of the state-equation and output-equation residuals."""
    L, S = proj.layout, proj.S
    X0, X1 = _state_maps(proj, gamma)
    Eu, Ey = L.select(L.u0), L.select(L.y0)
    Wmap = X1 - A @ X0 - B @ Eu
    Vmap = Ey - C @ X0 - D @ Eu
    Q, R, Sx = Wmap @ S @ Wmap.T, Vmap @ S @ Vmap.T, Wmap @ S @ Vmap.T
    return 0.5 * (Q + Q.T), 0.5 * (R + R.T), Sx


def _innovation_form(A, C, Q, R, Sx):
    """Steady-state Kalman gain and innovation covariance; ``K = 0`` for (numerically) noise-free data."""
    joint = np.block([[Q, Sx], [Sx.T, R]])
    if np.max(np.abs(np.linalg.eigvalsh(joint))) <= _NOISE_FREE:
        return np.zeros((A.shape[0], C.shape[0])), R, "noise-free residuals: K = 0"
    Rr = R + _NOISE_FREE * np.eye(R.shape[0])
    try:
        K, P = kalman_gain(A, C, Q, Rr, Sx)
    except (np.linalg.LinAlgError, ValueError) as exc:
        warnings.warn(
            f"the steady-state Kalman gain could not be computed ({exc}); the model keeps K = 0 (output-error "
            "form), so k-step predictions ignore the measured past beyond the initial state.",
            StimsteerWarning, stacklevel=4,
        )
        return np.zeros((A.shape[0], C.shape[0])), R, "Riccati equation failed: K = 0"
    Re = C @ P @ C.T + R
    return K, 0.5 * (Re + Re.T), "steady-state Kalman gain (DARE)"


def _fit_order(proj: _Projection, n: int, feedthrough: bool):
    """All scaled-coordinate matrices of the order-``n`` model of one projection."""
    gamma = proj.gamma(n)
    A, C = _a_c(gamma, proj.layout.p)
    B, D = _b_d(proj, gamma, A, C, feedthrough)
    Q, R, Sx = _noise(proj, gamma, A, B, C, D)
    K, Re, how = _innovation_form(A, C, Q, R, Sx)
    return {"A": A, "B": B, "C": C, "D": D, "K": K, "Re": Re, "Q": Q, "R": R, "S": Sx, "gain": how}


# ----------------------------------------------------------------------------------------------------- held-out check
def _predictor_map(mats, layout: _Layout) -> np.ndarray:
    """The k-step predictor of :meth:`StateSpaceModel.predict` as one linear map ``vec(ŷ_future) = P z``.

    Mirrors ``estimate_state`` (least-squares initial state of the innovation predictor over the past window,
    propagated) followed by ``simulate`` over the future inputs. Shape (p f, nz).
    """
    A, B, C, D, K = (mats[k] for k in "ABCDK")
    L = layout
    n, m, p = A.shape[0], L.m, L.p
    Ak, Bk = A - K @ C, B - K @ D
    Xd = np.zeros((n, L.nz))
    Mk = np.eye(n)
    Phi, rhs = [], []
    for t in range(L.i):
        Eu, Ey = L.select(L.Up[t * m:(t + 1) * m]), L.select(L.Yp[t * p:(t + 1) * p])
        Phi.append(C @ Mk)
        rhs.append(Ey - C @ Xd - D @ Eu)
        Xd = Ak @ Xd + Bk @ Eu + K @ Ey
        Mk = Ak @ Mk
    lhs = np.vstack(Phi)
    x0 = np.linalg.pinv(lhs, rcond=np.finfo(float).eps * max(lhs.shape)) @ np.vstack(rhs)
    X = Mk @ x0 + Xd
    out = []
    for r in range(L.f):
        Eu = L.select(L.Uf[r * m:(r + 1) * m])
        out.append(C @ X + D @ Eu)
        X = A @ X + B @ Eu
    return np.vstack(out)


def _heldout_error(mats, S_check: np.ndarray, layout: _Layout) -> float:
    """Mean over future steps and output channels of the k-step squared error ÷ the mean square output."""
    E = layout.select(layout.Yf) - _predictor_map(mats, layout)
    err = np.maximum(np.sum((E @ S_check) * E, axis=1), 0.0)
    power = np.diag(S_check)[layout.Yf]
    return float(np.mean(err / np.maximum(power, np.finfo(float).tiny)))


def _single_blas_thread():
    if _threadpool_limits is None:  # pragma: no cover
        return contextlib.nullcontext()
    return _threadpool_limits(limits=1, user_api="blas")


# ----------------------------------------------------------------------------------------------------- estimator
class SubspaceId:
    """Subspace identification of an innovation-form state-space model from a stimulation session.

    Parameters
    ----------
    past_steps : int, default 10
        Block rows ``i`` of the past (samples); the past window :meth:`predict` expects. Must cover the input
        delay plus the slowest dynamics of interest, and ``p i >= order``.
    future_steps : int, default 10
        Block rows ``f`` of the future (samples), at least 2; ``p (f − 1) >= order`` is needed.
    order : int or None, default None
        Number of states; None chooses it (see ``order_selection``).
    max_order : int or None, default None
        Largest order tried; default ``min(10, max possible)``, the max possible being ``min(p (f − 1), p i)``.
    weighting : {"n4sid", "moesp", "cva"}, default "n4sid"
        Row/column weighting of the oblique projection before the SVD.
    feedthrough : bool, default False
        Estimate a direct term ``D``; default fixes ``D = 0`` (stimulation does not reach the recording in the
        same sample).
    order_selection : dict or None, default None
        ``holdout_fraction`` (0.25): share of the training trials held out for the order check (with a single
        trial, the last share of each segment); ``tolerance`` (0.05): relative excess of held-out error over the
        best order that still confirms the singular-value-gap order; ``seed`` (0) of the held-out draw.
    centre_outputs : bool, default False
        Identify the model on the outputs minus their training mean (``output_offset_``), for recordings with a
        baseline offset. ``predict`` then works in the recorded units (the offset is removed from the past and
        added to the prediction), ``model_`` describes ``y − output_offset_`` and carries it as
        ``model_.info["output_offset"]``, which the controllers and network figures read.

    Attributes
    ----------
    model_ : StateSpaceModel
        Fitted model in the session's units, with ``K`` and ``innovation_cov``.
    order_ : int
    order_gap_ : int
        The order suggested by the largest gap ``σ_k / σ_{k+1}`` of the singular values.
    singular_values_ : ndarray, shape (p f,)
        Of the weighted projection on all training data (channels scaled to unit RMS; CVA: canonical correlations).
    order_table_ : pandas.DataFrame
        One row per candidate order: ``order``, ``singular_value``, ``gap_ratio``, ``heldout_error`` (mean
        k-step squared error over steps 1..f ÷ mean square output, on the held-out part, model fitted on the
        rest), ``stable``, ``selected``.
    process_cov_, measurement_cov_, cross_cov_ : ndarray
        Residual covariances ``Q`` (n, n), ``R`` (p, p), ``S`` (n, p) in the session's units.
    is_stable_ : bool
    past_steps_ : int
    max_horizon_steps_ : None
        Predictions have no horizon limit.
    n_columns_ : int
        Hankel columns used.
    heldout_ : str
        How the held-out part was chosen.
    output_offset_ : ndarray, shape (n_outputs,)
        The training mean removed with ``centre_outputs`` (zeros otherwise).

    Raises
    ------
    SessionError
        Windows longer than every valid segment, fewer Hankel columns than rows, an order above the possible one,
        bad settings.
    ExcitationError
        Inputs that do not vary or do not excite the model.

    Notes
    -----
    Data model ``x[k+1] = A x[k] + B u[k] + K e[k]``, ``y[k] = C x[k] + D u[k] + e[k]``. Channels are scaled to unit
    RMS before the projections and the model is transformed back. The model has no constant term: remove offsets
    before fitting (``centre_outputs=True``, or ``prep.detrend``). ``A, C`` come from the shift invariance of Γ;
    ``B, D`` by least squares on the data given ``A, C``; the noise covariances from the residuals of the estimated
    state sequences; ``K`` from the filter Riccati equation. An unstable estimate is kept and reported
    (``is_stable_``, a warning), never changed.

    References
    ----------
    Van Overschee P., De Moor B. (1996), Subspace Identification for Linear Systems. Kluwer.
    Verhaegen M. (1994), Identification of the deterministic part of MIMO state space models given in innovations
    form from input-output data. Automatica 30(1):61-74.
    Larimore W.E. (1990), Canonical variate analysis in identification, filtering and adaptive control. CDC.

    Examples
    --------
    >>> import numpy as np
    >>> from stimsteer.sysid import Session, StateSpaceModel
    >>> true = StateSpaceModel(A=[[0.9, 0.2], [0.0, 0.7]], B=[[0.0], [1.0]], C=[[1.0, 0.0]])
    >>> u = np.random.default_rng(0).normal(size=(600, 1))
    >>> est = SubspaceId(past_steps=4, future_steps=4).fit(Session(u=u, y=true.simulate(u), sample_rate_hz=100.0))
    >>> est.order_, bool(np.allclose(np.sort(est.model_.poles.real), [0.7, 0.9]))
    (2, True)
    """

    storage_kind = "subspace"

    def __init__(self, *, past_steps=10, future_steps=10, order=None, max_order=None, weighting="n4sid",
                 feedthrough=False, order_selection=None, centre_outputs=False):
        self.past_steps = past_steps
        self.future_steps = future_steps
        self.order = order
        self.max_order = max_order
        self.weighting = weighting
        self.feedthrough = feedthrough
        self.order_selection = order_selection
        self.centre_outputs = centre_outputs

    def get_params(self, deep: bool = True) -> dict:
        return {k: getattr(self, k) for k in ("past_steps", "future_steps", "order", "max_order", "weighting",
                                              "feedthrough", "order_selection", "centre_outputs")}

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"SubspaceId({args})"

    # ------------------------------------------------------------------------------------------ validation
    @staticmethod
    def _int(name, value, low):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
            raise SessionError(f"{name} must be an integer >= {low}; got {value!r}. Pass e.g. {name}={max(low, 10)}.")
        return int(value)

    def _settings(self, session) -> dict:
        i = self._int("past_steps", self.past_steps, 1)
        f = self._int("future_steps", self.future_steps, 2)
        if self.weighting not in _WEIGHTINGS:
            raise SessionError(f"weighting must be one of {list(_WEIGHTINGS)}; got {self.weighting!r}.")
        if not isinstance(self.feedthrough, (bool, np.bool_)):
            raise SessionError(f"feedthrough must be True or False; got {self.feedthrough!r}.")
        m, p = int(session.n_inputs), int(session.n_outputs)
        if m < 1:
            raise SessionError("subspace identification needs at least one input channel; the session has none.")
        layout = _Layout(i, f, m, p)
        cap = layout.max_order
        order = None if self.order is None else self._int("order", self.order, 1)
        if order is not None and order > cap:
            raise SessionError(
                f"order {order} is above the largest possible order {cap} = min(p (f - 1), p i) for p={p} outputs, "
                f"past_steps={i}, future_steps={f}. Lower the order or lengthen past_steps/future_steps."
            )
        top = min(_DEFAULT_ORDER_CAP, cap) if self.max_order is None else self._int("max_order", self.max_order, 1)
        if top > cap:
            raise SessionError(
                f"max_order {top} is above the largest possible order {cap} = min(p (f - 1), p i); lower it or "
                "lengthen past_steps/future_steps."
            )
        top = max(top, order or 0)
        return {"layout": layout, "order": order, "top": top, **self._selection()}

    def _selection(self) -> dict:
        sel = dict(_SELECTION_DEFAULTS)
        given = self.order_selection or {}
        if not isinstance(given, dict):
            raise SessionError(f"order_selection must be a dict or None; got {type(given).__name__}.")
        unknown = sorted(set(given) - set(sel))
        if unknown:
            raise SessionError(f"order_selection has unknown keys {unknown}; allowed: {sorted(sel)}.")
        sel.update(given)
        frac, tol = sel["holdout_fraction"], sel["tolerance"]
        if not (isinstance(frac, (int, float)) and 0 < frac < 1):
            raise SessionError(f"order_selection['holdout_fraction'] must be in (0, 1); got {frac!r}.")
        if not (isinstance(tol, (int, float)) and tol >= 0):
            raise SessionError(f"order_selection['tolerance'] must be a number >= 0; got {tol!r}.")
        return {"fraction": float(frac), "tolerance": float(tol), "seed": self._int("seed", sel["seed"], 0)}

    # ------------------------------------------------------------------------------------------ fit
    def fit(self, session) -> "SubspaceId":
        """Identify the model from ``session`` (a :class:`Session` or a lazily opened session file).

        Parameters
        ----------
        session : Session or SessionFile
            Training data; Hankel columns are built inside ``session.segments()`` only.

        Returns
        -------
        self
        """
        cfg = self._settings(session)
        if not isinstance(self.centre_outputs, (bool, np.bool_)):
            raise SessionError(f"centre_outputs must be True or False; got {self.centre_outputs!r}.")
        offset = _output_mean(session) if self.centre_outputs else np.zeros(int(session.n_outputs))
        if self.centre_outputs:
            session = _ShiftedOutputs(session, offset)
        L = cfg["layout"]
        # Small dense problems run far faster on one BLAS thread (threads only wait on each other at this size);
        # the data pass keeps all threads when its Gram is wide enough to gain from them.
        with _single_blas_thread() if L.nz < _THREADED_WIDTH else contextlib.nullcontext():
            grams, scale, how = self._data(session, cfg)
        with _single_blas_thread():
            self._identify(session, cfg, grams, scale, how)
        self.output_offset_ = offset
        if self.centre_outputs:
            self.model_ = self.model_.replace(info={**self.model_.info, "output_offset": offset.tolist()})
        return self

    def _identify(self, session, cfg, grams, scale, how) -> None:
        L = cfg["layout"]
        S_all, S_fit, S_check = (self._scaled(G, N, scale) for G, N in grams)
        for S in (S_all, S_fit):
            self._check_excitation(S, L)
        proj_all = _Projection(S_all, L, self.weighting)
        proj_fit = _Projection(S_fit, L, self.weighting)
        sv = proj_all.singular_values
        cfg["top"] = self._supported(sv, proj_fit.singular_values, cfg)
        table = self._order_table(proj_fit, S_check, sv, cfg)
        gap = int(table["order"].iloc[int(np.argmax(table["gap_ratio"].to_numpy()))])
        order = cfg["order"] if cfg["order"] is not None else self._choose(table, gap, cfg["tolerance"])
        table["selected"] = table["order"] == order
        mats = _fit_order(proj_all, order, bool(self.feedthrough))
        self.order_gap_ = gap
        self._store(mats, scale, session, L, order, sv, table, how, grams[0][1])

    def _data(self, session, cfg):
        L = cfg["layout"]
        segs = session.segments(min_length=L.width)
        if not segs:
            longest = max((b - a for a, b in session.segments()), default=0)
            raise SessionError(
                f"past_steps + future_steps = {L.width} samples is longer than every valid segment (the longest "
                f"run of valid in-trial samples has {longest}). Use shorter past/future windows or longer trials."
            )
        fit, check, how = _partition(session, L.width, cfg["fraction"], cfg["seed"])
        G_fit, n_fit = _hankel_gram(session, fit, L)
        G_check, n_check = _hankel_gram(session, check, L)
        for label, n_cols in (("the fitting part", n_fit), ("all training data", n_fit + n_check)):
            if n_cols < L.nz:
                raise SessionError(
                    f"{label} gives {n_cols} Hankel columns for {L.nz} rows ((m + p)(past_steps + future_steps)); "
                    "at least as many columns as rows are needed (many more for noisy data). Record longer trials "
                    "or use shorter past/future windows."
                )
        if n_check == 0:
            raise SessionError(
                f"no held-out part with {L.width} samples could be set aside for the order check ({how}). "
                "Record more or longer trials, or use shorter past/future windows."
            )
        G_all = G_fit + G_check
        scale = self._scales(G_all, n_fit + n_check, L, session)
        return [(G_all, n_fit + n_check), (G_fit, n_fit), (G_check, n_check)], scale, how

    @staticmethod
    def _scales(G, N, L: _Layout, session) -> np.ndarray:
        power = np.diag(G).reshape(L.width, L.c).mean(axis=0) / N
        rms = np.sqrt(power)
        names = list(getattr(session, "input_names", [])) + list(getattr(session, "output_names", []))
        for ch in np.flatnonzero(rms <= 0):
            label = names[ch] if ch < len(names) else f"channel {ch}"
            kind = "input" if ch < L.m else "output"
            err = ExcitationError if kind == "input" else SessionError
            raise err(f"{kind} {label!r} is zero on every valid sample; it carries no information. Drop it.")
        return rms

    @staticmethod
    def _scaled(G, N, scale) -> np.ndarray:
        s = np.tile(scale, G.shape[0] // scale.size)
        return G / N / np.outer(s, s)

    @staticmethod
    def _supported(sv_all, sv_fit, cfg) -> int:
        """Largest candidate order whose singular values (all data and fitting part) rise above rounding noise."""
        # relative to the largest value, and to 1 (unit-RMS channels): a static map leaves only rounding noise
        rank = min(int(np.sum(v > _SV_RTOL * max(float(v[0]), 1.0))) for v in (sv_all, sv_fit))
        if rank < 1:
            raise ExcitationError(
                "the data show no dynamics: the future outputs carry no information from the past beyond what the "
                "future inputs explain (every singular value is at rounding level). A static input-output map "
                "needs no state-space model; check that the outputs respond to the stimulation with some memory."
            )
        if cfg["order"] is not None and cfg["order"] > rank:
            raise SessionError(
                f"order {cfg['order']} is above the {rank} state(s) the data support: the singular values beyond "
                f"{rank} are below {_SV_RTOL:g} of the largest (noise-free data of a smaller system, or inputs that "
                f"excite too few modes). Use order <= {rank} or order=None."
            )
        return min(cfg["top"], rank)

    def _order_table(self, proj_fit, S_check, sv, cfg) -> pd.DataFrame:
        L = cfg["layout"]
        rows = []
        floor = np.finfo(float).eps * max(float(sv[0]), np.finfo(float).tiny)
        for n in range(1, cfg["top"] + 1):
            mats = _fit_order(proj_fit, n, bool(self.feedthrough))
            rows.append({
                "order": n,
                "singular_value": float(sv[n - 1]),
                "gap_ratio": float(sv[n - 1] / max(sv[n], floor)),
                "heldout_error": _heldout_error(mats, S_check, L),
                "stable": bool(np.max(np.abs(np.linalg.eigvals(mats["A"]))) < 1.0),
            })
        return pd.DataFrame(rows)

    @staticmethod
    def _check_excitation(S, L: _Layout) -> None:
        lam = np.linalg.eigvalsh(S[np.ix_(L.Uf, L.Uf)])
        if lam[0] <= _RTOL * lam[-1]:
            raise ExcitationError(
                f"the inputs are not persistently exciting over future_steps={L.f} samples (the future-input "
                f"covariance has condition {_cond_text(lam)}); an input that is "
                "constant or too smooth cannot separate the dynamics. Use a richer stimulation schedule "
                "(`stimsteer schedule`)."
            )

    @staticmethod
    def _choose(table: pd.DataFrame, gap: int, tolerance: float) -> int:
        """The gap order if its held-out error is within ``tolerance`` of the best, else the smallest order that is."""
        err = table["heldout_error"].to_numpy()
        ok = err <= err.min() * (1.0 + tolerance) + 1e-12
        if ok[gap - 1]:
            return gap
        return int(table["order"].iloc[int(np.argmax(ok))])

    def _store(self, mats, scale, session, L, order, sv, table, how, n_columns) -> None:
        su, sy = scale[:L.m], scale[L.m:]
        model = StateSpaceModel(
            A=mats["A"], B=mats["B"] / su, C=sy[:, None] * mats["C"], D=sy[:, None] * mats["D"] / su,
            K=mats["K"] / sy, innovation_cov=np.outer(sy, sy) * mats["Re"],
            sample_rate_hz=float(session.sample_rate_hz), past_steps=L.i,
            input_names=tuple(session.input_names), output_names=tuple(session.output_names),
            info={"method": "subspace", "weighting": self.weighting, "order": int(order), "gain": mats["gain"]},
        )
        self.model_ = model
        self.order_ = int(order)
        self.singular_values_ = sv.copy()
        self.order_table_ = table
        self.process_cov_ = mats["Q"].copy()
        self.measurement_cov_ = np.outer(sy, sy) * mats["R"]
        self.cross_cov_ = mats["S"] * sy
        self.is_stable_ = bool(model.is_stable)
        self.past_steps_ = L.i
        self.max_horizon_steps_ = None
        self.n_columns_ = int(n_columns)
        self.heldout_ = how
        if not self.is_stable_:
            warnings.warn(
                f"the identified order-{order} model is unstable: spectral radius {model.spectral_radius:.4f} >= 1; "
                "free-run simulations will grow without bound. Try another order or longer past/future windows, "
                "and check whether the data were recorded in closed loop.",
                StimsteerWarning, stacklevel=4,
            )

    # ------------------------------------------------------------------------------------------ predict
    def predict(self, u_past, y_past, u_future) -> np.ndarray:
        """Predict outputs over ``u_future`` from a measured past window (delegates to ``model_.predict``).

        Parameters
        ----------
        u_past : ndarray, shape (past_steps, n_inputs)
        y_past : ndarray, shape (past_steps, n_outputs)
        u_future : ndarray, shape (n_future, n_inputs)

        Returns
        -------
        y_future : ndarray, shape (n_future, n_outputs)
        """
        check_fitted(self, "model_")
        off = self._offset()
        if off is None:
            return self.model_.predict(u_past, y_past, u_future)
        return self.model_.predict(u_past, np.asarray(y_past, dtype=np.float64) - off, u_future) + off

    def state_space_model(self):
        """The fitted state-space realisation with this estimator's past window (``model_``, offset in ``info``)."""
        check_fitted(self, "model_")
        return self.model_.replace(past_steps=int(self.past_steps_))

    def predict_many(self, u_past, y_past, u_future) -> np.ndarray:
        """:meth:`predict` for a batch of windows, shapes (n_windows, n_samples, channels)."""
        check_fitted(self, "model_")
        off = self._offset()
        if off is None:
            return self.model_.predict_many(u_past, y_past, u_future)
        return self.model_.predict_many(u_past, np.asarray(y_past, dtype=np.float64) - off, u_future) + off

    def _offset(self):
        off = getattr(self, "output_offset_", None)
        return None if off is None or not np.any(off) else off

    def rest_window(self) -> tuple[np.ndarray, np.ndarray]:
        """A past window at rest: zero input and the output offset, shapes (past_steps_, m) and (past_steps_, p)."""
        check_fitted(self, "model_")
        L, md = self.past_steps_, self.model_
        off = np.zeros(md.n_outputs) if self._offset() is None else self.output_offset_
        return np.zeros((L, md.n_inputs)), np.tile(off, (L, 1))

    # ------------------------------------------------------------------------------------------ storage
    def to_state(self) -> dict:
        """The fitted estimator as a dict of arrays, numbers, strings and nested dicts (for ``storage``)."""
        check_fitted(self, "model_")
        md = self.model_
        params = {k: v for k, v in self.get_params().items() if v is not None}
        params["feedthrough"] = int(bool(params["feedthrough"]))
        params["centre_outputs"] = int(bool(params["centre_outputs"]))
        return {
            "params": params, "output_offset": np.asarray(self.output_offset_, dtype=np.float64),
            "model": {"A": md.A, "B": md.B, "C": md.C, "D": md.D, "K": md.K, "innovation_cov": md.innovation_cov,
                      "sample_rate_hz": md.sample_rate_hz, "past_steps": md.past_steps,
                      "input_names": json.dumps(list(md.input_names)),
                      "output_names": json.dumps(list(md.output_names)), "info": json.dumps(md.info)},
            "order": self.order_, "order_gap": self.order_gap_, "singular_values": self.singular_values_,
            "order_table": {c: self.order_table_[c].to_numpy() for c in self.order_table_.columns},
            "process_cov": self.process_cov_, "measurement_cov": self.measurement_cov_,
            "cross_cov": self.cross_cov_, "is_stable": int(self.is_stable_), "n_columns": self.n_columns_,
            "heldout": self.heldout_,
        }

    @classmethod
    def from_state(cls, state: dict) -> "SubspaceId":
        """Rebuild a fitted estimator from :meth:`to_state`."""
        params = dict(state["params"])
        params["feedthrough"] = bool(params.get("feedthrough", False))
        params["centre_outputs"] = bool(params.get("centre_outputs", False))
        est = cls(**params)
        md = state["model"]
        est.model_ = StateSpaceModel(
            A=md["A"], B=md["B"], C=md["C"], D=md["D"], K=md["K"], innovation_cov=md["innovation_cov"],
            sample_rate_hz=float(md["sample_rate_hz"]), past_steps=int(md["past_steps"]),
            input_names=tuple(json.loads(md["input_names"])), output_names=tuple(json.loads(md["output_names"])),
            info=json.loads(md["info"]),
        )
        est.output_offset_ = np.asarray(state.get("output_offset", np.zeros(est.model_.n_outputs)), dtype=np.float64)
        est.order_ = int(state["order"])
        est.order_gap_ = int(state["order_gap"])
        est.singular_values_ = np.asarray(state["singular_values"], dtype=np.float64)
        cols = state["order_table"]  # a file layout may return the columns in another order
        table = pd.DataFrame({k: np.asarray(cols[k]) for k in _TABLE_COLUMNS})
        table["order"] = table["order"].astype(np.int64)
        for col in ("stable", "selected"):
            table[col] = table[col].astype(bool)
        est.order_table_ = table
        est.process_cov_ = np.asarray(state["process_cov"], dtype=np.float64)
        est.measurement_cov_ = np.asarray(state["measurement_cov"], dtype=np.float64)
        est.cross_cov_ = np.asarray(state["cross_cov"], dtype=np.float64)
        est.is_stable_ = bool(state["is_stable"])
        est.past_steps_ = est.model_.past_steps
        est.max_horizon_steps_ = None
        est.n_columns_ = int(state["n_columns"])
        est.heldout_ = str(state["heldout"])
        return est
