"""The data pass of subspace identification: the block layout of the Hankel rows and the one streamed Gram matrix
of the multi-trial block-Hankel matrix, with the held-out partition of its columns.
"""

from __future__ import annotations

import numpy as np

from .._lagged import _lagged_diagonal, _lagged_gram, _stream_sums
from ..output_mask import output_valid_segments


# ----------------------------------------------------------------------------------------------------- layout
_STREAM_ROWS = 16384  # rows per chunk of the Hankel Gram's data pass


class _Layout:
    """Row indices of the blocks of one Hankel column ``vec([u y]_{t-i..t+f-1})`` (time-major, as every stacked window in stimsteer)."""

    def __init__(self, past: int, future: int, m: int, p: int):
        self.i, self.f, self.m, self.p = past, future, m, p
        self.c = m + p
        self.width = past + future
        self.nz = self.width * self.c
        self.Up = self._idx(0, past, 0, m)
        self.Yp = self._idx(0, past, m, self.c)
        self.Uf = self._idx(past, self.width, 0, m)
        self.Yf = self._idx(past, self.width, m, self.c)
        self.P = np.concatenate([self.Up, self.Yp])
        # one step later: the past grows by the first future block, the future loses it
        self.P1 = np.concatenate([self._idx(0, past + 1, 0, m), self._idx(0, past + 1, m, self.c)])
        self.Uf1 = self._idx(past + 1, self.width, 0, m)
        self.Yf1 = self._idx(past + 1, self.width, m, self.c)
        self.u0 = self._idx(past, past + 1, 0, m)
        self.y0 = self._idx(past, past + 1, m, self.c)

    def _idx(self, t0, t1, ch0, ch1):
        return np.array([t * self.c + ch for t in range(t0, t1) for ch in range(ch0, ch1)], dtype=np.intp)

    def select(self, rows) -> np.ndarray:
        """The selection matrix ``E`` with ``E @ z = z[rows]``, shape (len(rows), nz)."""
        E = np.zeros((len(rows), self.nz))
        E[np.arange(len(rows)), rows] = 1.0
        return E

    def factor_order(self) -> np.ndarray:
        """The block order ``[Uf₁; u₀; Up; Yp; y₀; Yf₁]`` of the factor route, as time-major Hankel rows.

        ``Uf = [Uf₁; u₀]`` leads, then the past (in the order of ``P``), then ``Yf = [y₀; Yf₁]``: every conditional
        covariance of the projection (given ``Uf``) and of the one a step later (past ``[u₀; P; y₀]`` given
        ``Uf₁``) is then a product of contiguous blocks of one Cholesky factor (:mod:`.factor`).
        """
        return np.concatenate([self.Uf1, self.u0, self.P, self.y0, self.Yf1])

    @property
    def max_order(self) -> int:
        # shift invariance needs p (f − 1) >= n; a state read from i past outputs needs p i >= n
        return min(self.p * (self.f - 1), self.p * self.i)


# ----------------------------------------------------------------------------------------------------- data pass
def _hankel_sums(source, parts, layout: _Layout):
    """One pass over the data: the compact lag sums (:class:`~stimsteer.sysid._lagged._LagSums`) of the Hankel
    columns inside each list of segments in ``parts`` (e.g. the fitting and the held-out part), in that order.

    The column of window ``t`` holds the samples ``t … t + w − 1``: the lagged vector ``[Z_k; …; Z_{k−w+1}]`` of
    ``k = t + w − 1`` in reversed time order and with the channels as ``[u y]`` instead of ``[y u]``. Its Gram is
    therefore the lagged-sum stream's (:mod:`._lagged`: ``w`` products of ``(n × c)`` chunks per chunk instead of
    one product of ``(n × w c)`` columns), permuted. Memory stays bounded by a few chunks.
    """
    w, c = layout.width, layout.c
    lag = w - 1
    # the output-mask hook: columns whose future (predicted) outputs are blanked are left out
    pieces = [(int(a) + lag, int(b), k) for k, segments in enumerate(parts)
              for a, b in output_valid_segments(source, segments, w, layout.i)]
    folds, _lo, _hi = _stream_sums(source, pieces, len(parts), lag, _STREAM_ROWS, np.zeros(c))
    return folds


