"""The lifted predictor's regression from moments (a helper of :mod:`stimsteer.sysid.lifted`).

The regression of :class:`~stimsteer.sysid.lifted.LiftedPredictor` has the regressors ``x = [r; φ(s); u]`` (raw
window, features of the source, current input) and the targets ``[y; φ(s')]`` (newest output, next features). Its
ridge solution on standardised, centred columns needs only the regressors' and targets' sums and cross-products.
These are accumulated over blocks of at most ``_BLOCK_ROWS`` transitions, whose windows are made from the raw samples
when the block is reached, so memory is bounded by the Gram, never by transitions × window:

* the shared part ``b = [r; u]`` and the output ``y``, which together are the lagged vector of the samples over
  ``T + 1`` lags: the compact lag sums of :mod:`stimsteer.sysid._lagged` of every fold part of the trials, in one
  pass; a fold's training Gram is assembled from the sums of the other parts, the final fit's from all;
* the features of every candidate dictionary of a fold (drawn from that fold's training sources, standardised by
  the training moments) in one pass over the fold's training trials.

Every candidate and strength is then solved by block elimination with the raw window's block ``G_rr`` (shared by
the candidates of a fold): one Cholesky factor of ``G_rr + αn I`` per fold and strength, then per candidate the
Schur complement of its features and input (Golub & Van Loan 2013, Matrix Computations, 4th ed., section 4.2 and
3.2.11). On standardised columns ``λ_max(G) ≤ trace G = k n``, so ``cond(G + αn I) ≤ (k + α) / α``; where ``αn`` is at
the rounding level of that bound (``α ≤ 1e-12 k``, the unregularised fit) the eigendecomposition of the whole Gram is
used instead, with its rule for null directions. Validation predictions step only the fitted rows of the lifted
dynamics (the rest of ``A`` shifts the window: the same numbers as the dense product, at a fraction of its work).

The windows' sums are taken about a provisional offset (the first block's mean), which keeps the centring
``C = G − n μ μᵀ`` free of cancellation (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla

from ._lagged import _lagged_gram, _LagSums, _stream_lag_sums
from ._lift_features import dictionary_from, fourier_features
from .arx_regression import centred_lead, lead_order

_BLOCK_ROWS = 1024  # transitions per block: at past 100 and 23 channels, about 19 MB per window array


def trial_blocks(segments, T: int, rows: int = _BLOCK_ROWS):
    """Yield ``(raw, u_now, y_now)`` per block of transitions of the segments ``(u, y)``.

    ``raw`` has one row more than the others: ``raw[:-1]`` are the previous windows of the block's transitions,
    ``raw[1:]`` the next ones (whose sources, ``raw[:, source_columns(...)]``, give the target features).
    """
    for u, y in segments:
        k = len(u) - T
        for i0 in range(0, k, rows):
            i1 = min(k, i0 + rows)
            yield raw_windows(u[i0:i1 + T], y[i0:i1 + T], T), u[i0 + T:i1 + T], y[i0 + T:i1 + T]


def raw_windows(u: np.ndarray, y: np.ndarray, T: int) -> np.ndarray:
    """:func:`~._lift_features.windows`' raw windows (inputs then outputs, time-major), copied once from sliding
    views of the samples."""
    k, m, p = len(u) - T + 1, u.shape[1], y.shape[1]
    raw = np.empty((k, T * (m + p)))
    # splitting the contiguous last axis of a column slice is a view: the windows are written into ``raw``
    raw[:, :T * m].reshape(k, T, m)[...] = np.lib.stride_tricks.sliding_window_view(u, T, axis=0).transpose(0, 2, 1)
    raw[:, T * m:].reshape(k, T, p)[...] = np.lib.stride_tricks.sliding_window_view(y, T, axis=0).transpose(0, 2, 1)
    return raw


def window_rows(u: np.ndarray, y: np.ndarray, T: int, starts) -> tuple:
    """The raw windows and feature sources of the windows starting at samples ``starts`` of ``(u, y)``."""
    raw = np.vstack([raw_windows(u[s:s + T], y[s:s + T], T) for s in np.asarray(starts, np.int64)])
    return raw, raw[:, source_columns(T, u.shape[1], y.shape[1])]


def source_columns(T: int, m: int, p: int) -> np.ndarray:
    """Columns of the raw window (inputs then outputs, time-major) that make the feature source, in its order."""
    return np.r_[T * m + np.arange(T * p), np.arange((T - 1) * m)].astype(np.int64)


class SharedSums:
    """Sums over transitions of ``b = [r; u] − shift_b`` and ``y − shift_y``: count, sums, ``bᵀb`` and ``bᵀy``
    (``Gbb`` and ``Gby`` are views of one Gram assembled in the order ``[b; y]``)."""

    def __init__(self, sums: _LagSums, index: np.ndarray, nb: int):
        s = lead_order(sums.lagged_sums(), index.reshape(-1))
        W = _lagged_gram(sums, index)
        self.n, self.sb, self.sy = int(sums.n), s[:nb], s[nb:]
        self.Gbb, self.Gby = W[:nb, :nb], W[:nb, nb:]


def lifted_index(T: int, m: int, p: int) -> np.ndarray:
    """Positions ``(T + 1, m + p)`` of the lagged vector ``w_j = [Z_j; …; Z_{j−T}]`` (``Z = [y u]``) in the order
    ``[b; y_j]`` of a transition into ``j``: the raw window ending at ``j − 1`` (inputs, then outputs, oldest first),
    the current input ``u_j``, then the output ``y_j`` (every entry used once)."""
    pos = np.empty((T + 1, p + m), dtype=np.intp)
    for q in range(T):  # sample j − T + q sits at lag T − q
        pos[T - q, p:] = q * m + np.arange(m)
        pos[T - q, :p] = T * m + q * p + np.arange(p)
    pos[0, p:] = T * (m + p) + np.arange(m)
    pos[0, :p] = T * (m + p) + m + np.arange(p)
    return pos


class LiftMoments:
    """The shared sums of every fold part of the trials, from one pass (see the module docstring).

    The shared regressors and the output of a transition into sample ``j`` are the lagged vector ``[Z_j; …;
    Z_{j−T}]`` of ``Z = [y u]`` (:func:`lifted_index`), so each fold part keeps the compact lag sums of
    :mod:`stimsteer.sysid._lagged` (``(T + 1) (m + p)²`` numbers, not a Gram), and a training set's Gram is
    assembled once from the sums of its parts.

    Parameters
    ----------
    session : Session or SessionFile
    positions : list of list of (start, stop)
        Each trial's valid segments, each long enough for one transition.
    per_trial : list of list of (u, y)
        Their samples.
    part_of : sequence of int
        The fold part of each trial (all 0 for a single part).
    T, m, p : window, inputs, outputs
    """

    def __init__(self, session, positions, per_trial, part_of, T: int, m: int, p: int):
        self.per_trial, self.part_of, self.T, self.m, self.p = per_trial, list(part_of), T, m, p
        self.nr = T * (m + p)
        first = next((seg for segs in per_trial for seg in segs), None)
        su = first[0][:_BLOCK_ROWS].mean(0) if first is not None else np.zeros(m)
        sy = first[1][:_BLOCK_ROWS].mean(0) if first is not None else np.zeros(p)
        self.shift_b, self.shift_y = np.concatenate([np.tile(su, T), np.tile(sy, T), su]), sy
        self.index = lifted_index(T, m, p)
        pieces = [(a + T, b, self.part_of[i]) for i, segs in enumerate(positions) for a, b in segs]
        self.parts = _stream_lag_sums(session, pieces, max(self.part_of, default=0) + 1, T,
                                      shift=np.concatenate([sy, su]))

    def trials_except(self, part: int | None) -> list:
        """Trial indices outside fold part ``part`` (every trial for None), in trial order."""
        return [i for i in range(len(self.per_trial)) if part is None or self.part_of[i] != part]

    def shared(self, part: int | None) -> SharedSums:
        """The shared sums of the trials outside ``part`` (every trial for None), their Gram assembled."""
        sums = None
        for k, part_sums in enumerate(self.parts):
            if k != part:
                sums = part_sums if sums is None else sums.plus(part_sums)
        return SharedSums(sums, self.index, self.nr + self.m)

    def dictionary(self, kind, sums: SharedSums, trials, n_features, bandwidth, seed):
        """The dictionary :func:`~._lift_features.draw_dictionary` draws from the sources of ``trials``' rows."""
        cols = source_columns(self.T, self.m, self.p)
        n = max(sums.n, 1)
        mu = sums.sb / n
        var = np.diag(sums.Gbb)[cols] / n - mu[cols] ** 2
        mean = mu[cols] + self.shift_b[cols]
        return dictionary_from(kind, mean, np.sqrt(np.maximum(var, 0.0)), sums.n,
                               lambda idx: self.source_rows(trials, idx), n_features, bandwidth, seed)

    def source_rows(self, trials, idx) -> np.ndarray:
        """Feature sources of the transitions numbered ``idx`` in the order of ``trials``' rows."""
        idx = np.asarray(idx, np.int64)
        out = np.empty((idx.size, len(source_columns(self.T, self.m, self.p))))
        start, T = 0, self.T
        for i in trials:
            for u, y in self.per_trial[i]:
                k = len(u) - T
                here = np.flatnonzero((idx >= start) & (idx < start + k))
                if here.size:
                    out[here] = window_rows(u, y, T, idx[here] - start)[1]
                start += k
        return out

    def feature_sums(self, trials, dics) -> dict:
        """One pass over ``trials``: the features' sums and products with ``b``, ``y`` and each other.

        The dictionaries are those of one training set (:meth:`dictionary` on the same sums): they share the
        standardisation of the sources, done once per block."""
        D = sum(d.n_features for d in dics)
        nb = self.nr + self.m
        f = {"sF": np.zeros(D), "sFn": np.zeros(D), "GbF": np.zeros((nb, D)), "GbFn": np.zeros((nb, D)),
             "GFF": np.zeros((D, D)), "GFFn": np.zeros((D, D)), "GFy": np.zeros((D, self.p))}
        if D == 0:
            return f
        cols = source_columns(self.T, self.m, self.p)
        T, m, p, nr = self.T, self.m, self.p, self.nr
        # the window moved by one sample: slot q of a window is slot q − 1 of the next (raw columns of each)
        older = np.r_[np.arange((T - 1) * m), T * m + np.arange((T - 1) * p)]
        newer = np.r_[np.arange(m, T * m), T * m + p + np.arange((T - 1) * p)]
        oldest = np.r_[np.arange(m), T * m + np.arange(p)]
        features = _stacked_features(dics)
        for i in trials:
            for raw, u_now, y_now in trial_blocks(self.per_trial[i], self.T):
                standard = raw[:, cols]  # the sources, standardised in place as Dictionary.standardise does; the
                standard -= dics[0].mean  # dictionaries of one training set share it
                standard /= dics[0].scale
                phi = features(standard)  # rows 0..k: φ of every window of the block
                raw -= self.shift_b[:nr]
                # Σ_t b_t φ_tᵀ and Σ_t b_t φ_{t+1}ᵀ over the block's transitions t = 0..k−1 from one product over
                # every window: P = Σ_{t=0..k} r_t φ_tᵀ; the next window's features pair with the window moved
                # by one sample, so only the oldest slot's products are taken apart
                P = raw.T @ phi
                f["GbF"][:nr] += P - np.outer(raw[-1], phi[-1])
                f["GbFn"][newer] += P[older] - np.outer(raw[0, older], phi[0])
                f["GbFn"][oldest] += raw[:-1, oldest].T @ phi[1:]
                us = u_now - self.shift_b[nr:]
                f["GbF"][nr:] += us.T @ phi[:-1]
                f["GbFn"][nr:] += us.T @ phi[1:]
                F, Fn = phi[:-1], phi[1:]
                f["sF"] += F.sum(0)
                f["sFn"] += Fn.sum(0)
                f["GFF"] += F.T @ F
                f["GFFn"] += F.T @ Fn
                f["GFy"] += F.T @ (y_now - self.shift_y)
        return f


