"""The normal equations of ``B`` and ``D`` given ``A`` and ``C``, from the block-Toeplitz structure of the Markov
parameters instead of one dense ``(p f × m f)`` basis matrix per unknown.

The unknowns ``θ = [vec(B); vec(D)]`` enter the block-Toeplitz matrix ``H(θ)`` of Markov parameters linearly, one
input channel ``l`` and one *column pattern* ``c`` at a time: ``H`` for ``B = e_j e_lᵀ`` has, in input column
``(s, l)``, the vector ``h_j`` shifted down by ``s`` blocks (``h_j`` = column ``j`` of ``[0; C; CA; …; CA^{f−2}]``);
for ``D = e_a e_lᵀ`` the unit vector of output ``a`` shifted likewise. So every inner product the normal
equations need,

    M[(c,l),(c',l')] = Σ_{s,s'} (Hc_sᵀ Hc'_s') S_uu[(s',l'),(s,l)] + Σ_{s,s'} (Qᵀ Hc_s)ᵀ (Qᵀ Hc'_s') ΔS_uu[(s',l'),(s,l)],

is a contraction of small Grams of shifted pattern vectors (cumulative sums over the shift) with the input
covariances: ``O(f² (n + p)² (p + m²))`` work, instead of ``O(n_θ p f (m f)²)`` work and ``O(n_θ p f m f)`` memory
for the dense basis (about 100 MB per order at ``f = 50``, 20 outputs, 3 inputs). The contractions are taken one
shift at a time (:func:`contract_shifted_gram`) and through ``Φ`` first (:func:`contract_projected_gram`), so no
``(f, f, n + p, n + p)`` array is formed (64 MB at ``f = 50``, order 20, 20 outputs).
``P₁ = Q Qᵀ`` is the projector on range(Γ). The equations are the same as those of
:func:`stimsteer.sysid.subspace.projection._b_d`'s Notes; only the order of the sums differs.
"""

from __future__ import annotations

import numpy as np


def pattern_blocks(A: np.ndarray, C: np.ndarray, f: int, feedthrough: bool) -> np.ndarray:
    """``h[t]``, shape (f, p, n (+ p)): block ``t`` of each column pattern (``B`` patterns, then ``D`` ones)."""
    n, p = A.shape[0], C.shape[0]
    h = np.zeros((f, p, n + (p if feedthrough else 0)))
    O = C.copy()
    for t in range(1, f):
        h[t, :, :n] = O
        O = O @ A
    if feedthrough:
        h[0, :, n:] = np.eye(p)
    return h


def shifted_gram(h: np.ndarray) -> np.ndarray:
    """``G[s, s'] = Hc_sᵀ Hc_s'`` for the patterns ``h`` shifted down by ``s`` and ``s'`` blocks (truncated at
    ``f`` blocks), shape (f, f, nc, nc): for ``s' = s + δ`` it is ``Σ_{t < f − s'} h[t + δ]ᵀ h[t]``, a cumulative sum."""
    f, _p, nc = h.shape
    G = np.empty((f, f, nc, nc))
    for delta in range(f):
        cs = np.cumsum(np.matmul(h[delta:].transpose(0, 2, 1), h[: f - delta]), axis=0)
        sp = np.arange(delta, f)
        block = cs[f - 1 - sp]
        G[sp - delta, sp] = block
        G[sp, sp - delta] = block.transpose(0, 2, 1)
    return G


def projected_patterns(Q: np.ndarray, h: np.ndarray) -> np.ndarray:
    """``Φ[s] = Qᵀ Hc_s``, shape (f, q, nc): ``Σ_t Q_{s+t}ᵀ h[t]`` (``Q_r`` = block row ``r`` of ``Q``)."""
    f, p, nc = h.shape
    q = Q.shape[1]
    # block rows s.. of Q against the first f − s blocks of h: one matrix product per shift
    return np.stack([Q[s * p:].T @ h[: f - s].reshape(-1, nc) for s in range(f)]).reshape(f, q, nc)


def _contract(G: np.ndarray, S4: np.ndarray) -> np.ndarray:
    """``Σ_{s,s'} G[s,s'][c,c'] S[(s',l'),(s,l)]`` as an array indexed ``(c, l, c', l')``."""
    out = np.tensordot(G, S4, axes=([0, 1], [2, 0]))  # (c, c', l', l)
    return out.transpose(0, 3, 1, 2)


