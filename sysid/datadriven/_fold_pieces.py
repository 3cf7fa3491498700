"""Which samples go to which held-out fold: the valid segments of a session cut into ``(a, b, fold)`` pieces, by
whole trials (seeded) or, where one trial has windows, by contiguous blocks of time (split from
:mod:`stimsteer.sysid.datadriven.base`)."""

from __future__ import annotations

import numpy as np

from ..output_mask import output_valid_segments

__all__: list = []


def _pieces(session, L, n_folds_wanted, seed, past):
    """``(a, b, fold)`` sample ranges of the valid segments, the number of folds and the scheme."""
    segs = output_valid_segments(session, session.segments(L), L, past)  # columns predicting blanked outputs out
    if n_folds_wanted > 1:
        return _fold_of_segments(session, segs, n_folds_wanted, seed, L)
    return [(a, b, 0) for a, b in segs], 1, "none"


def _fold_of_segments(session, segs, n_splits: int, seed: int, L: int):
    """Fold id per (piece of) segment: whole trials, seeded; contiguous blocks when one trial has windows."""
    starts = np.asarray(session.trials)[:, 0]
    trial_of = [int(np.searchsorted(starts, a, side="right") - 1) for a, _ in segs]
    used = sorted(set(trial_of))
    if len(used) >= 2:
        k = min(n_splits, len(used))
        perm = np.random.default_rng(seed).permutation(len(used))
        fold_of_trial = {used[j]: int(i % k) for i, j in enumerate(perm)}
        return [(a, b, fold_of_trial[t]) for (a, b), t in zip(segs, trial_of)], k, "trials"
    pieces = _time_blocks(segs, n_splits, L)
    present = {f: i for i, f in enumerate(sorted({f for *_, f in pieces}))}  # fold ids 0 .. k-1, none empty
    pieces, k = [(a, b, present[f]) for a, b, f in pieces], len(present)
    return pieces, k, "contiguous blocks (one trial)"


def _time_blocks(segs, n_splits: int, L: int) -> list:
    """``(a, b, fold)``: one trial's valid pieces, laid end to end in time order, cut into ``n_splits`` contiguous
    blocks of (nearly) equal numbers of samples. A piece inside one block stays whole (blanking cuts a trial into
    many short pieces: cutting each of them into ``n_splits`` would leave none ``L`` long); a piece that crosses a
    block edge is cut there, so no sample of it serves two folds, and parts shorter than ``L`` are dropped. One
    piece is cut exactly as before (``linspace(a, b)`` rounded)."""
    a0 = int(segs[0][0])
    edges = np.linspace(a0, a0 + sum(b - a for a, b in segs), n_splits + 1).round().astype(np.int64) - a0
    pieces, first = [], 0
    for a, b in segs:
        n = b - a
        for f in range(n_splits):
            lo, hi = a + max(0, int(edges[f]) - first), a + min(n, int(edges[f + 1]) - first)
            if hi - lo >= L:
                pieces.append((int(lo), int(hi), f))
        first += n
    return pieces
