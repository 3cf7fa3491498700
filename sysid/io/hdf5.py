"""Our HDF5 session layout: writing it, and reading it lazily (:func:`open_session_file`, :class:`SessionFile`).

Our HDF5 session layout (version 1)
-----------------------------------
Root attributes:

================================  =======================================================================
``stimsteer_layout``              the string ``"stimsteer-session"`` (marks the file as ours)
``stimsteer_layout_version``      integer layout version, currently ``1``; readers refuse newer versions
``sample_rate_hz``                float64, sampling rate of every dataset below, in Hz (> 0)
``metadata_json``                 UTF-8 string holding the session metadata as a JSON object
================================  =======================================================================

Datasets (``T`` samples, ``m`` inputs, ``p`` outputs, ``n`` trials):

============  ===========  ===========  ============================================================
name          dtype        shape        content
============  ===========  ===========  ============================================================
``inputs``    float64      (T, m)       stimulation inputs, time-major; attributes ``channel_names``
                                        and ``channel_units`` (arrays of m strings, both required)
``outputs``   float64      (T, p)       recorded outputs; the same two attributes (p strings each)
``valid``     uint8        (T,)         1 = valid sample, 0 = masked (missing or blanked artifact);
                                        masked samples may hold NaN in ``inputs`` / ``outputs``
``trials``    int64        (n, 2)       half-open sample ranges ``[start, stop)``, sorted, disjoint;
                                        attribute ``columns = ["start_sample", "stop_sample"]``
============  ===========  ===========  ============================================================

Optional: ``outputs_valid`` uint8 (T,), 1 = the outputs of the sample may be fitted and scored, 0 = blanked (a
stimulation artifact; the inputs of the sample stay valid). Written only when some output is blanked; a file
without it has every output valid, so files of earlier versions read unchanged.

By default ``inputs``, ``outputs`` and ``valid`` are stored contiguously and uncompressed, and
:class:`SessionFile` reads a window of them through a memory map. With ``compression="gzip"`` or ``"lzf"`` they are
chunked along time (about 16 Ki values, 128 KiB, per chunk, with byte shuffle), so reading a window decompresses
only the chunks it overlaps. Recorded signals in float64 hardly compress (3–11 % smaller files in
``benchmarks/bench_fit.py``) while decompression makes reading about ten times slower, hence the default. A file without the
units attributes, or with an empty unit, is refused (use ``"a.u."`` for arbitrary units).
"""

from __future__ import annotations

import json
import mmap
from pathlib import Path

import h5py
import numpy as np

from ..exceptions import FileFormatError, SessionError, StimsteerError
from ..session import Session, _names, TrialLayout, check_read_buffers
from ._common import LAYOUT_NAME, LAYOUT_VERSION, _as_session, _attr_str, _metadata_json
from .detect import detect_format

__all__ = ["SessionFile", "open_session_file"]


_CHUNK_VALUES = 16384
_COMPRESSION = {
    "gzip": {"compression": "gzip", "compression_opts": 4, "shuffle": True},  # smallest files
    "lzf": {"compression": "lzf", "shuffle": True},  # larger, faster to write
    "none": {},
}