def _stacked_features(dics):
    """``standard ↦ [φ_1(standard), …]`` for dictionaries sharing their standardisation: random Fourier
    dictionaries in one product with their stacked frequencies (each column the number its own dictionary gives, up
    to the order of a dot product's additions), the others one by one."""
    if not all(d.kind == "rff" for d in dics) or not any(d.n_features for d in dics):
        return lambda standard: np.hstack([d.of_standardised(standard) for d in dics])
    kept = [d for d in dics if d.n_features]
    omega, phase = np.vstack([d.omega for d in kept]), np.concatenate([d.phase for d in kept])
    amplitude = np.concatenate([np.full(d.n_features, np.sqrt(2.0 / d.n_features)) for d in kept])
    return lambda standard: fourier_features(standard, omega, phase, amplitude)


class FoldSystem:
    """The centred, standardised parts of the normal equations shared by every dictionary of one training set: the
    regressors ``b = [r; u]`` (their means, centred Gram, products with ``y``, scales) and the raw window's block
    ``G_rr`` (see the module docstring)."""

    def __init__(self, sums: SharedSums, nr: int, shift_b, shift_y):
        n = sums.n
        self.n, self.nr, self.shift_b, self.shift_y = n, nr, shift_b, shift_y
        self.mb, self.my = sums.sb / n, sums.sy / n
        # centred in place (the sums are the caller's own total), a few rows at a time: no Gram-sized temporaries
        self.Cbb = centred_lead(None, None, sums.Gbb.shape[0], n, sums.sb, self.mb, gram=sums.Gbb)[1]
        self.Cby = sums.Gby - n * np.outer(self.mb, self.my)
        sb = np.sqrt(np.maximum(np.diag(self.Cbb), 0.0) / n)
        self.sb = np.where(sb > 1e-12, sb, 1.0)

    @property
    def Grr(self) -> np.ndarray:
        """The standardised raw window's block, ``C_rr / (s_r s_rᵀ)`` (made when asked for: one Gram-sized array)."""
        sr = self.sb[:self.nr]
        G = self.Cbb[:self.nr, :self.nr] / sr[:, None]
        G /= sr[None, :]
        return G

    def factor(self, alpha: float):
        """The lower Cholesky factor of ``G_rr + αn I`` (None where it is not positive definite)."""
        A = self.Grr
        A.flat[::self.nr + 1] += alpha * self.n
        try:  # the transpose (the same symmetric matrix) is Fortran-ordered: factored where it lies
            return sla.cholesky(A.T, lower=True, overwrite_a=True, check_finite=False)
        except np.linalg.LinAlgError:
            return None


