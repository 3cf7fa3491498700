"""The shift-register (observer-form) state-space realisation of an ARX model (:func:`arx_to_state_space`).
"""

from __future__ import annotations

import numpy as np

from ._windows import small_gemms
from .statespace import StateSpaceModel

__all__ = ["arx_to_state_space"]


# ------------------------------------------------------------------------------------------------ state space
def arx_to_state_space(
    ar_coefs, input_coefs, delay_samples: int, *, sample_rate_hz: float = 1.0, innovation_cov=None,
    input_names=None, output_names=None, info=None,
) -> StateSpaceModel:
    """The shift-register (observer-form) state-space realisation of an ARX model.

    Parameters
    ----------
    ar_coefs : ndarray, shape (na, p, p)
        ``A_1 ... A_na``; ``na`` may be 0.
    input_coefs : ndarray, shape (nb, p, m)
        ``B_0 ... B_{nb-1}`` acting on ``u_{k-d-j}``.
    delay_samples : int
        ``d``, the input delay in samples (0 gives direct feed-through ``D = B_0``).
    sample_rate_hz : float, default 1.0
    innovation_cov : ndarray, shape (p, p), optional
        Covariance of the one-step residual ``e_k``.
    input_names, output_names : tuple of str, optional
    info : dict, optional

    Returns
    -------
    StateSpaceModel
        States ``x_k = [y_{k-1}; ...; y_{k-na}; u_{k-1}; ...; u_{k-nu}]`` with ``nu = d + nb - 1`` (or ``nb - 1``
        input states when ``d = 0``), ``n_states = p·na + m·nu``, Kalman gain ``K = [I; 0]`` and ``past_steps =
        max(na, nu, 1)``.

    Notes
    -----
    ``y_k = C x_k + D u_k + e_k`` with ``C = [A_1 … A_na, B̃_1 … B̃_nu]``, ``B̃_l = B_{l-d}`` (zero outside the
    input lags) and ``D = B_0`` if ``d = 0``. The predictor matrix ``A − K C`` is a pure shift, nilpotent of index
    ``max(na, nu)``: the state after a past window of that length is exactly the stacked measured samples, so
    ``predict`` from such a window reproduces the ARX recursion that feeds back its own predictions.

    References
    ----------
    Ljung L. (1999), System Identification: Theory for the User, 2nd ed., section 4.3 (state-space forms of ARX).
    """
    Aa = np.asarray(ar_coefs, dtype=np.float64)
    Bb = np.asarray(input_coefs, dtype=np.float64)
    na, p = Aa.shape[0], Bb.shape[1]
    nb, m = Bb.shape[0], Bb.shape[2]
    d = int(delay_samples)
    nu = d + nb - 1
    C = np.zeros((p, p * na + m * nu))
    for i in range(na):
        C[:, i * p:(i + 1) * p] = Aa[i]
    for j in range(nb):
        lag = d + j
        if lag >= 1:
            C[:, p * na + (lag - 1) * m: p * na + lag * m] = Bb[j]
    D = Bb[0] if d == 0 else np.zeros((p, m))
    n = C.shape[1]
    A = np.zeros((n, n))
    B = np.zeros((n, m))
    K = np.zeros((n, p))
    if na:
        A[:p] = C
        B[:p] = D
        K[:p] = np.eye(p)
        A[p: p * na, : p * (na - 1)] = np.eye(p * (na - 1))
    if nu:
        off = p * na
        B[off: off + m] = np.eye(m)
        A[off + m: off + m * nu, off: off + m * (nu - 1)] = np.eye(m * (nu - 1))
    return StateSpaceModel(
        A=A, B=B, C=C, D=D, K=K, innovation_cov=innovation_cov, sample_rate_hz=sample_rate_hz,
        past_steps=max(na, nu, 1), input_names=input_names, output_names=output_names, info=info or {},
    )


