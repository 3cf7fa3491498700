"""The held-out check of a candidate order: the multi-step predictor map of a fitted model, scored on the
held-out Gram.
"""

from __future__ import annotations

import numpy as np
from .gram import _Layout


# ----------------------------------------------------------------------------------------------------- held-out check
def _initial_state_map(mats, layout: _Layout) -> np.ndarray:
    """The map ``x̂ = X z`` from a Hankel column to the state at its first future sample, shape (n, nz).

    Mirrors ``estimate_state`` (least-squares initial state of the innovation predictor over the past window,
    propagated).
    """
    A, B, C, D, K = (mats[k] for k in "ABCDK")
    L = layout
    n, m, p = A.shape[0], L.m, L.p
    Ak, Bk = A - K @ C, B - K @ D
    Xd = np.zeros((n, L.nz))
    Mk = np.eye(n)
    Phi, rhs = [], []
    for t in range(L.i):
        up, yp = L.Up[t * m:(t + 1) * m], L.Yp[t * p:(t + 1) * p]
        Phi.append(C @ Mk)
        r = -(C @ Xd)
        r[np.arange(p), yp] += 1.0
        r[:, up] -= D
        rhs.append(r)
        Xd = Ak @ Xd
        Xd[:, up] += Bk
        Xd[:, yp] += K
        Mk = Ak @ Mk
    lhs = np.vstack(Phi)
    x0 = np.linalg.pinv(lhs, rcond=np.finfo(float).eps * max(lhs.shape)) @ np.vstack(rhs)
    return Mk @ x0 + Xd


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


def _heldout_error(mats, S_check: np.ndarray, layout: _Layout) -> float:
    """Mean over future steps and output channels of the k-step squared error ÷ the mean square output.

    The error map ``E = E_Yf − Obs X − T E_Uf`` is applied to the held-out covariance through its parts
    (``X S Xᵀ`` is n × n), not as a ``(p f × nz)`` matrix times ``S`` (``p f nz²`` work).
    """
    L = layout
    Obs, T = _future_maps(mats, L.f)
    X = _initial_state_map(mats, L)[:, L.P]  # the state estimate reads the past only
    S_yu = S_check[np.ix_(L.Yf, L.Uf)]
    XS_p = X @ S_check[np.ix_(L.P, L.P)]
    XS_f = X @ S_check[np.ix_(L.P, np.concatenate([L.Yf, L.Uf]))]  # (n, p f + m f)
    ObsXS = Obs @ XS_f
    ny = len(L.Yf)
    # diag(E S Eᵀ) with E = E_Yf − T E_Uf − Obs X, term by term
    err = (np.diagonal(S_check)[L.Yf] + np.sum((T @ S_check[np.ix_(L.Uf, L.Uf)]) * T, axis=1)
           + np.sum((Obs @ (XS_p @ X.T)) * Obs, axis=1)
           - 2.0 * np.sum(T * S_yu, axis=1) - 2.0 * np.diagonal(ObsXS[:, :ny])
           + 2.0 * np.sum(ObsXS[:, ny:] * T, axis=1))
    err = np.maximum(err, 0.0)
    power = np.diag(S_check)[L.Yf]
    return float(np.mean(err / np.maximum(power, np.finfo(float).tiny)))