# ==================================================================================================== HDF5
def _chunks(shape: tuple) -> tuple | None:
    if 0 in shape:
        return None
    width = int(np.prod(shape[1:])) if len(shape) > 1 else 1
    rows = max(1, min(shape[0], _CHUNK_VALUES // width))
    return (rows,) + tuple(shape[1:])


def _create(h, name: str, data: np.ndarray, compression: dict):
    # Without compression the data are stored contiguously: any window is then one byte range, which SessionFile
    # reads through a memory map (no HDF5 call, no interpreter lock held).
    chunks = _chunks(data.shape) if compression else None
    extra = compression if chunks is not None else {}
    return h.create_dataset(name, data=data, chunks=chunks, **extra)


def _write_hdf5(session: Session, tmp: Path, compression: dict) -> None:
    meta = _metadata_json(session.metadata)
    strings = h5py.string_dtype()
    with h5py.File(tmp, "w") as h:
        h.attrs["stimsteer_layout"] = LAYOUT_NAME
        h.attrs["stimsteer_layout_version"] = np.int64(LAYOUT_VERSION)
        h.attrs["sample_rate_hz"] = np.float64(session.sample_rate_hz)
        h.attrs["metadata_json"] = meta
        for key, data, names, units in (
            ("inputs", session.u, session.input_names, session.input_units),
            ("outputs", session.y, session.output_names, session.output_units),
        ):
            ds = _create(h, key, np.ascontiguousarray(data, dtype=np.float64), compression)
            ds.attrs.create("channel_names", np.array(names, dtype=object), dtype=strings)
            ds.attrs.create("channel_units", np.array(units, dtype=object), dtype=strings)
        _create(h, "valid", session.mask.astype(np.uint8), compression)
        if not session.output_mask.all():
            _create(h, "outputs_valid", session.output_mask.astype(np.uint8), compression)
        tr = h.create_dataset("trials", data=np.asarray(session.trials, dtype=np.int64))
        tr.attrs.create("columns", np.array(["start_sample", "stop_sample"], dtype=object), dtype=strings)


def open_session_file(path) -> "SessionFile":
    """Open a session in our HDF5 layout lazily (use as a context manager).

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    SessionFile

    Raises
    ------
    FileFormatError
        The file is not in our HDF5 layout (an NWB file or a table is named as such: use :func:`load_session`).
    """
    path = Path(path)
    kind = detect_format(path)
    if kind != "hdf5":
        raise FileFormatError(
            f"{path} is a {kind.upper()} file; open_session_file reads only our HDF5 layout lazily. Use "
            "load_session to read it whole, or convert it with save_session(..., 'name.h5')."
        )
    return SessionFile(path)


class _MappedRows:
    """Rows of a contiguous 2-D dataset, copied out of a read-only memory map of its byte range.

    Each read copies the window (float64, a fresh array) and then unmaps the window's pages from this process
    (``MADV_DONTNEED``; they stay in the operating system's file cache), so the resident memory of a long streaming
    pass stays at one window instead of growing to the size of the file.
    """

    def __init__(self, path: Path, offset: int, dtype: np.dtype, shape: tuple):
        start = offset // mmap.ALLOCATIONGRANULARITY * mmap.ALLOCATIONGRANULARITY
        self._delta = offset - start
        self._row_bytes = int(shape[1]) * dtype.itemsize
        count = int(shape[0]) * int(shape[1])
        with open(path, "rb") as fh:
            self._mm = mmap.mmap(fh.fileno(), self._delta + count * dtype.itemsize, access=mmap.ACCESS_READ,
                                 offset=start)
        self._rows = np.frombuffer(self._mm, dtype=dtype, count=count, offset=self._delta).reshape(shape)

    def read(self, start: int, stop: int, out: np.ndarray | None = None) -> np.ndarray:
        if out is None:
            out = np.array(self._rows[start:stop], dtype=np.float64)
        else:
            np.copyto(out, self._rows[start:stop])
        if stop > start and hasattr(self._mm, "madvise") and hasattr(mmap, "MADV_DONTNEED"):
            lo = (self._delta + start * self._row_bytes) // mmap.PAGESIZE * mmap.PAGESIZE
            self._mm.madvise(mmap.MADV_DONTNEED, lo, self._delta + stop * self._row_bytes - lo)
        return out

    def close(self) -> None:
        self._rows = None
        try:
            self._mm.close()
        except BufferError:  # a view still lives (e.g. in a traceback); the map goes with the last one
            pass


class SessionFile(TrialLayout):
    """A session in our HDF5 layout, opened read-only; arrays stay on disk until a window is read.

    Offers the same ``read``, ``segments``, ``content_hash`` and shape attributes as :class:`Session`, so
    streaming code accepts either. Create it with :func:`open_session_file`.

    Parameters
    ----------
    path : str or Path

    Attributes
    ----------
    path : Path
    n_samples, n_inputs, n_outputs, n_trials : int
    sample_rate_hz : float
    trials : ndarray of int64, shape (n_trials, 2)
    input_names, output_names, input_units, output_units : tuple of str
    metadata : dict

    Raises
    ------
    FileFormatError
        The file lacks a required attribute or dataset, has inconsistent shapes, missing units, or a newer
        layout version.
    """

    def __init__(self, path):
        self.path = Path(path)
        try:
            self._h5 = h5py.File(self.path, "r")
        except OSError as exc:
            raise FileFormatError(f"{self.path} cannot be opened as HDF5 ({exc}).") from None
        try:
            self._read_header()
        except BaseException:
            self._h5.close()
            raise

    # ------------------------------------------------------------------------------------------ header
    def _fail(self, message: str):
        raise FileFormatError(f"{self.path} is not a valid stimsteer HDF5 session: {message}")

    def _read_header(self) -> None:
        h = self._h5
        if _attr_str(h.attrs.get("stimsteer_layout", "")) != LAYOUT_NAME:
            self._fail(f"expected the root attribute stimsteer_layout = '{LAYOUT_NAME}'; found "
                       f"{h.attrs.get('stimsteer_layout')!r}.")
        version = _attr_str(h.attrs.get("stimsteer_layout_version", "none"))
        if not version.isdigit():
            self._fail(f"expected the root attribute stimsteer_layout_version to be a whole number; found {version}.")
        if int(version) > LAYOUT_VERSION:
            self._fail(f"expected layout version <= {LAYOUT_VERSION}; found {version}. The file was written by "
                       "a newer stimsteer: upgrade stimsteer to read it.")
        self._u = self._dataset("inputs", 2, "fiu")
        self._y = self._dataset("outputs", 2, "fiu")
        self._valid = self._dataset("valid", 1, "biu")
        n = self._u.shape[0]
        if self._y.shape[0] != n or self._valid.shape[0] != n:
            self._fail(f"expected inputs, outputs and valid to have the same number of samples; found "
                       f"{self._u.shape[0]}, {self._y.shape[0]} and {self._valid.shape[0]}.")
        self.input_names, self.input_units = self._channels("inputs", self._u.shape[1])
        self.output_names, self.output_units = self._channels("outputs", self._y.shape[1])
        dupes = sorted({s for s in self.input_names + self.output_names
                        if (self.input_names + self.output_names).count(s) > 1})
        if dupes:
            self._fail(f"expected unique channel names; found duplicates {dupes}.")
        self.sample_rate_hz = self._checked(Session._check_rate, h.attrs.get("sample_rate_hz"))
        self.trials = self._checked(Session._check_trials, self._dataset("trials", 2, "iu")[()], n)
        self.trials.setflags(write=False)
        self._metadata_text, self._metadata_parsed = _attr_str(h.attrs.get("metadata_json", "{}")), None
        if not self._metadata_text.lstrip().startswith("{"):
            self._metadata()  # not an object at all: said when the file is opened
        self.output_mask = self._output_mask(n)
        self._u_map, self._y_map = self._mapped(self._u), self._mapped(self._y)

    def _mapped(self, ds) -> "_MappedRows | None":
        """A memory-mapped reader of a contiguous, unfiltered, native-order dataset, or None (read through h5py).

        Copying a window out of the map releases the interpreter lock (h5py holds it), so streaming fits overlap
        their reads with their arithmetic. The map is checked against h5py's own reading of the first and last
        rows; any doubt falls back to h5py.
        """
        try:
            offset = ds.id.get_offset()
        except (AttributeError, RuntimeError, ValueError):
            offset = None
        if offset is None or ds.chunks is not None or ds.compression is not None or not ds.dtype.isnative \
                or ds.size == 0 or ds.ndim != 2:
            return None
        try:
            mapped = _MappedRows(self.path, int(offset), ds.dtype, ds.shape)
        except (OSError, ValueError):
            return None
        n = ds.shape[0]
        if not all(np.array_equal(mapped.read(i, i + 1), ds[i:i + 1], equal_nan=True) for i in (0, n - 1)):
            mapped.close()
            return None
        return mapped

    def _checked(self, check, *args):
        try:
            return check(*args)
        except SessionError as exc:
            self._fail(str(exc))

    def _dataset(self, name: str, ndim: int, kinds: str):
        obj = self._h5.get(name)
        if not isinstance(obj, h5py.Dataset):
            found = "a group" if isinstance(obj, h5py.Group) else "nothing"
            self._fail(f"expected a dataset '/{name}'; found {found}. Root members: {sorted(self._h5.keys())}.")
        if obj.ndim != ndim or obj.dtype.kind not in kinds:
            self._fail(f"expected '/{name}' to be {ndim}-D numeric; found shape {obj.shape}, dtype {obj.dtype}.")
        return obj

    def _channels(self, key: str, n: int) -> tuple[tuple, tuple]:
        ds = self._h5[key]
        out = []
        for attr in ("channel_names", "channel_units"):
            if attr not in ds.attrs:
                self._fail(f"expected the attribute '{attr}' on '/{key}' (one entry per channel); found none. "
                           "Units are required: write 'a.u.' for arbitrary units.")
            values = tuple(_attr_str(v) for v in np.asarray(ds.attrs[attr]).reshape(-1))
            if len(values) != n or any(not v.strip() for v in values):
                self._fail(f"expected '{attr}' on '/{key}' to hold {n} non-empty strings; found {list(values)}.")
            out.append(values)
        self._checked(_names, f"{key} channel_names", out[0], n, "")
        return out[0], out[1]

    def _metadata(self) -> dict:
        try:
            meta = json.loads(self._metadata_text)
        except json.JSONDecodeError as exc:
            self._fail(f"expected the root attribute metadata_json to hold JSON; it does not ({exc}).")
        if not isinstance(meta, dict):
            self._fail(f"expected metadata_json to hold a JSON object; found {type(meta).__name__}.")
        return meta

    @property
    def metadata(self) -> dict:
        """The session's metadata, parsed from the file's ``metadata_json`` when first asked for (a session with
        recorded pulses carries a large one: the demo's is 974 kB, 15 ms to parse, and most opens never read it).

        Raises
        ------
        FileFormatError
            ``metadata_json`` does not hold a JSON object.
        """
        if self._metadata_parsed is None:
            self._metadata_parsed = self._metadata()
        return self._metadata_parsed

    # ------------------------------------------------------------------------------------------ properties
    @property
    def n_samples(self) -> int:
        return int(self._u.shape[0])

    @property
    def n_inputs(self) -> int:
        return int(self._u.shape[1])

    @property
    def n_outputs(self) -> int:
        return int(self._y.shape[1])

    # ------------------------------------------------------------------------------------------ reading
    def _open(self):
        if not self._h5.id.valid:
            raise StimsteerError(f"session file {self.path} is closed; open it again with open_session_file.")
        return self._h5

    def read(self, start: int, stop: int, *, out=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Samples ``[start, stop)`` as ``(u, y, mask)``, reading only the part of the file the window covers.

        Parameters
        ----------
        start, stop : int
        out : (ndarray, ndarray), optional
            ``(u_out, y_out)``, float64 arrays of shapes ``(stop - start, n_inputs)`` and
            ``(stop - start, n_outputs)`` (views, e.g. column blocks of one array, are fine) to read into instead
            of fresh arrays; a streaming pass re-uses its buffers this way.

        Returns
        -------
        u : ndarray, shape (stop - start, n_inputs)
        y : ndarray, shape (stop - start, n_outputs)
        mask : ndarray of bool, shape (stop - start,)

        Raises
        ------
        SessionError
            The window is outside the recording, or ``out`` does not fit it.
        FileFormatError
            The window holds a mask value other than 0/1 or a NaN / infinite value at a valid sample.
        """
        self._open()
        start, stop = int(start), int(stop)
        if not 0 <= start <= stop <= self.n_samples:
            raise SessionError(f"window [{start}, {stop}) is outside the recording of {self.n_samples} samples.")
        if out is None:
            u, y = self._window(self._u, self._u_map, start, stop), self._window(self._y, self._y_map, start, stop)
        else:
            u, y = check_read_buffers(out, stop - start, self.n_inputs, self.n_outputs)
            for ds, mapped, dest in ((self._u, self._u_map, u), (self._y, self._y_map, y)):
                if mapped is None:
                    dest[...] = ds[start:stop]
                else:
                    mapped.read(start, stop, out=dest)
        mask = self._read_mask(start, stop)
        for name, a in (("inputs", u), ("outputs", y)):
            if np.isfinite(a).all():
                continue
            bad = ~np.isfinite(a) & mask[:, None]
            if bad.any():
                self._fail(f"'/{name}' holds NaN or infinite values at valid samples (first at sample "
                           f"{start + int(np.nonzero(bad)[0][0])}); mark them invalid in '/valid'.")
        return u, y, mask

    @staticmethod
    def _window(ds, mapped, start: int, stop: int) -> np.ndarray:
        if mapped is None:
            return np.asarray(ds[start:stop], dtype=np.float64)
        return mapped.read(start, stop)

    def _read_mask(self, start: int, stop: int) -> np.ndarray:
        self._open()
        raw = self._valid_all()[start:stop]
        if raw.dtype != bool and raw.size and not (raw.min() >= 0 and raw.max() <= 1):  # only 0 and 1 (integers)
            self._fail("expected '/valid' to hold only 0 and 1; found other values.")
        return raw.astype(bool)

    def _valid_all(self) -> np.ndarray:
        """The whole ``/valid`` as stored, read at its first use and kept (one value per sample, a small share of
        the data): an h5py read per window took ~3 ms under the interpreter lock, as long as the window's
        arithmetic in a streaming fit. Windows are checked as they are read, as before."""
        whole = self.__dict__.get("_valid_cache")
        if whole is None:
            whole = np.asarray(self._open()["valid"][()])
            whole.setflags(write=False)
            self._valid_cache = whole
        return whole

    def _output_mask(self, n: int) -> "np.ndarray | None":
        """The optional ``/outputs_valid`` as bool (one byte per sample, read whole: small beside the data), or
        None when the file blanks no output."""
        if "outputs_valid" not in self._h5:
            return None
        raw = np.asarray(self._dataset("outputs_valid", 1, "biu")[()])
        if raw.shape != (n,) or (raw.dtype != bool and not np.isin(raw, (0, 1)).all()):
            self._fail(f"expected '/outputs_valid' to hold {n} values 0 or 1; found shape {raw.shape}.")
        out = raw.astype(bool)
        out.setflags(write=False)
        return out

    def segments(self, min_length: int = 1) -> list[tuple[int, int]]:
        """Maximal runs of valid samples inside trials, ``[start, stop)``; reads the mask one trial at a time."""
        out = []
        for a, b in self.trials:
            m = np.concatenate(([False], self._read_mask(int(a), int(b)), [False]))
            edges = np.flatnonzero(np.diff(m.astype(np.int8)))
            out.extend((int(a + s), int(a + e)) for s, e in zip(edges[::2], edges[1::2]) if e - s >= min_length)
        return out

    def _blocks(self, ds, rows: int = 65536):
        """The dataset in blocks of whole chunks (chunked) or of ``rows`` rows (contiguous): memory stays bounded."""
        if ds.chunks:
            rows = ds.chunks[0] * max(1, rows // ds.chunks[0])
        for start in range(0, ds.shape[0], rows):
            yield np.asarray(ds[start:start + rows])

    def content_hash(self) -> str:
        """SHA-256 of the data, streamed chunk by chunk; equal to :meth:`Session.content_hash` of the same data."""
        import hashlib

        h = hashlib.sha256()
        for ds in (self._open()["inputs"], self._h5["outputs"]):
            for block in self._blocks(ds):
                h.update(np.ascontiguousarray(block, dtype=np.float64).data)  # the bytes, without a copy
                del block  # before the next one is read
            h.update(str(tuple(int(s) for s in ds.shape)).encode())
        for block in self._blocks(self._h5["valid"]):
            h.update(np.ascontiguousarray(block.astype(bool)).tobytes())
        h.update(str((self.n_samples,)).encode())
        h.update(np.ascontiguousarray(self.trials, dtype=np.int64).tobytes())
        h.update(str(tuple(int(s) for s in self.trials.shape)).encode())
        h.update(repr((self.sample_rate_hz, self.input_names, self.output_names,
                       self.input_units, self.output_units)).encode())
        if self.output_mask is not None and not self.output_mask.all():
            h.update(b"output_mask")
            h.update(np.ascontiguousarray(self.output_mask).tobytes())
        return h.hexdigest()

    def to_session(self) -> Session:
        """Load the whole file into a :class:`Session`."""
        self._open()
        return _as_session(
            self.path, u=np.asarray(self._u[()], dtype=np.float64), y=np.asarray(self._y[()], dtype=np.float64),
            sample_rate_hz=self.sample_rate_hz, trials=self.trials, mask=self._read_mask(0, self.n_samples),
            input_names=self.input_names, output_names=self.output_names, input_units=self.input_units,
            output_units=self.output_units, metadata=self.metadata, output_mask=self.output_mask,
        )

    def close(self) -> None:
        """Close the file (idempotent)."""
        for mapped in (getattr(self, "_u_map", None), getattr(self, "_y_map", None)):
            if mapped is not None:
                mapped.close()
        self._u_map = self._y_map = None
        if self._h5.id.valid:
            self._h5.close()

    def __enter__(self) -> "SessionFile":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        state = "open" if self._h5.id.valid else "closed"
        return (f"SessionFile('{self.path}', n_samples={self.n_samples}, n_inputs={self.n_inputs}, "
                f"n_outputs={self.n_outputs}, n_trials={self.n_trials}, sample_rate_hz={self.sample_rate_hz:g}, "
                f"{state})")