def _lagged_index(layout: _Layout, order: np.ndarray | None = None) -> np.ndarray:
    """``index[a, i]``: the row of lagged entry ``(lag a, channel i of [y u])`` in the Hankel Gram, in time-major
    Hankel order or, given ``order`` (Hankel rows, e.g. :meth:`_Layout.factor_order`), in that order."""
    w, c, p = layout.width, layout.c, layout.p
    lag = w - 1
    # Hankel row (τ, channel in [u y] order) <- lagged row (lag w − 1 − τ, channel in [y u] order)
    in_z = np.concatenate([np.arange(p, c), np.arange(p)])  # [u y] channel j sits at in_z[j] of [y u]
    perm = np.array([(lag - tau) * c + in_z[j] for tau in range(w) for j in range(c)], dtype=np.intp)
    index = np.empty_like(perm)
    index[perm] = np.arange(perm.size)  # lagged row -> Hankel row
    if order is not None:
        position = np.empty_like(order)
        position[order] = np.arange(order.size)  # Hankel row -> its place in ``order``
        index = position[index]
    return index.reshape(w, c)


def _gram_from_sums(acc, layout: _Layout, order: np.ndarray | None = None, rows: tuple | None = None,
                    out: np.ndarray | None = None):
    """The Hankel Gram ``Σ_t z_t z_tᵀ`` of one set of lag sums, symmetric, with its rows in time-major Hankel
    order or, given ``order`` (Hankel rows, e.g. :meth:`_Layout.factor_order`), in that order. Assembled in place:
    no second Gram-sized copy. With ``rows = (r0, r1)`` only those rows (the same numbers); with ``out`` (a flat
    float64 buffer) written into its front and returned as a C-ordered view of it: a buffer already touched is
    reused instead of a fresh Gram-sized array, whose first touch costs page faults.

    Symmetric as ``(W + Wᵀ) / 2`` of the assembled ``W`` would be, bit for bit, without that pass over the Gram:
    the blocks of different lags are written as exact transposes, and the same-lag blocks are averaged with their
    transposes before they are written (``average_same_lag``; IEEE addition commutes).
    """
    return _lagged_gram(acc, _lagged_index(layout, order), rows=rows, average_same_lag=True, out=out)


def _gram_diagonal(acc, layout: _Layout) -> np.ndarray:
    """The diagonal of the time-major Hankel Gram, from the lag sums alone."""
    out = np.empty(layout.nz)
    out[_lagged_index(layout).reshape(-1)] = _lagged_diagonal(acc)
    return out


def _hankel_gram(source, segments, layout: _Layout):
    """Gram matrix ``Σ_t z_t z_tᵀ`` of the Hankel columns inside ``segments`` and the number of columns
    (:func:`_hankel_sums` then :func:`_gram_from_sums`)."""
    (acc,) = _hankel_sums(source, [segments], layout)
    if acc.n == 0:
        return np.zeros((layout.nz, layout.nz)), 0
    return _gram_from_sums(acc, layout), int(acc.n)


def _partition(session, width: int, fraction: float, seed: int):
    """Split the usable segments into fitting and held-out checking parts.

    With two or more trials holding usable segments, whole trials are held out (seeded). With one such trial the
    last ``fraction`` of each segment is held out as one contiguous stretch; no column crosses the cut.
    """
    segs = session.segments(min_length=width)
    trials = np.asarray(session.trials)
    owner = [int(np.searchsorted(trials[:, 0], a, side="right") - 1) for a, _ in segs]
    usable = sorted(set(owner))
    if len(usable) >= 2:
        n_check = min(len(usable) - 1, max(1, int(round(fraction * len(usable)))))
        rng = np.random.default_rng(seed)
        check_trials = {usable[k] for k in rng.permutation(len(usable))[:n_check]}
        fit = [s for s, o in zip(segs, owner) if o not in check_trials]
        check = [s for s, o in zip(segs, owner) if o in check_trials]
        return fit, check, f"held-out trials {sorted(check_trials)}"
    fit, check = [], []
    for a, b in segs:
        cut = b - int(round(fraction * (b - a)))
        if cut - a >= width and b - cut >= width:
            fit.append((a, cut))
            check.append((cut, b))
        else:
            fit.append((a, b))
    return fit, check, f"held-out last {fraction:g} of each segment (single trial)"
