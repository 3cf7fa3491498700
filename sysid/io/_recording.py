"""A recording as a lab's library hands it over, before it becomes a session: channels on their own clocks and
rates, events, bad intervals and spike times.

The readers of :mod:`~stimsteer.sysid.io.mne`, :mod:`~stimsteer.sysid.io.neo`, :mod:`~stimsteer.sysid.io.nwb`
and :mod:`~stimsteer.sysid.io.bids` each return a :class:`Recording`; :func:`stimsteer.sysid.description.build_session`
turns one into a :class:`~stimsteer.sysid.session.Session` following a description (which channels are inputs and
outputs, which events open trials, the model grid, the artifact handling and the biomarkers).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..exceptions import SessionError

__all__ = ["Channel", "Recording", "LazySamples"]


class LazySamples:
    """One channel's samples, read from the source window by window (``convert`` never loads a long channel whole).

    ``read(start, stop)`` returns samples ``[start, stop)`` as float64 in the channel's unit; ``shape`` is
    ``(n_samples,)``. ``numpy.asarray`` (and arithmetic with arrays) reads the whole channel, for the few places
    that need it whole (a trigger channel's crossings).
    """

    dtype = np.dtype(np.float64)
    ndim = 1

    def __init__(self, n_samples: int, read):
        self.shape = (int(n_samples),)
        self._read = read

    def __len__(self) -> int:
        return self.shape[0]

    def read(self, start: int, stop: int) -> np.ndarray:
        start, stop = max(0, int(start)), min(self.shape[0], int(stop))
        if stop <= start:
            return np.zeros(0)
        return np.asarray(self._read(start, stop), dtype=np.float64).reshape(-1)

    def __array__(self, dtype=None, copy=None):
        whole = self.read(0, self.shape[0])
        return whole if dtype is None else whole.astype(dtype)

    def __getitem__(self, key):
        if isinstance(key, slice) and key.step in (None, 1):
            start, stop, _ = key.indices(self.shape[0])
            return self.read(start, stop)
        return np.asarray(self)[key]


@dataclass(frozen=True)
class Channel:
    """One recorded channel on its own clock.

    Attributes
    ----------
    name : str
    data : ndarray or LazySamples, shape (n_samples,)
        Values in ``unit`` (conversions of the file already applied), float64; a reader of a file may hand over a
        :class:`LazySamples` that reads windows on demand.
    unit : str
    sample_rate_hz : float
    start_time_s : float
        Time of the first sample on the channel's clock, in seconds.
    kind : str
        What the library says the channel is (``"seeg"``, ``"stim"``, ``"ElectricalSeries"``, ...).
    clock : str
        Name of the clock its times are on (``"recording"`` unless a reader knows better).
    """

    name: str
    data: np.ndarray
    unit: str
    sample_rate_hz: float
    start_time_s: float = 0.0
    kind: str = ""
    clock: str = "recording"

    @property
    def stop_time_s(self) -> float:
        """Time just after the last sample (the channel covers ``[start_time_s, stop_time_s)``)."""
        return self.start_time_s + self.data.shape[0] / self.sample_rate_hz


@dataclass(frozen=True)
class Recording:
    """Channels, events, bad intervals and spike times read from one source.

    Attributes
    ----------
    channels : tuple of Channel
    events : list of dict
        Each with ``time_s``, ``label`` and ``duration_s``; readers may add more keys (a BIDS ``events.tsv``
        row keeps its columns).
    bad_intervals : list of (float, float)
        ``[start_s, stop_s)`` intervals the source marks bad (MNE ``BAD_*`` annotations, NWB ``invalid_times``).
    spike_times : dict of str to ndarray
        Spike times in seconds per unit name.
    pulses : list of dict
        Stimulation pulses found in the source (``time_s``, ``site``, ``amplitude``, ``unit``), if any.
    blanked_outputs : list of (float, float)
        ``[start_s, stop_s)`` intervals whose outputs are hidden while the inputs stay valid (the output mask of
        one of our session files).
    metadata : dict
        What the reader knows about the source (format, file, library version).
    """

    channels: tuple
    events: list = field(default_factory=list)
    bad_intervals: list = field(default_factory=list)
    spike_times: dict = field(default_factory=dict)
    pulses: list = field(default_factory=list)
    metadata: dict = field(default_factory=dict)
    blanked_outputs: list = field(default_factory=list)

    @property
    def channel_names(self) -> list[str]:
        return [c.name for c in self.channels]

    def channel(self, name: str) -> Channel:
        """The channel called ``name``; a :class:`SessionError` listing the channels the recording has otherwise."""
        for c in self.channels:
            if c.name == name:
                return c
        raise SessionError(f"the recording has no channel '{name}'; it has {self.channel_names}. Fix the channel "
                           "name in the description.")

    def event_labels(self) -> list[str]:
        """The distinct event labels, sorted."""
        return sorted({str(e["label"]) for e in self.events})