def arx_recursion(ar_coefs, input_coefs, delay_samples: int, past_steps: int, up, yp, uf, intercept) -> np.ndarray:
    """Predictions of the ARX recursion over the inputs ``uf`` ``(n, H, m)`` from past windows ``up``, ``yp`` of
    exactly ``past_steps`` samples, fed its own predictions; ``ar_coefs`` ``(na, p, p)``, ``input_coefs``
    ``(nb, p, m)`` as :func:`arx_to_state_space` takes them.

    The input part of every step in one product of the ``(n·H × nb·m)`` lagged inputs (oldest first); then per
    step one product of the last ``na`` outputs (one ``(n × na·p)`` row block of the time-major outputs, oldest
    first) with the stacked ``[A_na … A_1]ᵀ``: one BLAS call per step for the whole batch (the sums of one
    product per lag, to rounding).
    """
    na, nb, d, L = ar_coefs.shape[0], input_coefs.shape[0], int(delay_samples), int(past_steps)
    n, H, p, m = yp.shape[0], uf.shape[1], input_coefs.shape[1], uf.shape[2]
    if H == 0:
        return np.zeros((n, 0, p))
    U, Y = np.concatenate([up, uf], axis=1), np.concatenate([yp, np.zeros((n, H, p))], axis=1)
    lagged = np.lib.stride_tricks.sliding_window_view(U[:, L - d - nb + 1: L - d + H], nb, axis=1)
    lagged = np.ascontiguousarray(lagged.transpose(0, 1, 3, 2)).reshape(n * H, nb * m)
    drive = small_gemms(lagged, np.ascontiguousarray(input_coefs[::-1].transpose(0, 2, 1).reshape(nb * m, p)))
    drive = drive.reshape(n, H, p)
    drive += intercept
    if na == 0:
        return drive
    stacked = np.ascontiguousarray(ar_coefs[::-1].transpose(0, 2, 1).reshape(na * p, p))
    acc = np.empty((n, p))
    for k in range(L, L + H):
        small_gemms(Y[:, k - na: k].reshape(n, na * p), stacked, acc)
        acc += drive[:, k - L]
        Y[:, k] = acc
    return Y[:, L:]



def arx_maps(ar_coefs, input_coefs, delay_samples: int, past_steps: int, horizon_steps: int, intercept):
    """The affine map of :func:`arx_recursion` over a window of ``past_steps`` samples (``T``, at least the
    recursion's lags) and ``horizon_steps`` future inputs (``N``): ``(P, F, c)`` with the predictions
    ``P [u_0 … u_{T-1}, y_0 … y_{T-1}] + F [u_T … u_{T+N-1}] + c`` (time-major, oldest first).

    Built row block by row block, as the recursion runs: the map of ``y_{T+k}`` is ``Σ_i A_i`` times the map of
    ``y_{T+k-i}`` (one product with the blocks already built; a past output's map is its own column block) plus
    ``B_j`` at the column block of ``u_{T+k-d-j}``. ``O(N · na · p² · T(m + p))`` work in the maps' own arrays,
    where the responses to unit windows (``T(m + p) + N m`` recursions over the horizon) held their lagged
    inputs, ``T(m + p) · N × nb · m`` values: 276 MB at past 100 / horizon 50 of 3 inputs and 20 outputs.
    """
    na, nb, d, T, N = ar_coefs.shape[0], input_coefs.shape[0], int(delay_samples), int(past_steps), \
        int(horizon_steps)
    p, m = input_coefs.shape[1], input_coefs.shape[2]
    n_past = T * (m + p)
    if na > T or d + nb - 1 > T:
        raise ValueError(f"arx_maps needs a past window of at least the lags ({na} output, {d + nb - 1} input); "
                         f"got {T}")
    P, F = np.zeros((N * p, n_past)), np.zeros((N * p, N * m))  # row block k: the map of y_{T+k}
    c = np.zeros((N, p))
    A = np.ascontiguousarray(ar_coefs[::-1].transpose(1, 0, 2).reshape(p, na * p))  # [A_na … A_1]
    B = np.ascontiguousarray(input_coefs[::-1].transpose(1, 0, 2).reshape(p, nb * m))  # [B_{nb-1} … B_0]
    for k in range(N):
        rows = slice(k * p, (k + 1) * p)
        built = min(na, k)  # earlier predictions among the recursion's outputs: y_{T+k-built} … y_{T+k-1}
        if built:
            Ak, before = A[:, (na - built) * p:], slice((k - built) * p, k * p)
            np.matmul(Ak, P[before], out=P[rows])
            np.matmul(Ak, F[before, :k * m], out=F[rows, :k * m])  # no future input after u_{T+k-1} reaches them
            c[k] = Ak @ c[k - built:k].reshape(-1)
        if na > k:  # recorded outputs y_{T+k-na} … y_{T-1}: A_na … A_{k+1} at their columns
            P[rows, T * m + (T + k - na) * p:] += A[:, :(na - k) * p]
        if nb:  # inputs u_{T+k-d-nb+1} … u_{T+k-d}: B_{nb-1} … B_0, recorded ones then future ones
            s0, s1 = T + k - d - nb + 1, T + k - d + 1
            cut = min(max(T - s0, 0), nb)
            if cut:
                P[rows, s0 * m:(s0 + cut) * m] += B[:, :cut * m]
            if cut < nb:
                F[rows, (s0 + cut - T) * m:(s1 - T) * m] += B[:, cut * m:]
        c[k] += intercept
    return P, F, c.reshape(-1)