class Candidate:
    """The normal equations of one dictionary (columns ``cols`` of the feature sums) over a fold's training rows.

    ``G`` is split as ``[r | o]`` with ``o = [φ; u]``; the regressors' order is ``[r; φ; u]`` and the targets'
    ``[y; φ']``, as :func:`~.lifted._ridge` has them.
    """

    def __init__(self, fs: FoldSystem, feats: dict, cols: slice):
        n, nr, mb = fs.n, fs.nr, fs.mb
        mF, mFn = feats["sF"][cols] / n, feats["sFn"][cols] / n
        CbF = feats["GbF"][:, cols] - n * np.outer(mb, mF)
        CFF = feats["GFF"][cols, cols] - n * np.outer(mF, mF)
        CbFn = feats["GbFn"][:, cols] - n * np.outer(mb, mFn)
        CFy = feats["GFy"][cols] - n * np.outer(mF, fs.my)
        CFFn = feats["GFFn"][cols, cols] - n * np.outer(mF, mFn)
        self.fs, self.n, self.nr = fs, n, nr
        self.mx = np.concatenate([mb[:nr] + fs.shift_b[:nr], mF, mb[nr:] + fs.shift_b[nr:]])
        self.my = np.concatenate([fs.my + fs.shift_y, mFn])
        sF = np.sqrt(np.maximum(np.diag(CFF), 0.0) / n)
        self.sx = np.concatenate([fs.sb[:nr], np.where(sF > 1e-12, sF, 1.0), fs.sb[nr:]])
        sr, so = self.sx[:nr], self.sx[nr:]
        Cro = np.hstack([CbF[:nr], fs.Cbb[:nr, nr:]])
        Coo = np.block([[CFF, CbF[nr:].T], [CbF[nr:], fs.Cbb[nr:, nr:]]])
        self.Gro, self.Goo = Cro / np.outer(sr, so), Coo / np.outer(so, so)
        R = np.vstack([np.hstack([fs.Cby[:nr], CbFn[:nr]]), np.hstack([CFy, CFFn]),
                       np.hstack([fs.Cby[nr:], CbFn[nr:]])])
        self.R = R / self.sx[:, None]

    @property
    def k(self) -> int:
        return self.sx.size

    def gram(self) -> np.ndarray:
        """The whole standardised Gram ``[[G_rr, G_ro], [G_or, G_oo]]``."""
        return np.block([[self.fs.Grr, self.Gro], [self.Gro.T, self.Goo]])

    def coefficients(self, beta: np.ndarray):
        """``(theta, intercept)`` in data units from standardised coefficients."""
        theta = beta / self.sx[:, None]
        return theta, self.my - self.mx @ theta


