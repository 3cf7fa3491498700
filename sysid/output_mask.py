"""The output mask of a session source: which outputs may be fitted as targets and scored.

``Session.output_mask`` (and the optional ``/outputs_valid`` of our HDF5 layout) marks outputs hidden by a
stimulation artifact while the inputs of those samples stay valid. Every fit and score asks here, in one place,
which of its windows it may use.
"""

from __future__ import annotations

import numpy as np

__all__ = ["output_valid", "output_valid_segments", "blanking_note"]


def output_valid(source, start: int, stop: int) -> np.ndarray:
    """Where the outputs of samples ``[start, stop)`` may be scored or fitted as targets (bool, shape (stop-start,)).

    ``source`` is a :class:`Session`, a lazily opened session file or a view of either (their ``output_mask``); a
    source without one has every output valid.
    """
    om = getattr(source, "output_mask", None)  # minimal sources (read/segments only) carry no output mask
    if om is None:
        return np.ones(int(stop) - int(start), dtype=bool)
    return np.asarray(om[int(start):int(stop)], dtype=bool)


def output_valid_segments(source, segments, width: int, first_target: int) -> list[tuple[int, int]]:
    """The parts of ``segments`` whose windows of ``width`` samples all have valid outputs where they predict.

    A window starting at sample ``t`` (a regression row or Hankel column over ``[t, t + width)``) predicts the
    outputs of ``[t + first_target, t + width)``; it is kept only when none of those is blanked in the source's
    output mask. Inputs and the past part of the window may fall on blanked samples (the inputs there are valid).
    Each returned range holds only kept windows and is at least ``width`` long, so the callers' builders (which
    take every window of each range) need no change; ranges of one segment may overlap in samples, never in
    windows.

    Parameters
    ----------
    source : Session, session file or view
    segments : sequence of (int, int)
        Valid segments (``source.segments(...)``).
    width : int
        Samples per window (``n_lags + 1`` for a regression row, ``past + future`` for a Hankel column).
    first_target : int
        Offset in the window of its first predicted sample.

    Returns
    -------
    list of (int, int)
    """
    width, first_target = int(width), int(first_target)
    if getattr(source, "output_mask", None) is None or bool(np.all(source.output_mask)):
        return [(int(a), int(b)) for a, b in segments]
    out = []
    for a, b in segments:
        a, b = int(a), int(b)
        if b - a < width:
            continue
        bad = np.concatenate(([0], np.cumsum(~output_valid(source, a, b), dtype=np.int64)))
        starts = np.arange(b - a - width + 1)
        ok = (bad[starts + width] - bad[starts + first_target]) == 0
        edges = np.flatnonzero(np.diff(np.concatenate(([0], ok.astype(np.int8), [0]))))
        out.extend((a + int(s), a + int(e) - 1 + width) for s, e in zip(edges[::2], edges[1::2]))
    return out


def blanking_note(source, segments, width: int, first_target: int) -> str:
    """The sentence an error about too few windows adds when output blanking removed windows ('' otherwise).

    It counts the windows of ``width`` samples in ``segments`` and those :func:`output_valid_segments` keeps, and
    says what to do: blanking removes every window with a blanked output among its predicted samples (its last
    ``width - first_target``), so pulses closer together than that leave none.
    """
    width, first_target = int(width), int(first_target)
    if getattr(source, "output_mask", None) is None or bool(np.all(source.output_mask)):
        return ""
    total = sum(max(0, int(b) - int(a) - width + 1) for a, b in segments)
    kept = sum(int(b) - int(a) - width + 1 for a, b in output_valid_segments(source, segments, width, first_target))
    return (f" Output blanking removed {total - kept} of the {total} windows of {width} samples (a window is dropped "
            f"when one of its {width - first_target} predicted outputs is blanked, so blanks closer together than "
            "that leave none). Blank a shorter time (--blank-outputs-ms), remove the artifact instead "
            "([artifacts] method = \"template\" or \"interpolate\"), predict fewer samples per window (a shorter "
            "future or horizon), or use the ARX route (--method arx), which drops only the rows whose own output is "
            "blanked.")
