"""Recordings through Neo (the ``neo`` extra): blocks and segments of the acquisition formats Neo reads.

One segment of a Neo ``Block`` becomes a :class:`~stimsteer.sysid.io._recording.Recording`: each column of each
``AnalogSignal`` is a channel (its name from the signal's ``channel_names`` array annotation, else
``<signal name>_<column>``), with the signal's own rate and start time, values in the signal's units as Neo holds
them (converted by ``quantities``, never by string matching); ``Event`` objects give events (time, label),
``Epoch`` objects give events with a duration, and ``SpikeTrain`` objects give spike times per unit (for binned
rates). A file is opened with the Neo IO the caller names (``io="BlackrockIO"``), or the one Neo picks for it
(``neo.io.get_io``); MATLAB files written by ``NeoMatlabIO`` are also recognised by content.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..exceptions import FileFormatError, SessionError
from ._recording import Channel, Recording

__all__ = ["recording_from_neo", "read_neo_file"]

_HINT = 'install the optional Neo support with: pip install "stimsteer[neo]"'


def _import_neo(what: str):
    try:
        import neo
        import quantities
    except ImportError:
        raise FileFormatError(f"cannot read {what}: it needs the optional packages neo and quantities, which are "
                              f"not installed; {_HINT}") from None
    return neo, quantities


def _seconds(q, pq, what: str) -> np.ndarray:
    try:
        # atleast_1d: a MATLAB round trip squeezes one-element arrays to scalars
        return np.atleast_1d(np.asarray(q.rescale(pq.s).magnitude, dtype=np.float64))
    except ValueError as exc:
        raise SessionError(f"{what} cannot be converted to seconds ({exc}).") from None


def _signal_channels(sig, pq) -> list[Channel]:
    try:
        rate = float(sig.sampling_rate.rescale(pq.Hz).magnitude)
    except ValueError as exc:
        raise SessionError(f"the sampling rate of signal '{sig.name}' cannot be converted to Hz ({exc}).") from None
    t0 = float(_seconds(sig.t_start, pq, f"the start time of signal '{sig.name}'")[0])
    data = np.asarray(sig.magnitude, dtype=np.float64).reshape(sig.shape[0], -1)
    unit = sig.units.dimensionality.string
    names = sig.array_annotations.get("channel_names") if sig.array_annotations else None
    base = str(sig.name) if sig.name else "signal"
    if names is None or len(names) != data.shape[1]:
        names = [base] if data.shape[1] == 1 else [f"{base}_{j}" for j in range(data.shape[1])]
    return [Channel(name=str(n), data=data[:, j].copy(), unit=unit, sample_rate_hz=rate, start_time_s=t0,
                    kind="AnalogSignal") for j, n in enumerate(names)]


def recording_from_neo(block, *, segment: int = 0, source: str = "neo.Block") -> Recording:
    """A :class:`Recording` from one segment of a Neo ``Block`` (or a ``Segment`` itself).

    Raises
    ------
    SessionError
        The block has no such segment, the segment has no analog signal, channel names repeat, or a time or rate
        cannot be converted to seconds / Hz.
    """
    neo, pq = _import_neo("a Neo block")
    if isinstance(block, neo.Block):
        if not 0 <= segment < len(block.segments):
            raise SessionError(f"the Neo block has {len(block.segments)} segment(s); segment {segment} does not "
                               "exist. Choose one with [recording] segment in the description.")
        seg = block.segments[segment]
    elif isinstance(block, neo.Segment):
        seg = block
    else:
        raise SessionError(f"recording_from_neo needs a neo.Block or neo.Segment; got {type(block).__name__}.")
    chans = [c for sig in seg.analogsignals for c in _signal_channels(sig, pq)]
    if not chans:
        raise SessionError("the Neo segment holds no AnalogSignal; stimsteer needs the recorded signals.")
    names = [c.name for c in chans]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise SessionError(f"the Neo segment repeats channel names {dupes}; name its signals apart.")
    events = []
    for ev in seg.events:
        for t, lab in zip(_seconds(ev.times, pq, f"event '{ev.name}'"), np.atleast_1d(ev.labels)):
            events.append({"time_s": float(t), "label": str(lab) or str(ev.name), "duration_s": 0.0})
    for ep in seg.epochs:
        times = _seconds(ep.times, pq, f"epoch '{ep.name}'")
        durs = _seconds(ep.durations, pq, f"epoch '{ep.name}'")
        for t, d, lab in zip(times, durs, np.atleast_1d(ep.labels)):
            events.append({"time_s": float(t), "label": str(lab) or str(ep.name), "duration_s": float(d)})
    spikes = {str(st.name or f"unit_{i}"): _seconds(st.times, pq, f"spike train '{st.name}'")
              for i, st in enumerate(seg.spiketrains)}
    meta = {"format": "neo", "source": source, "neo_version": neo.__version__, "segment": int(segment)}
    return Recording(channels=tuple(chans), events=sorted(events, key=lambda e: e["time_s"]), spike_times=spikes,
                     metadata=meta)


def read_neo_file(path, *, io: str | None = None, segment: int = 0) -> Recording:
    """Open a file with a Neo IO and return one segment as a :class:`Recording`.

    Parameters
    ----------
    path : str or Path
    io : str, optional
        Name of the Neo IO class (``"NeoMatlabIO"``, ``"BlackrockIO"``, ...); default Neo's choice for the file.
    segment : int, default 0

    Raises
    ------
    FileFormatError
        Neo is missing, the IO is unknown, or Neo cannot read the file (its reason is given).
    """
    path = Path(path)
    neo, _pq = _import_neo(str(path))
    try:
        if io is None:
            reader = neo.io.get_io(str(path))
        else:
            if not hasattr(neo.io, io):
                raise FileFormatError(f"Neo has no IO named {io!r}; see neo.io for the names (e.g. 'BlackrockIO').")
            reader = getattr(neo.io, io)(str(path))
        block = reader.read_block(lazy=False)
    except FileFormatError:
        raise
    except Exception as exc:  # Neo's IOs raise many unrelated classes for files they cannot parse
        raise FileFormatError(f"{path} cannot be read by Neo ({type(exc).__name__}: {exc}).") from None
    rec = recording_from_neo(block, segment=segment, source=str(path))
    return Recording(rec.channels, rec.events, rec.bad_intervals, rec.spike_times, rec.pulses,
                     {**rec.metadata, "file": path.name, "neo_io": type(reader).__name__})