def contract_shifted_gram(h: np.ndarray, S4: np.ndarray) -> np.ndarray:
    """``_contract(shifted_gram(h), S4)`` one lag difference at a time: the ``(f, f, nc, nc)`` array (32 MB at
    ``f = 50``, ``nc = 40``, and as much again for its transposed copy) is never formed."""
    f, _p, nc = h.shape
    m = S4.shape[1]
    out = np.zeros((nc, nc, m, m))  # (c, c', l', l)
    for delta in range(f):
        cs = np.cumsum(np.matmul(h[delta:].transpose(0, 2, 1), h[: f - delta]), axis=0)
        sp = np.arange(delta, f)
        block = cs[f - 1 - sp]  # G[sp − δ, sp]; G[sp, sp − δ] is its transpose (and so is G[s, s], as before)
        if delta:
            out += np.tensordot(block, S4[sp, :, sp - delta, :], axes=([0], [0]))
        out += np.tensordot(block, S4[sp - delta, :, sp, :], axes=([0], [0])).transpose(1, 0, 2, 3)
    return out.transpose(0, 3, 1, 2)


def contract_projected_gram(Phi: np.ndarray, D4: np.ndarray) -> np.ndarray:
    """``_contract(G2, D4)`` with ``G2[s, t] = Φ[s]ᵀ Φ[t]``, contracting ``D4`` with ``Φ`` first: ``O(f² q nc m²)``
    work and ``q nc m² f`` memory instead of the ``(f nc)²`` array ``G2`` (``O(f² nc² q)`` work)."""
    Psi = np.tensordot(Phi, D4, axes=([0], [0]))  # Ψ[q, c', l', s, l] = Σ_t Φ[t][q, c'] D4[t, l', s, l]
    out = np.tensordot(Phi, Psi, axes=([0, 1], [3, 0]))  # (c, c', l', l)
    return out.transpose(0, 3, 1, 2)


def _shift_weights(S4: np.ndarray) -> np.ndarray:
    """``X4`` with ``Σ_{s,t} (h[s]ᵀ h[t]) X4[t, ·, s, ·]`` equal to :func:`contract_shifted_gram`'s sum.

    ``G[s, s + δ] = Σ_{t < f − s − δ} h[t + δ]ᵀ h[t]``: the pair ``(a, b)`` of pattern blocks meets the input
    covariance blocks ``S[j + (a − b)⁺, ·, j + (b − a)⁺, ·]`` for every ``j <= f − 1 − max(a, b)``, so its weight is a
    cumulative sum of ``m × m`` blocks (the cumulative sums run over the small blocks, not the ``nc × nc`` ones).
    """
    f, m = S4.shape[0], S4.shape[1]
    X4 = np.empty((f, m, f, m))
    for delta in range(f):
        i = np.arange(f - delta)
        below = np.cumsum(S4[delta + i, :, i, :], axis=0)[::-1]  # pairs (δ + i, i), summed to j = f − 1 − δ − i
        above = np.cumsum(S4[i, :, delta + i, :], axis=0)[::-1]  # pairs (i, δ + i)
        X4[i, :, delta + i, :] = below
        X4[delta + i, :, i, :] = above
    return X4


def _projected_gemm(Phi: np.ndarray, D4: np.ndarray) -> np.ndarray:
    """:func:`contract_projected_gram` (``Σ_{s,t} (Φ[s]ᵀ Φ[t]) D4[t, ·, s, ·]``) as ``[(l, l'), (c, c')]``: through the
    whole Gram ``[Φ[s]ᵀ Φ[t]]`` and one matrix product when that takes fewer flops (``f² nc² (q + m²)`` against
    ``f q nc m² (f + nc)``: many inputs, short futures)."""
    f, q, nc = Phi.shape
    m = D4.shape[1]
    if f * nc * (q + m * m) >= q * m * m * (f + nc):
        return contract_projected_gram(Phi, D4).transpose(1, 3, 0, 2).reshape(m * m, nc * nc)
    flat = Phi.transpose(1, 0, 2).reshape(q, f * nc)
    G2 = (flat.T @ flat).reshape(f, nc, f, nc).transpose(0, 2, 1, 3).reshape(f * f, nc * nc)  # [(s, t), (c, c')]
    return D4.transpose(3, 1, 2, 0).reshape(m * m, f * f) @ G2  # D4[t, l', s, l] as [(l, l'), (s, t)]


