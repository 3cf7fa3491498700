"""Pooled verdicts across subjects: DerSimonian–Laird random effects, the practical margin, rank agreement.

Each subject contributes one effect (a mean difference of held-out R² over its sessions and splits) and its
variance (the variance of that mean). The random-effects model ``effect_i = mu + b_i + e_i`` with
``b_i ~ N(0, tau²)`` (the between-subject spread) and ``e_i ~ N(0, v_i)`` is fitted by the moment estimator of
DerSimonian & Laird (1986)::

    w_i = 1 / v_i,   Q = Σ w_i (y_i − ȳ_w)²,   tau² = max(0, (Q − (k − 1)) / (Σ w_i − Σ w_i² / Σ w_i))
    w*_i = 1 / (v_i + tau²),   mu = Σ w*_i y_i / Σ w*_i,   se(mu) = 1 / √(Σ w*_i)

with the normal interval ``mu ± z_{0.975} se`` and Higgins & Thompson's ``I² = max(0, (Q − (k − 1)) / Q)``.

References
----------
DerSimonian R., Laird N. (1986), "Meta-analysis in clinical trials", Controlled Clinical Trials 7:177–188.
Higgins J. P. T., Thompson S. G. (2002), "Quantifying heterogeneity in a meta-analysis", Stat. Med. 21:1539–1558.
Kendall M. G., Babington Smith B. (1939), "The problem of m rankings", Ann. Math. Statist. 10:275–287.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ...sysid import InvalidParameterError
from ...sysid._lazy import lazy_module

stats = lazy_module("scipy.stats")  # imported at its first use (sysid/_lazy.py)

__all__ = ["RandomEffects", "random_effects", "margin_verdict", "kendall_w"]


@dataclass(frozen=True)
class RandomEffects:
    """A DerSimonian–Laird pooled estimate.

    Attributes
    ----------
    estimate, se, ci_low, ci_high : float
        Pooled mean, its standard error and the normal interval at ``level``.
    tau2, tau : float
        Between-subject variance and spread (same unit as the effects).
    q, i2 : float
        Cochran's Q and the share of the variation due to between-subject spread (0 … 1).
    n : int
        Number of subjects pooled.
    weights : ndarray, shape (n,)
        Random-effects weights ``1 / (v_i + tau²)``, normalised to sum to 1.
    level : float
    """

    estimate: float
    se: float
    ci_low: float
    ci_high: float
    tau2: float
    tau: float
    q: float
    i2: float
    n: int
    weights: np.ndarray
    level: float

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in ("estimate", "se", "ci_low", "ci_high", "tau2", "tau", "q", "i2", "n",
                                           "level")}
        return {k: (float(v) if k != "n" else int(v)) for k, v in d.items()}


def random_effects(effects, variances, *, level: float = 0.95) -> RandomEffects:
    """Pool per-subject effects by the DerSimonian–Laird random-effects model (module docstring).

    Parameters
    ----------
    effects : array_like, shape (k,)
    variances : array_like, shape (k,)
        Within-subject variance of each effect (squared standard error), > 0.
    level : float, default 0.95

    Returns
    -------
    RandomEffects

    Raises
    ------
    InvalidParameterError
        Fewer than two subjects, lengths that differ, non-finite values or a variance <= 0.

    Examples
    --------
    >>> r = random_effects([0.1, 0.3], [0.01, 0.01])
    >>> round(r.estimate, 6), round(r.tau2, 6)   # Q = 2, k - 1 = 1: tau² = (2 - 1) / (200 - 100)
    (0.2, 0.01)
    """
    y = np.asarray(effects, dtype=np.float64).reshape(-1)
    v = np.asarray(variances, dtype=np.float64).reshape(-1)
    if y.size != v.size or y.size < 2:
        raise InvalidParameterError(f"random_effects needs at least two effects with one variance each; got "
                                    f"{y.size} effects and {v.size} variances.")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(v))) or np.any(v <= 0):
        raise InvalidParameterError(f"random_effects needs finite effects and variances > 0; got effects {y.tolist()}"
                                    f" and variances {v.tolist()}.")
    w = 1.0 / v
    fixed = float(np.sum(w * y) / np.sum(w))
    q = float(np.sum(w * (y - fixed) ** 2))
    df = y.size - 1
    tau2 = max(0.0, (q - df) / float(np.sum(w) - np.sum(w ** 2) / np.sum(w)))
    ws = 1.0 / (v + tau2)
    mu = float(np.sum(ws * y) / np.sum(ws))
    se = float(1.0 / math.sqrt(np.sum(ws)))
    z = float(stats.norm.ppf(0.5 + level / 2.0))
    i2 = max(0.0, (q - df) / q) if q > 0 else 0.0
    return RandomEffects(estimate=mu, se=se, ci_low=mu - z * se, ci_high=mu + z * se, tau2=tau2,
                         tau=math.sqrt(tau2), q=q, i2=i2, n=int(y.size), weights=ws / ws.sum(), level=float(level))


def margin_verdict(low: float, high: float, margin: float, positive: str, negative: str) -> str:
    """The verdict of an interval of a difference against the practical margin ``±margin``.

    Returns ``positive`` (interval above +margin), ``negative`` (below −margin), ``"equivalent"`` (inside the
    margin on both sides), ``"small"`` (excludes zero but does not clear the margin) or ``"undecided"`` (contains
    zero and reaches beyond the margin).

    Examples
    --------
    >>> margin_verdict(0.01, 0.03, 0.001, "direct", "indirect"), margin_verdict(-5e-4, 5e-4, 0.001, "d", "i")
    ('direct', 'equivalent')
    """
    if not (math.isfinite(low) and math.isfinite(high)):
        return "undecided"
    if low > margin:
        return positive
    if high < -margin:
        return negative
    if -margin < low and high < margin:
        return "equivalent"
    if low > 0 or high < 0:
        return "small"
    return "undecided"


def kendall_w(scores) -> float:
    """Kendall's coefficient of concordance of m subjects ranking n sites (no ties correction).

    Parameters
    ----------
    scores : array_like, shape (m_subjects, n_sites)
        Any per-site figure; each row is ranked on its own.

    Returns
    -------
    float
        ``W = 12 S / (m² (n³ − n))`` with ``S`` the sum of squared deviations of the site rank sums from their
        mean: 1 when every subject ranks the sites alike, near 0 when the rankings are unrelated
        (Kendall & Babington Smith 1939).

    Examples
    --------
    >>> kendall_w([[1.0, 2.0, 3.0], [10.0, 20.0, 30.0]])
    1.0
    """
    a = np.asarray(scores, dtype=np.float64)
    if a.ndim != 2 or a.shape[0] < 2 or a.shape[1] < 2:
        raise InvalidParameterError(f"kendall_w needs at least two subjects ranking at least two sites; got shape "
                                    f"{a.shape}.")
    m, n = a.shape
    ranks = np.apply_along_axis(stats.rankdata, 1, a)
    s = float(np.sum((ranks.sum(axis=0) - m * (n + 1) / 2.0) ** 2))
    return 12.0 * s / (m ** 2 * (n ** 3 - n))
