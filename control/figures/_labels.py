"""End labels of traces moved apart just enough to be read, each as close to its trace's end as it can be.

Labels at the ends of several traces collide where the traces end close together. Given the traces' end values
``y`` and the least vertical distance ``gap`` two labels need, :func:`spread` returns label positions with
neighbours at least ``gap`` apart (in the traces' order of ``y``) and the least sum of squared moves. Sorted, the
problem is an isotonic regression: with ``z_i = y_(i) - i·gap`` the positions are ``w_i + i·gap`` for the
non-decreasing ``w`` nearest to ``z`` in least squares, which the pool-adjacent-violators algorithm finds exactly
(Barlow, Bartholomew, Bremner & Brunk 1972, "Statistical inference under order restrictions", Wiley, ch. 1).
"""

from __future__ import annotations

import numpy as np

__all__ = ["spread", "label_gap"]


def _nondecreasing(z: np.ndarray) -> np.ndarray:
    """The non-decreasing sequence nearest to ``z`` in least squares (pool adjacent violators, equal weights)."""
    means, sizes = [], []
    for value in z:
        means.append(float(value))
        sizes.append(1)
        while len(means) > 1 and means[-2] > means[-1]:  # pool the last two blocks while they violate the order
            n = sizes[-2] + sizes[-1]
            means[-2] = (means[-2] * sizes[-2] + means[-1] * sizes[-1]) / n
            sizes[-2] = n
            means.pop()
            sizes.pop()
    return np.repeat(means, sizes)


def spread(y, gap: float, lo: float = -np.inf, hi: float = np.inf) -> np.ndarray:
    """Label positions for traces ending at ``y``: neighbours at least ``gap`` apart, moved as little as possible.

    Parameters
    ----------
    y : array_like, shape (n,)
        Where each trace ends (data units).
    gap : float
        Least distance between neighbouring labels (data units, >= 0).
    lo, hi : float, optional
        The labels' room: the whole stack is shifted inside it when it fits (it keeps its order and gaps).

    Returns
    -------
    ndarray, shape (n,)
        The label position of each trace, in the order of ``y``.
    """
    y = np.asarray(y, dtype=float)
    order = np.argsort(y, kind="stable")
    steps = gap * np.arange(y.size)
    placed = _nondecreasing(y[order] - steps) + steps
    if placed.size and placed[-1] - placed[0] <= hi - lo:
        placed += max(lo - placed[0], 0.0) - max(placed[-1] - hi, 0.0)
    out = np.empty_like(placed)
    out[order] = placed
    return out


def label_gap(ax, points: float) -> float:
    """``points`` of the axes' height in its data units (from its current position and y limits)."""
    height_points = ax.get_position().height * ax.figure.get_figheight() * 72.0
    bottom, top = ax.get_ylim()
    return abs(top - bottom) * points / max(height_points, 1e-9)
