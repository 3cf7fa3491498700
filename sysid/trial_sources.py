"""Recordings as sources for fitting: opening one (lazily when it is our HDF5 layout), the seeded split of its
trials, and lazy views of a subset of its trials.
"""

from __future__ import annotations

import contextlib
import inspect

import numpy as np

from ._views import SourceView
from .exceptions import SessionError
from .session import TrialSplit

__all__ = ["open_session_source"]


# ------------------------------------------------------------------------------------------------ trial subsets
class _TrialSubset(SourceView):
    """A lazy view of some trials of a session file: same sample grid, only those trials' segments."""

    def __init__(self, source, indices):
        super().__init__(source)
        if "out" not in inspect.signature(source.read).parameters:
            self.read = source.read  # the source's own signature, so readers see that it takes no buffers
        self.trials = np.asarray(source.trials)[list(indices)]

    @property
    def n_trials(self) -> int:
        return int(self.trials.shape[0])

    def segments(self, min_length: int = 1):
        starts, stops = self.trials[:, 0], self.trials[:, 1]
        out = []
        for a, b in self._src.segments(min_length):
            i = int(np.searchsorted(starts, a, side="right") - 1)
            if i >= 0 and b <= stops[i]:
                out.append((a, b))
        return out

    def read(self, start: int, stop: int, *, out=None):
        """The source's window; ``out`` (buffers to read into) is passed on, so a streaming fit of a trial subset
        reads as fast as one of the whole file. Offered only when the source's own ``read`` takes it."""
        return self._src.read(start, stop) if out is None else self._src.read(start, stop, out=out)


def _split(source, n_test, test_fraction, seed) -> TrialSplit:
    """The seeded trial split; identical to :meth:`Session.split` (which it calls for a Session)."""
    if hasattr(source, "split"):
        return source.split(n_test, test_fraction=test_fraction, seed=seed)
    n = int(np.asarray(source.trials).shape[0])
    n_test = max(1, int(round(test_fraction * n))) if n_test is None else int(n_test)
    if n < 2 or not 1 <= n_test <= n - 1:
        raise SessionError(
            f"a held-out split needs at least 2 trials and 1 <= n_test <= n_trials - 1; this session has {n} "
            f"trial(s) and n_test={n_test}. Record more trials or split the recording into trials."
        )
    perm = np.random.default_rng(seed).permutation(n)
    return TrialSplit(train=tuple(sorted(int(i) for i in perm[n_test:])),
                      test=tuple(sorted(int(i) for i in perm[:n_test])), seed=int(seed))


def _subsets(source, split: TrialSplit, streaming: bool):
    if hasattr(source, "select_trials"):
        return source.select_trials(split.train), source.select_trials(split.test)
    if streaming:
        return _TrialSubset(source, split.train), _TrialSubset(source, split.test)
    whole = source.to_session()
    return whole.select_trials(split.train), whole.select_trials(split.test)


@contextlib.contextmanager
def open_session_source(path):
    """Yield the recording at ``path`` for fitting: lazily opened when it is our HDF5 layout or NWB, else loaded whole.

    A lazily opened file lets streaming estimators (ridge ARX, subspace) fit recordings larger than memory.
    """
    from .io import detect_format, load_session, open_session_file

    kind = detect_format(path)
    if kind == "hdf5":
        with open_session_file(path) as f:
            yield f
    elif kind == "nwb":  # read window by window too (stimsteer.sysid.io.nwb_lazy)
        from .io.nwb_lazy import open_nwb_session
        with open_nwb_session(path) as f:
            yield f
    else:
        yield load_session(path)
