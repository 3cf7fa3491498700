"""Session files in and out: our HDF5 layout, CSV / Parquet tables, and NWB files (``nwb`` extra).

:func:`load_session` picks the reader from the file's *content* (the HDF5 signature and root attributes, the
Parquet magic bytes, a text header), never from the suffix alone, and raises :class:`FileFormatError` naming the
file, what was expected and what was found. :func:`save_session` picks the layout from the suffix and writes
atomically (a failure leaves no file behind; an existing file is kept unless ``overwrite=True``).
:func:`open_session_file` opens our HDF5 layout lazily: :meth:`SessionFile.read` touches only the chunks of the
requested window.

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

By default ``inputs``, ``outputs`` and ``valid`` are stored contiguously and uncompressed, and
:class:`SessionFile` reads a window of them through a memory map. With ``compression="gzip"`` or ``"lzf"`` they are
chunked along time (about 16 Ki values, 128 KiB, per chunk, with byte shuffle), so reading a window decompresses
only the chunks it overlaps. Recorded signals in float64 hardly compress (3–11 % smaller files in
``benchmarks/bench_fit.py``) while decompression makes reading about ten times slower, hence the default. A file without the
units attributes, or with an empty unit, is refused (use ``"a.u."`` for arbitrary units).

CSV and Parquet table layout (version 1)
----------------------------------------
One row per sample, on a uniform time grid, in this column syntax (the same header strings in both containers):

=============================  ======================================================================
column header                  content
=============================  ======================================================================
``time [s]``                   required; sample time in seconds. The header may carry the exact rate:
``time [s] @ 1000 Hz``         then every time stamp must lie within 0.1 sample of ``t0 + k / rate``;
                               without it the rate is ``(T - 1) / (t_last - t0)`` rounded to 9
                               significant digits and the same grid check applies. A ``t0`` other than
                               0 is kept in the metadata as ``start_time_s``.
``trial``                      required; integer trial label of the row. Rows with the same label form
                               one trial and must be contiguous; labels are otherwise free. An empty cell
                               or a negative label marks a row outside every trial (allowed, e.g. the
                               gaps between trials).
``valid``                      optional; 1/0 or true/false, 1 = valid sample. Default: all valid.
``in:<name> [<unit>]``         one column per stimulation input, e.g. ``in:site_a [uA]``
``out:<name> [<unit>]``        one column per recorded output, e.g. ``out:lfp_1 [mV]``; at least one
=============================  ======================================================================

Channel names may not contain square brackets and the unit is required (``[a.u.]`` for arbitrary units); any
other column is refused, so a misspelt header is caught. Lines before the header that start with ``#`` are
comments and are skipped (schedule files open with the caution there). Masked values may be empty cells or
``nan``. The writer
emits ``time [s] @ <rate> Hz``, the label ``-1`` outside trials, and ``valid`` as 1/0; numbers are written in
the shortest form that reads back to the identical float64. Parquet files also store the layout name, version
and the metadata JSON in the schema metadata keys ``stimsteer_layout``, ``stimsteer_layout_version`` and
``stimsteer_metadata``; CSV files store the metadata JSON on a first comment line, ``# stimsteer-metadata: {...}``.

NWB files
---------
Read (and written, for round trips) with pynwb (``pip install "stimsteer[nwb]"``). Inputs are the TimeSeries in
the stimulus group (``/stimulus/presentation``), outputs the TimeSeries in ``/acquisition``; a 2-D series of
``k`` columns becomes channels ``<name>_0 ... <name>_{k-1}``. All series must share length, rate and start time.
The trials table gives the trials (sample ``k`` at time ``t_k`` belongs to a trial when
``start_time <= t_k < stop_time``), the ``invalid_times`` table gives the masked samples, and a scratch entry
``stimsteer_session`` (JSON) restores the channel order and the metadata of files written by stimsteer.
"""

from __future__ import annotations

import csv
import json
import math
import mmap
import re
from datetime import datetime, timezone
from pathlib import Path

import h5py
import numpy as np

from ._files import atomic_path
from .exceptions import FileFormatError, SessionError, StimsteerError
from ._headers import CHANNEL_RE as _CHANNEL_RE, TIME_RE as _TIME_RE
from .session import Session, _names, _TrialLayout, check_read_buffers

