"""Reading and writing sessions whatever their layout: :func:`load_session` picks the reader from the file's
content (:func:`~stimsteer.sysid.io.detect.detect_format`), :func:`save_session` the writer from the suffix.
"""

from __future__ import annotations

from pathlib import Path

from .._files import atomic_path, hdf5_bytes, write_bytes
from ..exceptions import FileFormatError, SessionError, StimsteerError
from ..session import Session
from .detect import detect_format
from .hdf5 import _COMPRESSION, _write_hdf5, open_session_file
from .nwb import _read_nwb, _write_nwb
from .tables import _read_csv_frame, _read_parquet_frame, _session_from_table, _write_csv, _write_parquet

__all__ = ["load_session", "save_session"]


_SUFFIXES = {".h5": "hdf5", ".hdf5": "hdf5", ".csv": "csv", ".parquet": "parquet", ".nwb": "nwb"}


def load_session(path) -> Session:
    """Read a session from our HDF5 layout, a CSV or Parquet table, or an NWB file (see :mod:`stimsteer.sysid.io`).

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
    if kind == "hdf5":  # built in memory and written whole: a full disk then fails once, cleanly (see _files)
        with hdf5_bytes() as buf:
            _write_hdf5(session, buf, _COMPRESSION[compression])
            write_bytes(path, buf.getbuffer())
        return path
    with atomic_path(path) as tmp:
        writer(session, tmp)
    return path
