"""Cross-validation of ridge ARX over several lag structures and a grid of strengths, from one set of moments.

Every candidate structure's regressors are a subset of one lagged vector (:mod:`stimsteer.sysid.arx_structure`),
and its standardised normal equations ``(R_s + α I) β = r_s`` are the sub-block of one standardised Gram ``R`` over
the union of the candidates' regressors: centring and scaling are per regressor, the same in every structure. The
regressors common to all candidates (the *core*) are factored once per fold and strength,

    R_core + α I = L Lᵀ   (Cholesky),

and each structure adds its few other regressors ``e`` by a block Cholesky step (``L⁻¹ R_core,e``, a Cholesky of the
``|e| × |e|`` Schur complement): ``O(|core|² |e|)`` per structure instead of a factorisation of its own. With one
candidate the core is the whole structure.

Numerical care: a Cholesky solve is backward stable like the eigendecomposition it replaces (errors
``~ κ(R + α I) · eps`` in both; Golub & Van Loan 2013, Matrix Computations, 4th ed., sec. 4.2). Where the factor
does not exist in floating point (a strength at or below the rounding level of ``R``, where the eigen route drops
the null directions, or a semi-definite Schur complement) the structure falls back to the eigendecomposition route
of :func:`stimsteer.sysid.arx_regression._ridge_path` for that fold.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import scipy.linalg as sla

from .arx_regression import _Problem, _ridge_path, _rounding_level

__all__ = ["cv_errors", "cv_table"]


def _core_factor(Rc: np.ndarray, rc: np.ndarray, alpha: float, buffer: np.ndarray):
    """``L`` with ``L Lᵀ = R_core + α I`` (in ``buffer``) and ``L⁻¹ r_core``; None when the factor does not exist."""
    if Rc.shape[0] == 0:
        return Rc, rc
    np.copyto(buffer, Rc)
    buffer[np.diag_indices_from(buffer)] += alpha
    try:
        L = sla.cholesky(buffer, lower=True, overwrite_a=True, check_finite=False)
    except np.linalg.LinAlgError:
        return None
    return L, sla.solve_triangular(L, rc, lower=True, check_finite=False)


def _extended(R, r, core, extra, alpha, factor) -> np.ndarray | None:
    """Standardised coefficients on ``[core, extra]`` at one strength from the core's factor (block Cholesky)."""
    L, z = factor
    Bce, re = R[np.ix_(core, extra)], r[extra]
    S = R[np.ix_(extra, extra)]
    if core.size:
        X = sla.solve_triangular(L, Bce, lower=True, check_finite=False)  # L⁻¹ R_core,e
        S = S - X.T @ X
        rhs = re - X.T @ z
    else:
        X, S, rhs = Bce, S.copy(), re
    S[np.diag_indices_from(S)] += alpha
    try:
        be = sla.cho_solve(sla.cho_factor(S, lower=True, check_finite=False), rhs, check_finite=False) \
            if extra.size else np.zeros((0, r.shape[1]))
    except np.linalg.LinAlgError:
        return None
    bc = sla.solve_triangular(L, z - X @ be, lower=True, trans="T", check_finite=False) if core.size else \
        np.zeros((0, r.shape[1]))
    return np.vstack([bc, be])


def _fold_betas(R, r, core, extras, live, alphas) -> dict:
    """Standardised coefficients ``{structure: [β per strength] or None}`` of one fold: one core factor at a time."""
    out = {i: [] for i in live}
    Rc, rc = R[np.ix_(core, core)], r[core]
    usable = core.size == 0 or min(alphas) > _rounding_level(Rc)
    buffer = np.empty_like(Rc, order="F")  # re-used: a fresh core-sized array per strength costs page faults
    for alpha in alphas:
        factor = _core_factor(Rc, rc, alpha, buffer) if usable else None
        for i in live:
            if out[i] is None:
                continue
            beta = None if factor is None else _extended(R, r, core, extras[i], alpha, factor)
            out[i] = None if beta is None else out[i] + [beta]
    return out