__all__ = [
    "LAYOUT_NAME",
    "LAYOUT_VERSION",
    "SessionFile",
    "detect_format",
    "load_session",
    "open_session_file",
    "save_session",
]

LAYOUT_NAME = "stimsteer-session"
LAYOUT_VERSION = 1
_TABLE_LAYOUT = "stimsteer-table"
_CSV_METADATA = "# stimsteer-metadata: "  # a CSV table's comment line holding the session metadata (JSON)

_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
_PARQUET_MAGIC = b"PAR1"
_CHUNK_VALUES = 16384
_COMPRESSION = {
    "gzip": {"compression": "gzip", "compression_opts": 4, "shuffle": True},  # smallest files
    "lzf": {"compression": "lzf", "shuffle": True},  # larger, faster to write
    "none": {},
}
_NWB_HINT = 'install the optional NWB support with: pip install "stimsteer[nwb]"'
_SUFFIXES = {".h5": "hdf5", ".hdf5": "hdf5", ".csv": "csv", ".parquet": "parquet", ".nwb": "nwb"}

_ROLE_RE = re.compile(r"^\s*(in|out)\s*:")


# ==================================================================================================== dispatch
def detect_format(path) -> str:
    """Name the layout of a session file from its content: ``"hdf5"``, ``"nwb"``, ``"parquet"`` or ``"csv"``.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    str
        ``"hdf5"`` for our HDF5 layout, ``"nwb"`` for an NWB file, ``"parquet"`` or ``"csv"`` for a table.

    Raises
    ------
    FileNotFoundError
        The file does not exist.
    FileFormatError
        The file is empty, a folder, binary data of another kind, or an HDF5 file that is neither ours nor NWB.
    """
    path = Path(path)
    if path.is_dir():
        raise FileFormatError(f"{path} is a folder; expected a session file (.h5, .nwb, .parquet or .csv).")
    size = path.stat().st_size
    if size == 0:
        raise FileFormatError(
            f"{path} is empty (0 bytes); expected a session file (our HDF5 layout, NWB, Parquet or CSV). "
            "Export the session again."
        )
    with open(path, "rb") as fh:
        head = fh.read(8192)
        if _has_hdf5_signature(fh, size):
            return _hdf5_kind(path)
        if head[:4] == _PARQUET_MAGIC:
            fh.seek(-4, 2)
            if fh.read(4) != _PARQUET_MAGIC:
                raise FileFormatError(
                    f"{path} starts like a Parquet file but does not end with the Parquet footer: it is truncated "
                    "or still being written. Copy or export it again."
                )
            return "parquet"
    if _looks_like_text(head):
        return "csv"
    if b"\x00" not in head:
        raise FileFormatError(f"{path} looks like text but is not UTF-8; expected a CSV table in UTF-8. Save it "
                              "again with UTF-8 encoding.")
    raise FileFormatError(
        f"{path} is not a session file: expected an HDF5 file (our layout or NWB), a Parquet table or a CSV text "
        f"table; found {size} bytes of binary data starting with {head[:8]!r}."
    )


def _has_hdf5_signature(fh, size: int) -> bool:
    # The HDF5 superblock sits at byte 0 or, after a user block, at 512, 1024, 2048, ... (HDF5 file format spec).
    offset = 0
    while offset + 8 <= size:
        fh.seek(offset)
        if fh.read(8) == _HDF5_SIGNATURE:
            return True
        offset = 512 if offset == 0 else offset * 2
    return False


def _looks_like_text(head: bytes) -> bool:
    if b"\x00" in head:
        return False
    try:
        head.decode("utf-8")
    except UnicodeDecodeError as exc:
        return exc.start >= len(head) - 3  # a multi-byte character cut by the 8 KiB read
    return True