def by_cholesky(alpha: float, k: int) -> bool:
    """Whether the strength keeps every direction that the eigendecomposition route keeps (``αn`` above
    ``1e-12 λ_max``, with ``λ_max ≤ k n`` on standardised columns)."""
    return alpha > 1e-12 * k


def solve_blocks(cand: Candidate, alpha: float, L) -> np.ndarray | None:
    """Standardised ridge coefficients by elimination of the raw window's block (``L`` its factor); None where
    the Schur complement is not positive definite."""
    return solve_shared([cand], alpha, L)[0]


def solve_shared(cands: list, alpha: float, L) -> list:
    """:func:`solve_blocks` for candidates of one training set (one factor ``L``), their triangular solves with
    ``L`` batched into one forward and one backward solve (wide right-hand sides: fewer, faster BLAS calls)."""
    nr = cands[0].nr
    if nr == 0:
        fwd = np.zeros((0, sum(c.Goo.shape[0] + c.R.shape[1] for c in cands)))
    else:
        fwd = sla.solve_triangular(L, np.hstack([np.hstack([c.Gro, c.R[:nr]]) for c in cands]), lower=True,
                                   check_finite=False)
    parts, at = [], 0
    for cand in cands:
        w, q = cand.Goo.shape[0], cand.R.shape[1]
        W, Z = fwd[:, at:at + w], fwd[:, at + w:at + w + q]
        at += w + q
        S = cand.Goo + alpha * cand.n * np.eye(w) - W.T @ W
        try:
            Lo = sla.cholesky(S, lower=True, check_finite=False)
        except np.linalg.LinAlgError:
            parts.append(None)
            continue
        beta_o = sla.cho_solve((Lo, True), cand.R[nr:] - W.T @ Z, check_finite=False)
        parts.append((beta_o, Z - W @ beta_o))
    kept = [x for x in parts if x is not None]
    if nr and kept:
        back = sla.solve_triangular(L, np.hstack([x[1] for x in kept]), lower=True, trans="T", check_finite=False)
    out, at = [], 0
    for x in parts:
        if x is None:
            out.append(None)
            continue
        q = x[1].shape[1]
        out.append(np.vstack([back[:, at:at + q], x[0]]) if nr else x[0])
        at += q
    return out