def _union_problem(probs: list[_Problem]):
    """A problem whose regressors are the union of the candidates' (sorted), and each candidate's positions in it."""
    union = np.unique(np.concatenate([q.x_idx for q in probs]))
    base = probs[0]
    uprob = _Problem(base.p, base.m, 0, 1, 0, base.fit_intercept, base.L)
    uprob.x_idx = union
    pos = [np.searchsorted(union, q.x_idx) for q in probs]
    core = pos[0]
    for p_ in pos[1:]:
        core = np.intersect1d(core, p_)
    return uprob, pos, np.sort(core)


def cv_errors(probs: list[_Problem], folds, total, alphas) -> list[np.ndarray]:
    from .hankel import _single_blas_thread

    with _single_blas_thread():  # factorisations of this size gain nothing from threads on a busy machine
        return _cv_errors(probs, folds, total, alphas)


def _cv_errors(probs: list[_Problem], folds, total, alphas) -> list[np.ndarray]:
    """Validation errors ``(n_alphas, n_folds)`` of each candidate (NaN where a fold cannot be scored).

    Each fold: training moments = total − fold; the error is the mean over outputs of SSE / SST on the held-out
    rows (:meth:`_Problem.validation_errors`), for every strength, from one set of centred moments of the union.
    """
    k = len(folds)
    errors = [np.full((len(alphas), k), np.nan) for _ in probs]
    uprob, pos, core = _union_problem(probs)
    extras = [np.setdiff1d(p_, core) for p_ in pos]
    for f, held in enumerate(folds):
        train = total.minus(held)
        live = [i for i, q in enumerate(probs) if held.n and train.n > q.x_idx.size]
        if not live:
            continue
        Cxx, Cxy, _Cyy, _mu = uprob.centred(train)
        n = train.n
        scale = np.sqrt(np.clip(np.diag(Cxx), 0.0, None) / n)
        scale[scale == 0] = 1.0
        R = Cxx / (n * np.outer(scale, scale))
        r = Cxy / (n * scale[:, None])
        del Cxx
        Qxx, Qxy, Qyy, _ = uprob.centred(held, mean_from=train)
        yi = uprob.y_idx
        sst = np.diag(held.W)[yi] - held.s[yi] ** 2 / held.n
        found = _fold_betas(R, r, core, extras, live, alphas)
        for i in live:
            idx = np.concatenate([core, extras[i]])
            betas = found[i]
            if betas is None:  # no Cholesky factor: the eigen route, in this structure alone
                betas = _ridge_path(R[np.ix_(idx, idx)], r[idx], alphas, route="eigh")[0]
            errors[i][:, f] = _errors(betas, scale[idx], Qxx[np.ix_(idx, idx)], Qxy[idx], np.diag(Qyy), sst)
    return errors


def _errors(betas, scale, Qxx, Qxy, qyy, sst) -> np.ndarray:
    """Mean over outputs of SSE / SST for each coefficient set (all strengths in one product)."""
    ok = sst > 0
    if not ok.any():
        return np.full(len(betas), np.nan)
    B = np.stack([b / scale[:, None] for b in betas])  # (n_alphas, d, p)
    a, d, p = B.shape
    QB = (Qxx @ B.transpose(1, 0, 2).reshape(d, a * p)).reshape(d, a, p).transpose(1, 0, 2)  # one product
    sse = qyy[None, :] - 2.0 * (B * Qxy[None]).sum(axis=1) + (B * QB).sum(axis=1)
    sse = np.clip(sse, 0.0, None)  # rounding can push an exact fit below zero
    return np.mean(sse[:, ok] / sst[ok], axis=1)


def cv_table(errors: np.ndarray, alphas: np.ndarray, k: int) -> pd.DataFrame:
    """The cross-validation table of one structure from its ``(n_alphas, k)`` validation errors."""
    table = pd.DataFrame({"alpha": alphas})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows when no fold could be scored
        table["mean_error"] = np.nanmean(errors, axis=1)
        table["std_error"] = np.nanstd(errors, axis=1)
    for f in range(k):
        table[f"fold_{f}"] = errors[:, f]
    return table
