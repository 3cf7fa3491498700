"""The held-out check of a candidate order: the multi-step predictor map of a fitted model, scored on the
held-out Gram.
"""

from __future__ import annotations

import numpy as np
from .gram import _Layout


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