def eigen_path(cand: Candidate, alphas) -> list:
    """Standardised ridge coefficients for several strengths from one eigendecomposition of the whole Gram (a null
    direction of an unregularised fit dropped)."""
    lam, V = np.linalg.eigh(cand.gram())
    VtR = V.T @ cand.R
    out = []
    for a in alphas:
        d = lam + a * cand.n
        d = np.where(d > 1e-12 * max(lam[-1], 1e-300), d, np.inf)
        out.append(V @ (VtR / d[:, None]))
    return out


def fitted_rows(theta, b, T: int, m: int, p: int, D: int):
    """The fitted rows of the lifted ``A`` and ``B`` (newest output, then features), from the coefficients over
    ``[z_prev; u_t]``: shapes ``(p + D, n_z)`` and ``(p + D, m)``."""
    nr = T * (m + p)
    Th = np.vstack([theta, b[None]]).T  # (p + D, nr + D + m + 1): [raw, features, u, intercept]
    Ar = np.zeros((p + D, nr + D + 1))
    Ar[:, :nr + D] = Th[:, :nr + D]
    Ar[:, -1] = Th[:, -1]
    return Ar, Th[:, nr + D:nr + D + m]


def simulate_rows(Ar, Br, T: int, m: int, p: int, z0, uf) -> np.ndarray:
    """Outputs of the lifted dynamics from lifted states ``z0`` (w, n_z) under inputs ``uf`` (w, H, m), stepping
    only the fitted rows: the window parts of ``z`` shift by one sample, the new input and output enter at their ends,
    the features are replaced and the constant stays."""
    nr = T * (m + p)
    z, out = np.array(z0, float), np.empty((uf.shape[0], uf.shape[1], p))
    for k in range(uf.shape[1]):
        new = z @ Ar.T + uf[:, k] @ Br.T
        z[:, :(T - 1) * m] = z[:, m:T * m].copy()
        z[:, (T - 1) * m:T * m] = uf[:, k]
        z[:, T * m:nr - p] = z[:, T * m + p:nr].copy()
        z[:, nr - p:nr + Ar.shape[0] - p] = new
        out[:, k] = new[:, :p]
    return out


