"""Output offsets: the training mean of the outputs, and a view of a session with it removed.

Models without a constant term (subspace identification, the direct predictors) are fitted on the outputs minus
their training mean when asked to (``centre_outputs=True``); they keep the mean and add it back to their
predictions.
"""

from __future__ import annotations

import numpy as np

from ._views import SourceView
from .exceptions import SessionError
from .quality import output_moments


def output_mean(source) -> np.ndarray:
    """Mean of each output over the valid in-trial samples (one streaming pass)."""
    n, mean, _ms = output_moments(source)
    if n == 0:
        raise SessionError("the session has no valid in-trial samples; check its mask and trials.")
    return mean


class ShiftedOutputs(SourceView):
    """A view of a session (or lazily opened file) whose outputs have ``offset`` subtracted on every read."""

    def __init__(self, source, offset: np.ndarray):
        super().__init__(source)
        self._offset = offset

    def read(self, start: int, stop: int):
        u, y, mask = self._src.read(start, stop)
        return u, np.asarray(y, dtype=np.float64) - self._offset, mask
