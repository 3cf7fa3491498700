"""Intervals over repeated splits: the mean with its Student-t interval, and the verdict on a paired difference.

Every figure of the benchmark is a mean over its seeded splits with a 95 % Student-t interval
``mean ± t_{0.975, n−1} · s / √n``; route differences are paired by split, and a route is called better only when
the interval of the paired difference excludes zero **and** the mean difference is at least a practical margin:
below :data:`ABSOLUTE_MARGIN` for R² (0.1 point for VAF in percent), or below :data:`RELATIVE_MARGIN` of the
reference value for every other metric (times, tracking error, energy), the routes are reported as ``"equivalent"`` (issue 13: a difference
of R² 3e-15 was called a win because its interval excluded zero).
"""

from __future__ import annotations

import functools
import math

import numpy as np

from scipy.special import stdtrit

__all__ = ["t_interval", "paired_verdict", "ABSOLUTE_MARGIN", "RELATIVE_MARGIN", "MIN_SPLITS_TO_TELL",
           "practical_margin", "reading_verdict"]

#: Differences of a fraction (R²) smaller than this are of no practical consequence (our own margin: a thousandth
#: of the output variance; in VAF percent it is 0.1 point).
ABSOLUTE_MARGIN = 1e-3
#: ... nor are differences smaller than this share of the reference value (any metric, e.g. seconds, µA²).
RELATIVE_MARGIN = 0.01
#: Below this many splits the report says "too few splits to tell" instead of naming a better route: with 3 splits a
#: t-interval rests on a standard deviation of 3 numbers (2 degrees of freedom, t = 4.30), and issue 18 found a
#: ΔR² of 0.009 on 3 splits called "better". Our own threshold (4 degrees of freedom, t = 2.78), no source.
MIN_SPLITS_TO_TELL = 5


def practical_margin(metric: str, reference: float) -> float:
    """The margin below which a mean difference of ``metric`` is reported as equivalent.

    :data:`ABSOLUTE_MARGIN` for R² (names starting ``r2``), 100 × it for VAF in percent (``vaf``), and
    :data:`RELATIVE_MARGIN` of ``|reference|`` for every other metric.
    """
    if metric.startswith("r2"):
        return ABSOLUTE_MARGIN
    if metric.startswith("vaf"):
        return 100 * ABSOLUTE_MARGIN
    return RELATIVE_MARGIN * abs(float(reference)) if np.isfinite(reference) else 0.0


def t_interval(values, level: float = 0.95) -> tuple[float, float, float]:
    """Mean and Student-t confidence interval of repeated measurements.

    Parameters
    ----------
    values : array_like, shape (n,)
        One number per split; NaNs are dropped.
    level : float, default 0.95

    Returns
    -------
    mean, low, high : float
        ``mean ± t_{(1+level)/2, n−1} · s / √n`` with the sample standard deviation ``s`` (ddof = 1); the bounds
        are NaN for fewer than two values.

    Examples
    --------
    >>> m, lo, hi = t_interval([1.0, 2.0, 3.0])
    >>> m, round(hi - m, 4)  # t_{0.975, 2} = 4.3027 times 1 / sqrt(3)
    (2.0, 2.4841)
    """
    v = np.asarray(values, dtype=np.float64).reshape(-1)
    v = v[np.isfinite(v)]
    n = v.size
    if n == 0:
        return math.nan, math.nan, math.nan
    # the operations of NumPy's ``mean`` and ``std(ddof=1)`` (numpy/_core/_methods.py), the same numbers bit for
    # bit, without their dispatch: the benchmark asks for some 1,500 intervals
    total = _SUM(v)
    mean = float(total / n)
    if n < 2:
        return mean, math.nan, math.nan
    d = v - total / n
    std = np.sqrt(_SUM(np.multiply(d, d, out=d)) / (n - 1))
    half = float(_t_quantile(0.5 + level / 2.0, n - 1) * std / math.sqrt(n))
    return mean, mean - half, mean + half


_SUM = np.add.reduce


@functools.lru_cache(maxsize=None)
def _t_quantile(q: float, dof: int) -> float:
    """Student-t quantile, computed once per (q, dof): the benchmark asks for the same few hundreds of times.

    ``scipy.special.stdtrit`` is the function ``scipy.stats.t.ppf`` calls for it (same value, bit for bit; tested):
    importing ``scipy.stats`` for it cost the benchmark about 1 s of CPU, ``scipy.special`` 0.08 s.
    """
    return float(stdtrit(dof, q))


def paired_verdict(differences, higher_is_better: bool, margin: float = 0.0) -> tuple[float, float, float, str]:
    """The t-interval of paired differences ``direct − indirect`` and which route it favours.

    Parameters
    ----------
    differences : array_like, shape (n_splits,)
        Direct minus indirect, one value per split (NaNs dropped).
    higher_is_better : bool
        Whether a larger value of the metric is better.
    margin : float, default 0
        Practical margin (:func:`practical_margin`): a mean difference smaller in magnitude is ``"equivalent"``.

    Returns
    -------
    mean, low, high : float
        As :func:`t_interval`.
    better : {"direct", "indirect", "equivalent", "neither"}
        ``equivalent`` when ``|mean| < margin``; else ``neither`` when the interval contains zero or cannot be
        formed (fewer than two splits).

    Examples
    --------
    >>> paired_verdict([0.1, 0.2, 0.15], higher_is_better=True)[3]
    'direct'
    >>> paired_verdict([3e-15, 3.1e-15, 2.9e-15], higher_is_better=True, margin=1e-3)[3]
    'equivalent'
    """
    mean, lo, hi = t_interval(differences)
    if np.isfinite(mean) and abs(mean) < float(margin):
        better = "equivalent"
    elif not (np.isfinite(lo) and np.isfinite(hi)) or lo <= 0 <= hi:
        better = "neither"
    else:
        better = "direct" if (mean > 0) == higher_is_better else "indirect"
    return mean, lo, hi, better


def reading_verdict(better: str, n_splits: int) -> str:
    """What the report says of a paired comparison: the verdict of :func:`paired_verdict` in words, or
    ``"too few splits to tell"`` below :data:`MIN_SPLITS_TO_TELL` splits (whatever the interval says).

    Examples
    --------
    >>> reading_verdict("direct", 3)
    'too few splits to tell'
    >>> reading_verdict("direct", 5), reading_verdict("equivalent", 8)
    ('direct route better', 'equivalent (within the margin)')
    """
    if int(n_splits) < MIN_SPLITS_TO_TELL:
        return "too few splits to tell"
    return {"direct": "direct route better", "indirect": "indirect route better",
            "equivalent": "equivalent (within the margin)",
            "neither": "no difference shown (the interval contains 0)"}.get(str(better), str(better))
