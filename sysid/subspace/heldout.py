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
    Zs = np.empty((i, n, n))  # Z_s = A_K^{i−1−s} − M Y_s: the predictor's own response, less the initial state's
    Pw, Y = np.eye(n), np.zeros((n, n))  # A_K^{i−1−s} and Y_s, from s = i − 1 down
    for s in range(i - 1, -1, -1):
        Zs[s] = Pw - Mk @ Y
        Y = Pi[:, s * p:(s + 1) * p] @ C + Y @ Ak
        Pw = Pw @ Ak
    # column blocks s: Z_s B_K − (M Π)_s D on the inputs, Z_s K + (M Π)_s on the outputs; every s in one product
    ZBK = (Zs.reshape(i * n, n) @ np.hstack([Bk, K])).reshape(i, n, m + p).transpose(1, 0, 2)
    X = np.empty((n, len(L.P)))
    X[:, :i * m] = ZBK[:, :, :m].reshape(n, i * m) - (MPi.reshape(n, i, p) @ D).reshape(n, i * m)
    X[:, i * m:] = ZBK[:, :, m:].reshape(n, i * p) + MPi
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
    blocks = np.concatenate([np.stack(h), np.zeros((1, p, m))])  # h[0 … f−1], then the zero block above the diagonal
    lag = np.subtract.outer(np.arange(f), np.arange(f))
    T = blocks[np.where(lag >= 0, lag, f)].transpose(0, 2, 1, 3).reshape(p * f, m * f)  # block (r, s) = h[r − s]
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
    not as a ``(p f × nz)`` matrix times ``S`` (``p f nz²`` work). One candidate of :func:`heldout_errors`.
    """
    if isinstance(check, np.ndarray):
        check = _CheckCov.time_major(check, layout)
    return heldout_errors([heldout_parts(mats, check, layout)], check)[0]


def heldout_parts(mats, check: _CheckCov, layout: _Layout):
    """The terms of one candidate's error that do not read the two large blocks ``S_PP`` and ``S_{P Yf}``:
    ``(Obs, X, T terms, cross term)`` for :func:`heldout_errors`."""
    Obs, T = _future_maps(mats, layout.f)
    X = _past_state_map(mats, layout)  # the state estimate reads the past only
    return (Obs, X, np.sum((T @ check.uu) * T, axis=1), np.sum(T * check.yu, axis=1),
            np.sum((Obs @ (X @ check.p_uf)) * T, axis=1))


#: Most state rows (summed over candidates) whose products with ``S_PP`` and ``S_{P Yf}`` are taken in one matrix
#: product. A product of a few rows streams the whole block from memory for little work (one BLAS thread at 2,300
#: past rows: 5 GF/s for 3 rows, 23 for 20, 46 for 200); the batches do not depend on the threads, so neither do the
#: numbers.
BATCH_ROWS = 256


def batches(parts: list) -> list:
    """Consecutive runs of :func:`heldout_parts` with at most ``BATCH_ROWS`` state rows in all (or one candidate)."""
    out, rows = [], 0
    for part in parts:
        n = part[1].shape[0]
        if not out or rows + n > BATCH_ROWS:
            out.append([])
            rows = 0
        out[-1].append(part)
        rows += n
    return out


def heldout_errors(parts: list, check: _CheckCov) -> list:
    """:func:`_heldout_error` of each candidate in ``parts`` (from :func:`heldout_parts`, one batch of
    :func:`batches`): ``X S_PP`` and ``X S_{P Yf}`` of every candidate from one product each, then each error as
    ``diag(E S Eᵀ)`` with ``E = E_Yf − T E_Uf − Obs X``, term by term (the same sums as one candidate alone)."""
    X = np.concatenate([part[1] for part in parts]) if len(parts) > 1 else parts[0][1]
    XS_p, XS_y = X @ check.pp, X @ check.p_yf  # (rows, len(P)), (rows, p f)
    errors, a = [], 0
    for Obs, Xc, t_uu, t_yu, cross in parts:
        b = a + Xc.shape[0]
        err = (check.diag_yf + t_uu + np.sum((Obs @ (XS_p[a:b] @ Xc.T)) * Obs, axis=1)
               - 2.0 * t_yu - 2.0 * np.sum(Obs * XS_y[a:b].T, axis=1) + 2.0 * cross)
        err = np.maximum(err, 0.0)
        errors.append(float(np.mean(err / np.maximum(check.diag_yf, np.finfo(float).tiny))))
        a = b
    return errors
