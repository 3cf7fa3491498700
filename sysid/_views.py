"""The shared base of lazy views of a session source (a trial subset, outputs less an offset)."""

from __future__ import annotations

__all__ = ["SourceView"]

#: What a view takes over from its source unchanged (the sample grid and the channels).
_SHARED = ("trials", "n_samples", "n_inputs", "n_outputs", "sample_rate_hz", "input_names", "output_names",
           "input_units", "output_units", "output_mask")


class SourceView:
    """A view of a session or a lazily opened session file: the source's grid and channels, its reads passed on.

    Subclasses change what the view shows (fewer trials, shifted outputs) by overriding ``segments`` or ``read``;
    the source itself is never modified.
    """

    def __init__(self, source):
        self._src = source
        for attr in _SHARED:
            if hasattr(source, attr):
                setattr(self, attr, getattr(source, attr))

    def segments(self, min_length: int = 1):
        return self._src.segments(min_length)

    def read(self, start: int, stop: int):
        return self._src.read(start, stop)
