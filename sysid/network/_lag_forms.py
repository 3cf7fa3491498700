"""A ridge ARX's shift-register realisation on fewer states: the companion form of the same recursion.

:func:`~stimsteer.sysid.arx_statespace.arx_to_state_space` realises

    y_k = Σ_{i=1..na} A_i y_{k−i} + Σ_{l=1..nu} B̃_l u_{k−l} + D u_k

on the stacked past outputs and inputs (``p·na + m·nu`` states). The same recursion has a realisation on
``N = max(na, nu)`` blocks of ``p`` states, ``z⁽ʲ⁾_k = Σ_{i≥j} A_i y_{k+j−1−i} + Σ_{l≥j} B̃_l u_{k+j−1−l}``:

    z⁽ʲ⁾_{k+1} = A_j z⁽¹⁾_k + z⁽ʲ⁺¹⁾_k + (A_j D + B̃_j) u_k,     y_k = z⁽¹⁾_k + D u_k

(``A_j = 0`` beyond ``na``, ``B̃_j = 0`` beyond ``nu``, ``z⁽ᴺ⁺¹⁾ = 0``): the same Markov parameters, hence the
same transfer function and Hankel singular values, on fewer states wherever ``p·N < p·na + m·nu`` (the observer
form of a left matrix-fraction description: Kailath T. (1980), Linear Systems, section 6.4; the reference is from
memory; the algebra above is checked in the tests against the realisation's own impulse response). A ridge ARX at
past 100 ms of 3 sites and 20 channels: 2,297 -> 2,000 states, which is what
:func:`~stimsteer.sysid.network.systems.minimal_realisation` balances (its Gramians, their square roots and the
SVD are cubic in the states).
"""

from __future__ import annotations

import numpy as np

from .._shift import unit_rows

__all__: list = []


def companion_of(A, B, C, D):
    """``(Ao, Bo, Co)`` of the companion form (module docstring) where ``(A, B, C, D)`` is exactly
    ``arx_to_state_space``'s realisation (checked entry by entry) and the companion form has fewer states; else
    None."""
    A, B, C, D = (np.asarray(x, dtype=np.float64) for x in (A, B, C, D))
    n, p, m = A.shape[0], C.shape[0], B.shape[1]
    if n <= p or p == 0 or m == 0 or not np.array_equal(A[:p], C) or not np.array_equal(B[:p], D):
        return None
    src = unit_rows(A)
    if src is None:
        return None
    i = p
    while i < n and src[i] == i - p:  # the output lags: row i copies state i − p
        i += 1
    if i % p or (n - i) % m:
        return None
    na, nu = i // p, (n - i) // m
    N = max(na, nu)
    if p * N >= n or not _is_shift_register(A, B, C, D, na, nu):
        return None
    Ao, Bo = np.zeros((p * N, p * N)), np.zeros((p * N, m))
    for j in range(N):
        rows = slice(j * p, (j + 1) * p)
        if j < na:
            Ao[rows, :p] = C[:, j * p:(j + 1) * p]
            Bo[rows] = C[:, j * p:(j + 1) * p] @ D
        if j < nu:
            Bo[rows] += C[:, p * na + j * m:p * na + (j + 1) * m]
        if j + 1 < N:
            Ao[rows, (j + 1) * p:(j + 2) * p] = np.eye(p)
    Co = np.zeros((p, p * N))
    Co[:, :p] = np.eye(p)
    return Ao, Bo, Co


def _is_shift_register(A, B, C, D, na: int, nu: int) -> bool:
    """Whether ``A`` and ``B`` are entry for entry ``arx_to_state_space``'s for ``C``, ``D``, ``na`` and ``nu``."""
    p, m, n = C.shape[0], B.shape[1], A.shape[0]
    E = np.zeros((n, n))
    E[:p] = C
    E[p:p * na, :p * (na - 1)] = np.eye(p * (na - 1))
    EB = np.zeros((n, m))
    EB[:p] = D
    if nu:
        off = p * na
        EB[off:off + m] = np.eye(m)
        E[off + m:, off:off + m * (nu - 1)] = np.eye(m * (nu - 1))
    return np.array_equal(A, E) and np.array_equal(B, EB)
