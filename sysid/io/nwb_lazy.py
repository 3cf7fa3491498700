"""An NWB session opened lazily: windows are read from the file as they are asked for (the ``nwb`` extra).

:func:`open_nwb_session` takes the same series as :func:`stimsteer.sysid.load_session` does for an NWB file (inputs
from ``/stimulus/presentation``, outputs from ``/acquisition``, one shared grid, trials from the trials table, the
mask from ``invalid_times``) but keeps the datasets in the file: :meth:`NwbSessionFile.read` reads only the rows of
the window (``data · conversion · channel_conversion + offset``), so ``inspect`` and the streaming fits never load
the whole recording. Only the mask (one byte per sample) and the trials are held in memory.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from ..exceptions import FileFormatError, SessionError, StimsteerError
from ..session import Session, TrialLayout
from ._common import _as_session
from .nwb import _import_pynwb, _nwb_common_grid, _nwb_extra, _nwb_sample_ranges, _nwb_timing

__all__ = ["NwbSessionFile", "open_nwb_session"]


def _lazy_series(group, kind: str, order, path: Path) -> list[dict]:
    import pynwb

    series = [ts for ts in group.values() if isinstance(ts, pynwb.TimeSeries)]
    if not series:
        where = "/stimulus/presentation" if kind == "stimulus" else "/acquisition"
        raise FileFormatError(f"{path} is an NWB file without {kind} TimeSeries in {where}; build the session with "
                              "`stimsteer convert` and a description for series elsewhere.")
    if order is not None and sorted(order) == sorted(ts.name for ts in series):
        series.sort(key=lambda ts: order.index(ts.name))
    out = []
    for ts in series:
        shape = ts.data.shape
        k = int(np.prod(shape[1:])) if len(shape) > 1 else 1
        scale = np.full(k, float(ts.conversion))
        if getattr(ts, "channel_conversion", None) is not None:
            scale = scale * np.asarray(ts.channel_conversion[()], dtype=np.float64).reshape(-1)
        names = [ts.name] if k == 1 else [f"{ts.name}_{j}" for j in range(k)]
        out.append({"name": ts.name, "ts": ts, "scale": scale, "offset": float(getattr(ts, "offset", 0.0) or 0.0),
                    "names": names, "unit": str(ts.unit),
                    "data": np.empty((shape[0], 0)),  # the grid check reads the row count only
                    "timing": _nwb_timing(ts, shape[0], path)})
    return out


class NwbSessionFile(TrialLayout):
    """A session in an NWB file, read window by window (see the module docstring).

    Attributes
    ----------
    path : Path
    sample_rate_hz : float
    trials : ndarray of int, shape (n_trials, 2)
    mask : ndarray of bool, shape (n_samples,)
    input_names, output_names, input_units, output_units : tuple of str
    metadata : dict
    """

    def __init__(self, path):
        self.path = Path(path)
        pynwb = _import_pynwb(self.path, "read")
        try:
            self._io = pynwb.NWBHDF5IO(str(self.path), "r")
            nwb = self._io.read()
        except Exception as exc:  # pynwb / hdmf raise many unrelated classes for files they cannot build
            raise FileFormatError(f"{self.path} cannot be read as an NWB file ({type(exc).__name__}: {exc}).") from None
        try:
            self._header(nwb)
        except BaseException:
            self._io.close()
            raise

    def _header(self, nwb) -> None:
        extra = _nwb_extra(nwb)
        self._u = _lazy_series(nwb.stimulus, "stimulus", extra.get("input_names"), self.path)
        self._y = _lazy_series(nwb.acquisition, "acquisition", extra.get("output_names"), self.path)
        rate, t0, n = _nwb_common_grid(self._u + self._y, self.path)
        self.sample_rate_hz, self._n = float(rate), int(n)
        trials = _nwb_sample_ranges(nwb.trials, t0, rate, n) or [(0, n)]
        self.trials = Session._check_trials(trials, n)
        self.trials.setflags(write=False)
        mask = np.ones(n, dtype=bool)
        for a, b in _nwb_sample_ranges(nwb.invalid_times, t0, rate, n):
            mask[a:b] = False
        mask.setflags(write=False)
        self.mask = mask
        self.input_names = tuple(c for s in self._u for c in s["names"])
        self.output_names = tuple(c for s in self._y for c in s["names"])
        self.input_units = tuple(s["unit"] for s in self._u for _ in s["names"])
        self.output_units = tuple(s["unit"] for s in self._y for _ in s["names"])
        meta = extra.get("metadata") if "metadata" in extra else {
            "nwb_identifier": str(nwb.identifier), "nwb_session_description": str(nwb.session_description)}
        self.metadata = {**meta, "start_time_s": t0} if t0 != 0.0 else dict(meta)

    @property
    def n_samples(self) -> int:
        return self._n

    @property
    def n_inputs(self) -> int:
        return len(self.input_names)

    @property
    def n_outputs(self) -> int:
        return len(self.output_names)

    def _block(self, series: list, start: int, stop: int) -> np.ndarray:
        cols = []
        for s in series:
            raw = np.asarray(s["ts"].data[start:stop], dtype=np.float64).reshape(stop - start, -1)
            cols.append(raw * s["scale"][None, :] + s["offset"])
        return np.column_stack(cols) if cols else np.zeros((stop - start, 0))

    def read(self, start: int, stop: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Samples ``[start, stop)`` as ``(u, y, mask)``, reading only those rows of each series."""
        if self._io is None:
            raise StimsteerError(f"NWB session {self.path} is closed; open it again with open_nwb_session.")
        start, stop = int(start), int(stop)
        if not 0 <= start <= stop <= self._n:
            raise SessionError(f"window [{start}, {stop}) is outside the recording of {self._n} samples.")
        return self._block(self._u, start, stop), self._block(self._y, start, stop), self.mask[start:stop]

    def segments(self, min_length: int = 1) -> list[tuple[int, int]]:
        """Maximal runs of valid samples inside trials, ``[start, stop)``."""
        out = []
        for a, b in self.trials:
            m = np.concatenate(([False], self.mask[a:b], [False]))
            edges = np.flatnonzero(np.diff(m.astype(np.int8)))
            out.extend((int(a + s), int(a + e)) for s, e in zip(edges[::2], edges[1::2]) if e - s >= min_length)
        return out

    def content_hash(self, rows: int = 65536) -> str:
        """SHA-256 of the data, streamed; equal to :meth:`Session.content_hash` of the same data."""
        h = hashlib.sha256()
        for series, width in ((self._u, self.n_inputs), (self._y, self.n_outputs)):
            for a in range(0, self._n, rows):
                h.update(np.ascontiguousarray(self._block(series, a, min(self._n, a + rows))).tobytes())
            h.update(str((self._n, width)).encode())
        h.update(np.ascontiguousarray(self.mask).tobytes())
        h.update(str((self._n,)).encode())
        h.update(np.ascontiguousarray(self.trials, dtype=np.int64).tobytes())
        h.update(str(tuple(int(s) for s in self.trials.shape)).encode())
        h.update(repr((self.sample_rate_hz, self.input_names, self.output_names,
                       self.input_units, self.output_units)).encode())
        return h.hexdigest()

    def to_session(self) -> Session:
        """Load the whole file into a :class:`Session`."""
        u, y, mask = self.read(0, self._n)
        return _as_session(self.path, u=u, y=y, sample_rate_hz=self.sample_rate_hz, trials=self.trials, mask=mask,
                           input_names=self.input_names, output_names=self.output_names,
                           input_units=self.input_units, output_units=self.output_units, metadata=self.metadata)

    def close(self) -> None:
        """Close the file (idempotent)."""
        if self._io is not None:
            self._io.close()
            self._io = None

    def __enter__(self) -> "NwbSessionFile":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return (f"NwbSessionFile('{self.path}', n_samples={self._n}, n_inputs={self.n_inputs}, "
                f"n_outputs={self.n_outputs}, n_trials={self.n_trials}, sample_rate_hz={self.sample_rate_hz:g})")


def open_nwb_session(path) -> NwbSessionFile:
    """Open an NWB session lazily (close it, or use it in a ``with`` block)."""
    return NwbSessionFile(path)
