"""The held-out check of a candidate order: the multi-step predictor map of a fitted model, scored on the
held-out Gram.
"""

from __future__ import annotations

import numpy as np
from .gram import _Layout


# ----------------------------------------------------------------------------------------------------- held-out check
class _CheckCov:
    """The blocks of the held-out Hankel covariance the error needs: ``S_PP``, ``S_{P Yf}``, ``S_{P Uf}``,
    ``S_{Uf Uf}``, ``S_{Yf Uf}`` and the diagonal of ``S_{Yf Yf}`` (rows and columns in the layout's orders).

    From the rows of a Gram in the factor order (:meth:`factor_rows`) the large blocks are views; from a
    time-major Gram they are copied once (not once per candidate order).
    """

    def __init__(self, pp, p_yf, p_uf, uu, yu, diag_yf):
        self.pp, self.p_yf, self.p_uf, self.uu, self.yu, self.diag_yf = pp, p_yf, p_uf, uu, yu, diag_yf

    @classmethod
    def time_major(cls, S: np.ndarray, L: _Layout) -> "_CheckCov":
        return cls(S[np.ix_(L.P, L.P)], S[np.ix_(L.P, L.Yf)], S[np.ix_(L.P, L.Uf)], S[np.ix_(L.Uf, L.Uf)],
                   S[np.ix_(L.Yf, L.Uf)], np.diagonal(S)[L.Yf].copy())

    @classmethod
    def factor_rows(cls, past: np.ndarray, inputs: np.ndarray, diag_yf: np.ndarray, L: _Layout) -> "_CheckCov":
        """From the rows of the past (``P``) and of the future inputs (``[Uf₁; u₀]``) of a Gram in the factor order
        (:meth:`~.gram._Layout.factor_order`) and the diagonal of ``S_{Yf Yf}``; the large blocks are views."""
        m, f = L.m, L.f
        b, e = m * f, m * f + len(L.P)
        uf = np.concatenate([np.arange(b - m, b), np.arange(b - m)])  # [Uf₁; u₀] -> [u₀; Uf₁]
        return cls(past[:, b:e], past[:, e:], past[:, uf], inputs[np.ix_(uf, uf)], inputs[uf, e:].T.copy(),
                   diag_yf)


def _past_state_map(mats, layout: _Layout) -> np.ndarray:
    """The map ``x̂ = X wp`` from the past part of a Hankel column (rows ``P``) to the state at its first future
    sample, shape (n, len(P)).

    Mirrors ``estimate_state``: the least-squares initial state ``x₀ = Π r`` of the innovation predictor over the
    past window (``Π = [C; C A_K; …; C A_K^{i−1}]⁺``, ``A_K = A − K C``), propagated by ``A_K^i``, plus the
    predictor's response ``A_K^{i−1−s} [B_K K]`` to past sample ``s``. The residual ``r_t`` reads sample ``t`` and
    the predictor's response to samples ``s < t``, so ``x₀``'s column block ``s`` is ``Π_s [−D I] − Y_s [B_K K]``
    with ``Y_s = Σ_{t>s} Π_t C A_K^{t−1−s}`` (a backward recursion): ``O(i n² (n + m + p))`` work instead of the
    ``O(i n² (m + p) i)`` of propagating the whole map step by step.
    """
    A, B, C, D, K = (mats[k] for k in "ABCDK")
    L = layout
    n, m, p, i = A.shape[0], L.m, L.p, L.i
    Ak, Bk = A - K @ C, B - K @ D
    lhs = np.empty((p * i, n))
    Mk = np.eye(n)
    for t in range(i):
        lhs[t * p:(t + 1) * p] = C @ Mk
        Mk = Ak @ Mk
    Pi = np.linalg.pinv(lhs, rcond=np.finfo(float).eps * max(lhs.shape))
    MPi = Mk @ Pi
    X = np.empty((n, len(L.P)))
    Pw, Y = np.eye(n), np.zeros((n, n))  # A_K^{i−1−s} and Y_s, from s = i − 1 down
    for s in range(i - 1, -1, -1):
        Z = Pw - Mk @ Y
        MP_s = MPi[:, s * p:(s + 1) * p]
        X[:, s * m:(s + 1) * m] = Z @ Bk - MP_s @ D
        X[:, i * m + s * p:i * m + (s + 1) * p] = Z @ K + MP_s
        Y = Pi[:, s * p:(s + 1) * p] @ C + Y @ Ak
        Pw = Pw @ Ak
    return X


def _initial_state_map(mats, layout: _Layout) -> np.ndarray:
    """The map ``x̂ = X z`` from a Hankel column to the state at its first future sample, shape (n, nz): zero on the
    future rows (:func:`_past_state_map`)."""
    X = np.zeros((mats["A"].shape[0], layout.nz))
    X[:, layout.P] = _past_state_map(mats, layout)
    return X


def _future_maps(mats, f: int):
    """``Obs = [C; CA; …; CA^{f−1}]`` (p f × n) and the block-Toeplitz ``T`` of ``D, CB, CAB, …`` (p f × m f)."""
    A, B, C, D = (mats[k] for k in "ABCD")
    p, m = C.shape[0], B.shape[1]
    Obs = np.zeros((p * f, A.shape[0]))
    h = [D]
    O = C
    for r in range(f):
        Obs[r * p:(r + 1) * p] = O
        if r < f - 1:
            h.append(O @ B)
        O = O @ A
    T = np.zeros((p * f, m * f))
    for r in range(f):
        for s in range(r + 1):
            T[r * p:(r + 1) * p, s * m:(s + 1) * m] = h[r - s]
    return Obs, T


def _predictor_map(mats, layout: _Layout) -> np.ndarray:
    """The k-step predictor of :meth:`StateSpaceModel.predict` as one linear map ``vec(ŷ_future) = P z``.

    ``estimate_state`` then ``simulate`` over the future inputs: ``P = Obs X + T E_Uf``. Shape (p f, nz).
    """
    Obs, T = _future_maps(mats, layout.f)
    P = Obs @ _initial_state_map(mats, layout)
    P[:, layout.Uf] += T
    return P


def _heldout_error(mats, check, layout: _Layout) -> float:
    """Mean over future steps and output channels of the k-step squared error ÷ the mean square output.

    ``check`` is a :class:`_CheckCov` (or a time-major held-out covariance). The error map
    ``E = E_Yf − Obs X − T E_Uf`` is applied to the held-out covariance through its parts (``X S Xᵀ`` is n × n),
    not as a ``(p f × nz)`` matrix times ``S`` (``p f nz²`` work).
    """
    L = layout
    if isinstance(check, np.ndarray):
        check = _CheckCov.time_major(check, L)
    Obs, T = _future_maps(mats, L.f)
    X = _past_state_map(mats, L)  # the state estimate reads the past only
    XS_p = X @ check.pp
    XS_y = X @ check.p_yf  # (n, p f)
    XS_u = X @ check.p_uf  # (n, m f)
    # diag(E S Eᵀ) with E = E_Yf − T E_Uf − Obs X, term by term
    err = (check.diag_yf + np.sum((T @ check.uu) * T, axis=1)
           + np.sum((Obs @ (XS_p @ X.T)) * Obs, axis=1)
           - 2.0 * np.sum(T * check.yu, axis=1) - 2.0 * np.sum(Obs * XS_y.T, axis=1)
           + 2.0 * np.sum((Obs @ XS_u) * T, axis=1))
    err = np.maximum(err, 0.0)
    return float(np.mean(err / np.maximum(check.diag_yf, np.finfo(float).tiny)))