def _hdf5_kind(path: Path) -> str:
    try:
        with h5py.File(path, "r") as h:
            attrs = {k: _attr_str(h.attrs[k]) for k in h.attrs
                     if k in ("stimsteer_layout", "neurodata_type", "stimsteer_file")}
            members, attr_names = sorted(h.keys()), sorted(h.attrs.keys())
    except OSError as exc:
        raise FileFormatError(f"{path} has an HDF5 signature but cannot be read as HDF5 ({exc}); it is damaged "
                              "or truncated. Copy or export it again.") from None
    if attrs.get("stimsteer_layout") == LAYOUT_NAME:
        return "hdf5"
    if attrs.get("neurodata_type") == "NWBFile":
        return "nwb"
    if "stimsteer_file" in attrs:
        raise FileFormatError(
            f"{path} is a stimsteer '{attrs['stimsteer_file']}' file (a saved model or plant), not a session: "
            f"expected the root attribute stimsteer_layout = '{LAYOUT_NAME}'. Give the session file instead."
        )
    raise FileFormatError(
        f"{path} is an HDF5 file but not a session: expected the root attribute stimsteer_layout = "
        f"'{LAYOUT_NAME}' (our layout) or neurodata_type = 'NWBFile' (NWB); found root members {members} and "
        f"root attributes {attr_names}. Convert the recording with stimsteer.sysid.io.save_session."
    )


def _attr_str(value) -> str:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.size == 1:
        return _attr_str(value.reshape(-1)[0])
    return str(value)


def load_session(path) -> Session:
    """Read a session from our HDF5 layout, a CSV or Parquet table, or an NWB file (see the module docstring).

    Parameters
    ----------
    path : str or Path
        The layout is recognised from the content, whatever the suffix.

    Returns
    -------
    Session

    Raises
    ------
    FileNotFoundError
        The file does not exist.
    FileFormatError
        The file is not a session in any of the layouts, or its content is inconsistent; the message names the
        file, what was expected and what was found.
    """
    path = Path(path)
    kind = detect_format(path)
    if kind == "hdf5":
        with open_session_file(path) as f:
            return f.to_session()
    if kind == "nwb":
        return _read_nwb(path)
    if kind == "parquet":
        frame, metadata = _read_parquet_frame(path)
    else:
        frame, metadata = _read_csv_frame(path)
    return _session_from_table(frame, path, metadata)


def save_session(session: Session, path, *, overwrite: bool = False, compression: str = "none") -> Path:
    """Write a session atomically; the layout follows the suffix.

    Parameters
    ----------
    session : Session
    path : str or Path
        ``.h5`` / ``.hdf5`` (our HDF5 layout), ``.csv``, ``.parquet``, or ``.nwb`` (needs the ``nwb`` extra).
    overwrite : bool, default False
        Replace an existing file. Without it an existing file is an error and is left untouched.
    compression : {"none", "gzip", "lzf"}, default "none"
        Compression of our HDF5 layout (ignored by the other layouts). ``"none"`` stores the signals contiguously
        and reads fastest (through a memory map); ``"gzip"`` gives the smallest files (chunked, byte shuffle,
        level 4); ``"lzf"`` (built into h5py) lies between. ``benchmarks/bench_fit.py`` measures a streaming fit
        from each. Any reader reads all three.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    FileFormatError
        Unknown suffix, or the session cannot be expressed in that layout (e.g. brackets in a channel name for a
        table, pynwb missing for NWB). Nothing is written.
    StimsteerError
        The file exists and ``overwrite`` is False, or the folder does not exist.
    """
    if not isinstance(session, Session):
        raise SessionError(f"save_session needs a Session; got {type(session).__name__}.")
    if compression not in _COMPRESSION:
        raise FileFormatError(f"compression must be one of {sorted(_COMPRESSION)}; got {compression!r}.")
    path = Path(path)
    kind = _SUFFIXES.get(path.suffix.lower())
    if kind is None:
        raise FileFormatError(
            f"cannot choose a layout for {path}: expected a suffix among {sorted(_SUFFIXES)}; got "
            f"'{path.suffix}'. Rename the output."
        )
    if path.is_dir():
        raise StimsteerError(f"{path} is a folder; give a file name for the session.")
    if path.exists() and not overwrite:
        raise StimsteerError(f"{path} already exists; pass overwrite=True to replace it, or choose another name.")
    writer = {"hdf5": _write_hdf5, "csv": _write_csv, "parquet": _write_parquet, "nwb": _write_nwb}[kind]
    with atomic_path(path) as tmp:
        if kind == "hdf5":
            _write_hdf5(session, tmp, _COMPRESSION[compression])
        else:
            writer(session, tmp)
    return path


def _metadata_json(metadata) -> str:
    def default(obj):
        if isinstance(obj, np.generic):
            return obj.item()
        if isinstance(obj, np.ndarray):
            return obj.tolist()
        if isinstance(obj, (tuple, set)):
            return list(obj)
        raise TypeError
    try:
        return json.dumps(dict(metadata), default=default, sort_keys=True)
    except (TypeError, ValueError) as exc:
        raise SessionError(
            f"session metadata cannot be stored as JSON ({exc}); keep it to strings, numbers, lists and dicts."
        ) from None


