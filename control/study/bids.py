"""A BIDS dataset as a study: each recording with stimulation information converted to a session file.

The recordings are listed by :func:`stimsteer.sysid.io.bids.bids_recordings` and built with a description
(:mod:`stimsteer.sysid.description`, as for ``stimsteer convert``) into session files of our HDF5 layout in a folder
of the caller's (never inside the dataset). A file converted earlier from the same source file (same path, size and
modification time) with the same description is reused, so a rerun after a new recording converts only that one.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from ...sysid.description import Description, load_description, parse_description
from ...sysid.exceptions import FileFormatError, SessionError
from ...sysid.from_recording import build_session
from ...sysid.io import open_session_file, save_session
from ...sysid.io.bids import bids_recordings, read_bids

__all__ = ["convert_bids_dataset"]


def convert_bids_dataset(root, *, description, out_dir, datatype: str = "ieeg") -> list[dict]:
    """Every recording of a BIDS dataset with an ``events.tsv``, as a session file in ``out_dir``.

    Parameters
    ----------
    root : str or Path
        The dataset's root.
    description : Description, dict, or str / Path of a TOML file
        How a recording becomes a session (outputs, pulses, trials); its ``[recording] bids`` entities are set
        to each recording's own.
    out_dir : str or Path
        Folder for the session files (created when missing).
    datatype : str, default "ieeg"

    Returns
    -------
    list of dict
        The rows of :func:`~stimsteer.sysid.io.bids.bids_recordings` with ``file`` (the session file) added.

    Raises
    ------
    SessionError
        No stimulation information, or a recording the description does not fit (named).
    FileFormatError
        mne-bids missing or ``root`` not a BIDS root.
    """
    if isinstance(description, (str, Path)):
        description = load_description(description)
    desc = description if isinstance(description, Description) else parse_description(description)
    rows = bids_recordings(root, datatype=datatype)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    return [{**r, "file": _converted(Path(root), r, desc, out_dir)} for r in rows]


def _stamp(row: dict, tables: dict) -> str:
    stat = Path(row["source"]).stat()
    key = (str(Path(row["source"]).resolve()), stat.st_size, stat.st_mtime_ns, sorted(tables.items(), key=str))
    return hashlib.sha256(repr(key).encode()).hexdigest()


def _converted(root: Path, row: dict, desc: Description, out_dir: Path) -> Path:
    tables = {**desc.as_dict(), "recording": {"bids": dict(row["entities"])}}
    stamp, target = _stamp(row, tables), out_dir / f"{row['name']}.h5"
    if target.is_file():
        try:
            with open_session_file(target) as f:
                if f.metadata.get("bids_conversion") == stamp:
                    return target
        except (OSError, FileFormatError):
            pass  # unreadable or not ours: converted again below
    rec = read_bids(root, datatype=row["datatype"], **row["entities"])
    try:
        session = build_session(rec, parse_description(tables, folder=desc.folder), source=str(row["source"]))
    except SessionError as exc:
        raise SessionError(f"{Path(row['source']).name}: {exc}") from None
    save_session(session.replace(metadata={**session.metadata, "bids_conversion": stamp}), target, overwrite=True)
    return target