def _pattern_term(h: np.ndarray, X4: np.ndarray, n: int, out: np.ndarray | None = None) -> np.ndarray:
    """``_projected_gemm(h, X4)`` over the patterns' non-zero blocks only: ``h[0] = [0, I]`` (no ``B`` pattern reaches
    the first block, the ``D`` patterns only it) and ``h[t] = [C A^{t−1}, 0]`` after it. So the ``B``-``B`` sums run
    over ``t >= 1`` (``(f − 1) n`` columns instead of ``f (n + p)``), the ``D``-``D`` block is ``I_p`` times
    ``X4[0, ·, 0, ·]`` and the cross blocks are single contractions: the same sums without their zero terms.

    ``out``: an ``(m², nc²)`` array the term is added to, block by block (its zero blocks add nothing; IEEE addition
    commutes, so ``out + term`` has the bits of ``term + out``), instead of a new array."""
    f, p, nc = h.shape
    m = X4.shape[1]
    O = h[1:, :, :n]  # C A^{t−1}, t = 1 … f − 1
    out = np.zeros((m * m, nc * nc)) if out is None else np.ascontiguousarray(out)
    acc = out.reshape(m, m, nc, nc)  # [l, l', c, c'] (a view)
    acc[:, :, :n, :n] += _projected_gemm(O, X4[1:, :, 1:, :]).reshape(m, m, n, n)
    if nc > n:  # the direct term's patterns
        # B-D: Σ_s O[s][b, c] X4[0, l', s + 1, l];  D-B: Σ_t O[t][a, c'] X4[t + 1, l', 0, l]
        acc[:, :, :n, n:] += np.tensordot(X4[0, :, 1:, :], O, axes=([1], [0])).transpose(1, 0, 3, 2)
        acc[:, :, n:, :n] += np.tensordot(X4[1:, :, 0, :], O, axes=([0], [0])).transpose(1, 0, 2, 3)
        d = np.arange(n, nc)
        acc[:, :, d, d] += X4[0, :, 0, :].T[:, :, None]
    return out


def normal_equations_gemm(h, Q, S_uu, D_uu, target, n: int, m: int, feedthrough: bool, weights=None):
    """:func:`normal_equations` by matrix products (:func:`_shift_weights`, :func:`_projected_gemm`) laid out in the
    unknowns' order directly: the same sums in another order, equal to rounding (for the factor route).
    ``weights``: :func:`_shift_weights` of ``S_uu`` when at hand (it does not depend on the order).

    ``M`` is returned in Fortran order (the same numbers), so LAPACK factors it where it lies, without the
    transposed copy a C-ordered matrix costs (2.7 of 16 ms at 1,152 unknowns); the pattern term is added into the
    projected one's array (one pass and one allocation fewer over the ``(m nc)²`` numbers)."""
    f, p, nc = h.shape
    S4, D4 = S_uu.reshape(f, m, f, m), D_uu.reshape(f, m, f, m)
    M = _projected_gemm(projected_patterns(Q, h), D4)
    M = _pattern_term(h, _shift_weights(S4) if weights is None else weights, n, out=M)
    M = M.reshape(m, m, nc, nc).transpose(0, 2, 1, 3)  # [l, c, l', c']
    rhs = _rhs(h, target, m)
    out = np.empty((nc * m, nc * m), order="F")
    if not feedthrough:
        out.reshape(m, nc, m, nc)[...] = M  # (a view: splits each axis; θ index l nc + c = l n + j)
        return out, rhs.T.reshape(-1)
    # θ = [B(j, l) at l n + j; D(a, l) at n m + l p + a]: each block written once through a 4-D view of `out`
    parts = ((slice(0, n), slice(0, n * m)), (slice(n, nc), slice(n * m, nc * m)))
    for r, rows in parts:
        for c, cols in parts:
            view = out[rows, cols].reshape(m, r.stop - r.start, m, c.stop - c.start)  # a view: splits each axis
            view[...] = M[:, r, :, c]
    return out, np.concatenate([rhs[:n].T.reshape(-1), rhs[n:].T.reshape(-1)])


def _rhs(h, target, m: int) -> np.ndarray:
    """``Σ_t h[t]ᵀ Σ_s T[s + t, ·, s, ·]``, shape (nc, m): the right-hand side indexed ``(c, l)``."""
    f, p, nc = h.shape
    T4 = target.reshape(f, p, f, m)  # [r, a, s, l]
    rhs = np.zeros((nc, m))
    s_all = np.arange(f)
    for t in range(f):
        s = s_all[: f - t]
        rhs += h[t].T @ T4[s + t, :, s, :].sum(axis=0)
    return rhs


def normal_equations(h, Q, S_uu, D_uu, target, n: int, m: int, feedthrough: bool):
    """``M`` and ``rhs`` of the ``θ = [vec(B); vec(D)]`` least squares (column-major ``vec``, as the dense form)."""
    f, p, nc = h.shape
    S4, D4 = S_uu.reshape(f, m, f, m), D_uu.reshape(f, m, f, m)
    M = contract_shifted_gram(h, S4) + contract_projected_gram(projected_patterns(Q, h), D4)
    rhs = _rhs(h, target, m)
    # (c, l) -> θ index: B(j, l) at l n + j, D(a, l) at n m + l p + a
    c, l = np.meshgrid(np.arange(nc), np.arange(m), indexing="ij")
    order = np.where(c < n, l * n + c, n * m + l * p + (c - n)).reshape(-1)
    n_theta = nc * m
    M_theta = np.empty((n_theta, n_theta))
    M_theta[np.ix_(order, order)] = M.reshape(n_theta, n_theta)
    rhs_theta = np.empty(n_theta)
    rhs_theta[order] = rhs.reshape(-1)
    return M_theta, rhs_theta