def _as_session(path: Path, **fields) -> Session:
    try:
        return Session(**fields)
    except SessionError as exc:
        raise FileFormatError(f"{path} does not hold a valid session: {exc}") from None


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


class SessionFile(_TrialLayout):
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
        self.metadata = self._metadata()
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
        raw = self._h5.attrs.get("metadata_json", "{}")
        try:
            meta = json.loads(_attr_str(raw))
        except json.JSONDecodeError as exc:
            self._fail(f"expected the root attribute metadata_json to hold JSON; it does not ({exc}).")
        if not isinstance(meta, dict):
            self._fail(f"expected metadata_json to hold a JSON object; found {type(meta).__name__}.")
        return meta

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
        raw = np.asarray(self._open()["valid"][start:stop])
        if raw.dtype != bool and not np.isin(raw, (0, 1)).all():
            self._fail("expected '/valid' to hold only 0 and 1; found other values.")
        return raw.astype(bool)

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
        return h.hexdigest()

    def to_session(self) -> Session:
        """Load the whole file into a :class:`Session`."""
        self._open()
        return _as_session(
            self.path, u=np.asarray(self._u[()], dtype=np.float64), y=np.asarray(self._y[()], dtype=np.float64),
            sample_rate_hz=self.sample_rate_hz, trials=self.trials, mask=self._read_mask(0, self.n_samples),
            input_names=self.input_names, output_names=self.output_names, input_units=self.input_units,
            output_units=self.output_units, metadata=self.metadata,
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


# ==================================================================================================== tables
def _format_rate(rate: float) -> str:
    return np.format_float_positional(rate, trim="-")


def _channel_header(role: str, name: str, unit: str) -> str:
    header = f"{role}:{name} [{unit}]"
    m = _CHANNEL_RE.match(header)
    if m is None or (m["name"], m["unit"].strip()) != (name, unit):
        raise FileFormatError(
            f"channel {name!r} with unit {unit!r} cannot be written as a table header '{role}:<name> [<unit>]' "
            "(square brackets and leading/trailing spaces are not allowed there); rename the channel or save "
            "as .h5."
        )
    return header


def _start_time_s(metadata) -> float:
    t0 = metadata.get("start_time_s", 0.0)
    return float(t0) if isinstance(t0, (int, float)) and math.isfinite(t0) else 0.0


def _table_columns(session: Session) -> dict:
    if session.n_outputs == 0:
        raise FileFormatError("the table layout needs at least one output channel; this session has none. "
                              "Save it as .h5.")
    rate = session.sample_rate_hz
    label = np.full(session.n_samples, -1, dtype=np.int64)
    for i, (a, b) in enumerate(session.trials):
        label[a:b] = i
    cols = {
        f"time [s] @ {_format_rate(rate)} Hz": _start_time_s(session.metadata) + np.arange(session.n_samples) / rate,
        "trial": label,
        "valid": session.mask.astype(np.int64),
    }
    for role, data, names, units in (("in", session.u, session.input_names, session.input_units),
                                      ("out", session.y, session.output_names, session.output_units)):
        for j, (name, unit) in enumerate(zip(names, units)):
            cols[_channel_header(role, name, unit)] = np.asarray(data[:, j], dtype=np.float64)
    return cols


def _write_csv(session: Session, tmp: Path) -> None:
    import pandas as pd

    cols = _table_columns(session)
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        if session.metadata:
            fh.write(f"{_CSV_METADATA}{_metadata_json(session.metadata)}\n")
        pd.DataFrame(cols).to_csv(fh, index=False)


def _write_parquet(session: Session, tmp: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = _table_columns(session)
    meta = {
        "stimsteer_layout": _TABLE_LAYOUT,
        "stimsteer_layout_version": str(LAYOUT_VERSION),
        "stimsteer_metadata": _metadata_json(session.metadata),
    }
    table = pa.table({k: pa.array(v) for k, v in cols.items()}).replace_schema_metadata(meta)
    pq.write_table(table, tmp)


def comment_lines(path) -> int:
    """Number of leading lines of a CSV table that start with ``#`` (comments before the header, e.g. the
    caution that ``stimsteer schedule`` writes); readers pass it to ``pandas.read_csv(skiprows=...)``."""
    n = 0
    with open(path, encoding="utf-8-sig", errors="replace") as fh:
        for line in fh:
            if not line.startswith("#"):
                break
            n += 1
    return n


def _csv_metadata(line: str, path: Path) -> dict:
    text = line[len(_CSV_METADATA):].strip()
    try:
        meta = json.loads(text)
    except json.JSONDecodeError as exc:
        raise FileFormatError(f"{path}: the comment line '{_CSV_METADATA.strip()} ...' must hold one JSON object "
                              f"({exc}); repair it or delete the line.") from None
    if not isinstance(meta, dict):
        raise FileFormatError(f"{path}: the comment line '{_CSV_METADATA.strip()} ...' must hold a JSON object; "
                              f"found {type(meta).__name__}.")
    return meta


def _read_csv_frame(path: Path):
    import pandas as pd

    skip = comment_lines(path)
    metadata = {}
    with open(path, newline="", encoding="utf-8-sig") as fh:
        for _ in range(skip):
            line = fh.readline()
            if line.startswith(_CSV_METADATA):
                metadata = _csv_metadata(line, path)
        try:
            header = next(csv.reader(fh), [])
        except (csv.Error, UnicodeDecodeError) as exc:
            raise FileFormatError(f"{path} is not a readable CSV table ({exc}).") from None
    _parse_header(header, path)  # fail fast, before the data are parsed
    # pandas < 3 parses floats exactly only with the round-trip parser; pandas 3 does so by default.
    extra = {"float_precision": "round_trip"} if int(pd.__version__.split(".")[0]) < 3 else {}
    try:
        return pd.read_csv(path, encoding="utf-8-sig", skiprows=skip, **extra), metadata
    except (pd.errors.ParserError, ValueError) as exc:
        raise FileFormatError(f"{path} is not a readable CSV table: {exc}") from None


def _read_parquet_frame(path: Path):
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except Exception as exc:  # pyarrow raises several unrelated classes for damaged files
        raise FileFormatError(f"{path} cannot be read as Parquet ({type(exc).__name__}: {exc}).") from None
    raw = table.schema.metadata or {}
    meta = {}
    if b"stimsteer_metadata" in raw:
        version = int(raw.get(b"stimsteer_layout_version", b"1"))
        if version > LAYOUT_VERSION:
            raise FileFormatError(f"{path} uses table layout version {version}; this stimsteer reads version "
                                  f"{LAYOUT_VERSION}. Upgrade stimsteer.")
        try:
            meta = json.loads(raw[b"stimsteer_metadata"].decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise FileFormatError(f"{path}: the schema metadata 'stimsteer_metadata' is not JSON ({exc}).") from None
    return table.to_pandas(), meta


_TABLE_EXPECTED = ("'time [s]' (optionally 'time [s] @ <rate> Hz'), 'trial', optional 'valid', and channel "
                   "columns 'in:<name> [<unit>]' / 'out:<name> [<unit>]'")


def _parse_header(columns, path: Path) -> dict:
    columns = [str(c) for c in columns]
    dupes = sorted({c for c in columns if columns.count(c) > 1})
    if dupes:
        raise FileFormatError(f"{path}: column headers must be unique; found duplicates {dupes}.")
    out = {"time": None, "rate": None, "trial": None, "valid": None, "in": [], "out": []}
    unknown = []
    for col in columns:
        t, ch = _TIME_RE.match(col), _CHANNEL_RE.match(col)
        if t is not None:
            out["time"], out["rate"] = col, t["rate"]
        elif col.strip() in ("trial", "valid"):
            out[col.strip()] = col
        elif ch is not None:
            if not ch["name"] or not ch["unit"].strip():
                raise FileFormatError(f"{path}: column {col!r} needs a channel name and a unit, as in "
                                      "'out:lfp_1 [mV]' (use [a.u.] for arbitrary units).")
            out[ch["role"]].append((col, ch["name"], ch["unit"].strip()))
        elif _ROLE_RE.match(col):
            raise FileFormatError(f"{path}: column {col!r} has no unit; units are required in this layout. "
                                  f"Write it as '{col.strip()} [<unit>]' (use [a.u.] for arbitrary units).")
        else:
            unknown.append(col)
    missing = [k for k in ("time", "trial") if out[k] is None] + ([] if out["out"] else ["out:<name> [<unit>]"])
    if unknown or missing:
        raise FileFormatError(
            f"{path} is not a stimsteer session table: expected columns {_TABLE_EXPECTED}; found {columns}"
            + (f"; missing {missing}" if missing else "") + (f"; not recognised {unknown}" if unknown else "")
            + ". Rename the columns to this layout."
        )
    return out


def _numeric(frame, col: str, path: Path) -> np.ndarray:
    import pandas as pd

    s = frame[col]
    if s.dtype == bool:
        return s.to_numpy(dtype=np.float64)
    values = pd.to_numeric(s, errors="coerce")
    bad = values.isna() & ~s.isna()
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise FileFormatError(f"{path}: column {col!r} must be numeric; row {row} holds {s.iloc[row]!r}.")
    return values.to_numpy(dtype=np.float64, na_value=np.nan)


def _time_grid(t: np.ndarray, rate_text, path: Path, col: str) -> tuple[float, float]:
    if not np.isfinite(t).all():
        raise FileFormatError(f"{path}: column {col!r} must hold a finite time for every row; found empty/NaN.")
    if rate_text is not None:
        try:
            rate = float(rate_text)
        except ValueError:
            raise FileFormatError(f"{path}: the rate in column {col!r} is not a number.") from None
    elif t.size >= 2 and t[-1] > t[0]:
        rate = float(f"{(t.size - 1) / (t[-1] - t[0]):.9g}")
    else:
        raise FileFormatError(f"{path}: cannot infer the sampling rate from column {col!r} ({t.size} row(s)); "
                              "write the header as 'time [s] @ <rate> Hz'.")
    if not math.isfinite(rate) or rate <= 0:
        raise FileFormatError(f"{path}: the sampling rate must be positive; got {rate} Hz from column {col!r}.")
    grid = t[0] + np.arange(t.size) / rate
    off = np.flatnonzero(np.abs(t - grid) > 0.1 / rate)
    if off.size:
        i = int(off[0])
        raise FileFormatError(
            f"{path}: time stamps are not on a uniform grid at {rate:g} Hz: row {i} is at {float(t[i])!r} s, the grid "
            f"puts it at {float(grid[i])!r} s. Every sample must be a row: mark missing samples invalid (valid = 0) "
            "instead of dropping rows, or resample first."
        )
    return rate, float(t[0])


def _trials_from_labels(labels: np.ndarray, path: Path) -> np.ndarray:
    if np.any(np.isfinite(labels) & (labels != np.round(labels))):
        raise FileFormatError(f"{path}: the 'trial' column must hold whole numbers; found fractional labels.")
    ids = np.where(np.isfinite(labels) & (labels >= 0), labels, -1).astype(np.int64)
    cuts = np.flatnonzero(np.diff(ids)) + 1
    starts, stops = np.r_[0, cuts], np.r_[cuts, ids.size]
    runs = [(int(a), int(b), int(ids[a])) for a, b in zip(starts, stops) if ids[a] >= 0]
    seen = {}
    for a, b, label in runs:
        if label in seen:
            raise FileFormatError(
                f"{path}: trial {label} appears in two separate runs of rows (starting at rows {seen[label]} and "
                f"{a}); the rows of one trial must be contiguous. Give each trial its own label."
            )
        seen[label] = a
    if not runs:
        raise FileFormatError(f"{path}: no row belongs to a trial (all 'trial' labels empty or negative); "
                              "label the rows of each trial 0, 1, 2, ...")
    return np.array([(a, b) for a, b, _ in runs], dtype=np.int64)


def _valid_column(frame, col: str | None, path: Path) -> np.ndarray | None:
    if col is None:
        return None
    s = frame[col]
    if s.dtype == bool:
        return s.to_numpy()
    text = s.astype(str).str.strip().str.lower()
    truth = {"1": True, "1.0": True, "true": True, "0": False, "0.0": False, "false": False}
    bad = ~text.isin(list(truth))
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise FileFormatError(f"{path}: the 'valid' column must hold 1/0 or true/false; row {row} holds "
                              f"{s.iloc[row]!r}.")
    return text.map(truth).to_numpy(dtype=bool)


def _session_from_table(frame, path: Path, metadata: dict) -> Session:
    spec = _parse_header(list(frame.columns), path)
    if len(frame) == 0:
        raise FileFormatError(f"{path} holds a header but no rows; expected one row per sample.")
    rate, t0 = _time_grid(_numeric(frame, spec["time"], path), spec["rate"], path, spec["time"])
    trials = _trials_from_labels(_numeric(frame, spec["trial"], path), path)
    u = np.column_stack([_numeric(frame, c, path) for c, _, _ in spec["in"]]) if spec["in"] else \
        np.zeros((len(frame), 0))
    y = np.column_stack([_numeric(frame, c, path) for c, _, _ in spec["out"]])
    meta = dict(metadata)
    if t0 != 0.0:
        meta["start_time_s"] = t0
    return _as_session(
        path, u=u, y=y, sample_rate_hz=rate, trials=trials, mask=_valid_column(frame, spec["valid"], path),
        input_names=[n for _, n, _ in spec["in"]], input_units=[x for _, _, x in spec["in"]],
        output_names=[n for _, n, _ in spec["out"]], output_units=[x for _, _, x in spec["out"]], metadata=meta,
    )


# ==================================================================================================== NWB
def _import_pynwb(path: Path, action: str):
    try:
        import pynwb
    except ImportError:
        raise FileFormatError(
            f"cannot {action} {path}: NWB support needs the optional package pynwb, which is not installed; "
            f"{_NWB_HINT}"
        ) from None
    return pynwb


def _runs(flags: np.ndarray) -> list[tuple[int, int]]:
    m = np.concatenate(([False], flags, [False])).astype(np.int8)
    edges = np.flatnonzero(np.diff(m))
    return [(int(a), int(b)) for a, b in zip(edges[::2], edges[1::2])]


def _write_nwb(session: Session, tmp: Path) -> None:
    pynwb = _import_pynwb(tmp, "write")
    bad = [n for n in session.input_names + session.output_names if "/" in n]
    if bad:
        raise FileFormatError(f"channel names {bad} cannot be NWB series names ('/' is not allowed there); "
                              "rename them or save as .h5.")
    rate, meta = session.sample_rate_hz, session.metadata
    t0 = _start_time_s(meta)
    nwb = pynwb.NWBFile(
        session_description=str(meta.get("description", "stimsteer session")),
        identifier=session.content_hash(), session_start_time=datetime(1970, 1, 1, tzinfo=timezone.utc),
    )
    for data, names, units, add in ((session.u, session.input_names, session.input_units, nwb.add_stimulus),
                                    (session.y, session.output_names, session.output_units, nwb.add_acquisition)):
        for j, (name, unit) in enumerate(zip(names, units)):
            add(pynwb.TimeSeries(name=name, data=np.array(data[:, j]), unit=unit, rate=rate, starting_time=t0))
    for a, b in session.trials:
        nwb.add_trial(start_time=t0 + a / rate, stop_time=t0 + b / rate)
    for a, b in _runs(~session.mask):
        nwb.add_invalid_time_interval(start_time=t0 + a / rate, stop_time=t0 + b / rate)
    nwb.add_scratch(
        json.dumps({"input_names": list(session.input_names), "output_names": list(session.output_names),
                    "metadata": json.loads(_metadata_json(meta))}),
        name="stimsteer_session", description="stimsteer channel order and session metadata (JSON)",
    )
    with pynwb.NWBHDF5IO(str(tmp), "w") as io:
        io.write(nwb)


def _nwb_series(group, kind: str, order, path: Path) -> list[dict]:
    import pynwb

    series = [ts for ts in group.values() if isinstance(ts, pynwb.TimeSeries)]
    if not series:
        where = "/stimulus/presentation" if kind == "stimulus" else "/acquisition"
        raise FileFormatError(f"{path} is an NWB file without {kind} TimeSeries in {where}; stimsteer needs the "
                              "stimulation inputs in the stimulus group and the recorded outputs in acquisition.")
    if order is not None and sorted(order) == sorted(ts.name for ts in series):
        series.sort(key=lambda ts: order.index(ts.name))
    out = []
    for ts in series:
        data = np.asarray(ts.data[()], dtype=np.float64)
        if (ts.conversion, getattr(ts, "offset", 0.0) or 0.0) != (1.0, 0.0):
            data = data * ts.conversion + (getattr(ts, "offset", 0.0) or 0.0)
        data = data.reshape(data.shape[0], -1)
        names = [ts.name] if data.shape[1] == 1 else [f"{ts.name}_{j}" for j in range(data.shape[1])]
        out.append({"name": ts.name, "data": data, "names": names, "unit": str(ts.unit),
                    "timing": _nwb_timing(ts, data.shape[0], path)})
    return out


def _nwb_timing(ts, n: int, path: Path) -> tuple[float, float]:
    if ts.rate is not None:
        return float(ts.rate), float(ts.starting_time or 0.0)
    stamps = np.asarray(ts.timestamps[()], dtype=np.float64)
    return _time_grid(stamps, None, path, f"timestamps of series '{ts.name}'")


def _nwb_sample_ranges(table, t0: float, rate: float, n: int) -> list[tuple[int, int]]:
    # sample k (time t0 + k / rate) is inside [start_time, stop_time) when start <= t_k < stop
    if table is None or len(table) == 0:
        return []
    starts = np.asarray(table["start_time"][:], dtype=np.float64)
    stops = np.asarray(table["stop_time"][:], dtype=np.float64)
    a = np.clip(np.ceil((starts - t0) * rate - 1e-6), 0, n).astype(np.int64)
    b = np.clip(np.ceil((stops - t0) * rate - 1e-6), 0, n).astype(np.int64)
    return [(int(x), int(z)) for x, z in zip(a, b)]


def _read_nwb(path: Path) -> Session:
    pynwb = _import_pynwb(path, "read")
    try:
        with pynwb.NWBHDF5IO(str(path), "r") as io:
            nwb = io.read()
            extra = _nwb_extra(nwb)
            inputs = _nwb_series(nwb.stimulus, "stimulus", extra.get("input_names"), path)
            outputs = _nwb_series(nwb.acquisition, "acquisition", extra.get("output_names"), path)
            rate, t0, n = _nwb_common_grid(inputs + outputs, path)
            trials = _nwb_sample_ranges(nwb.trials, t0, rate, n) or [(0, n)]
            mask = np.ones(n, dtype=bool)
            for a, b in _nwb_sample_ranges(nwb.invalid_times, t0, rate, n):
                mask[a:b] = False
            meta = extra.get("metadata") if "metadata" in extra else {
                "nwb_identifier": str(nwb.identifier), "nwb_session_description": str(nwb.session_description)}
    except StimsteerError:
        raise
    except Exception as exc:  # pynwb / hdmf raise many unrelated classes for files they cannot build
        raise FileFormatError(f"{path} cannot be read as an NWB file ({type(exc).__name__}: {exc}).") from None
    if t0 != 0.0:
        meta = {**meta, "start_time_s": t0}
    return _as_session(
        path, u=np.column_stack([s["data"] for s in inputs]), y=np.column_stack([s["data"] for s in outputs]),
        sample_rate_hz=rate, trials=trials, mask=mask,
        input_names=[n for s in inputs for n in s["names"]], output_names=[n for s in outputs for n in s["names"]],
        input_units=[s["unit"] for s in inputs for _ in s["names"]],
        output_units=[s["unit"] for s in outputs for _ in s["names"]], metadata=meta,
    )


def _nwb_extra(nwb) -> dict:
    scratch = nwb.scratch.get("stimsteer_session") if nwb.scratch else None
    if scratch is None:
        return {}
    try:
        data = scratch.data if isinstance(scratch.data, str) else scratch.data[()]
        extra = json.loads(data.decode("utf-8") if isinstance(data, bytes) else str(data))
    except (json.JSONDecodeError, UnicodeDecodeError):
        return {}
    return extra if isinstance(extra, dict) else {}


def _nwb_common_grid(series: list[dict], path: Path) -> tuple[float, float, int]:
    rate, t0 = series[0]["timing"]
    n = series[0]["data"].shape[0]
    for s in series[1:]:
        r, t, k = s["timing"][0], s["timing"][1], s["data"].shape[0]
        if k != n or abs(r - rate) > 1e-9 * rate or abs(t - t0) > 0.1 / rate:
            raise FileFormatError(
                f"{path}: every series must share one sample grid; '{series[0]['name']}' has {n} samples at "
                f"{rate:g} Hz from {t0:g} s but '{s['name']}' has {k} samples at {r:g} Hz from {t:g} s. "
                "Resample them to a common grid first."
            )
    return rate, t0, n