_QR_BLOCK_ROWS = 1024  # rows of the design absorbed into the triangular factor at a time


def stacked_qr_ridge(moments, trials, dic, alpha: float, mx, sx, my) -> np.ndarray:
    """Standardised ridge coefficients by least squares on the stacked design ``[Xs; √(αn) I]`` (targets
    ``[Y − my; 0]``), by a triangular QR factor ``R`` of ``[X Y]`` updated block by block, ``R11 β = R12`` (the
    accuracy of a QR of the data, Golub & Van Loan 2013, section 5.3 and 6.5.1). Each block is absorbed by LAPACK's
    triangular-pentagonal QR (``dtpqrt``: the QR of ``[R; B]`` at ``2 (k + q)² rows`` flops): memory of the
    ``(k + q)²`` factor and one block.

    ``alpha`` must be positive (the stacked design then has full column rank).
    """
    k, q = sx.size, my.size
    c = k + q
    R = np.zeros((c, c), order="F")
    nb, n = min(64, c), 0
    cols = source_columns(moments.T, moments.m, moments.p)

    def absorb(B):
        _R, _B, _t, info = sla.lapack.dtpqrt(0, nb, R, B, overwrite_a=1, overwrite_b=1)
        if info != 0:
            raise np.linalg.LinAlgError(f"LAPACK dtpqrt failed (info {info})")

    for i in trials:
        for raw, u_now, y_now in trial_blocks(moments.per_trial[i], moments.T, rows=_QR_BLOCK_ROWS):
            phi = dic(raw[:, cols])
            B = np.empty((u_now.shape[0], c), order="F")
            nr, D, p = raw.shape[1], phi.shape[1], y_now.shape[1]
            B[:, :nr], B[:, nr:nr + D], B[:, nr + D:k] = raw[:-1], phi[:-1], u_now
            B[:, k:k + p], B[:, k + p:] = y_now, phi[1:]
            B[:, :k] -= mx
            B[:, :k] /= sx
            B[:, k:] -= my
            absorb(B)
            n += u_now.shape[0]
    ridge = np.zeros((k, c), order="F")
    ridge[:, :k] = np.sqrt(alpha * n) * np.eye(k)
    absorb(ridge)
    return sla.solve_triangular(np.triu(R[:k, :k]), R[:k, k:], check_finite=False)
