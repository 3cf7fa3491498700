"""Recognising a session file's layout from its content (HDF5 signature and root attributes, Parquet magic bytes,
UTF-8 text), never from the suffix alone.
"""

from __future__ import annotations

from pathlib import Path

import h5py

from ..exceptions import FileFormatError
from ._common import LAYOUT_NAME, _attr_str

__all__ = ["detect_format", "detect_recording", "RECORDING_KINDS"]

#: Recordings recognised by content that become sessions through a description (``stimsteer convert``).
RECORDING_KINDS = {"edf": "EDF", "bdf": "BDF", "brainvision": "BrainVision", "fif": "FIF (MNE)",
                   "neo-matlab": "Neo MATLAB", "bids": "BIDS dataset"}


_HDF5_SIGNATURE = b"\x89HDF\r\n\x1a\n"
_PARQUET_MAGIC = b"PAR1"


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
    kind = _recording_kind(path)
    if kind is not None:
        raise FileFormatError(
            f"{path} is a {RECORDING_KINDS[kind]} recording, not a session: say which channels are inputs and "
            f"outputs in a description file and build the session with `stimsteer convert {path} --description "
            "FILE --out SESSION.h5`."
        )
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


# ==================================================================================================== recordings
_MAGIC = (
    (b"\xffBIOSEMI", "bdf"),  # BDF header (BioSemi)
    (b"Brain Vision Data Exchange Header File", "brainvision"),  # BrainVision .vhdr first line
    (b"\x00\x00\x00\x64\x00\x00\x00\x1f", "fif"),  # FIF: first tag FIFF_FILE_ID (100) of type id-struct (31)
    (b"MATLAB 5.0 MAT-file", "neo-matlab"),  # MATLAB 5 header (NeoMatlabIO writes these)
)


def _recording_kind(path: Path) -> str | None:
    if path.is_dir():
        return "bids" if (path / "dataset_description.json").is_file() else None
    try:
        with open(path, "rb") as fh:
            head = fh.read(256)
    except OSError:
        return None
    for magic, kind in _MAGIC:
        if head.startswith(magic) or (kind == "brainvision" and head.lstrip(b"\xef\xbb\xbf").startswith(magic)):
            return kind
    # EDF: version "0" padded to 8 bytes, header length (bytes 184-192) a multiple of 256 (EDF spec, Kemp 1992)
    if head[:8] == b"0       " and len(head) >= 192:
        try:
            return "edf" if int(head[184:192].decode("ascii").strip()) % 256 == 0 else None
        except ValueError:
            return None
    return None


def detect_recording(path) -> str:
    """Name a recording's layout from its content, for ``stimsteer convert``.

    Returns
    -------
    str
        One of :data:`RECORDING_KINDS` (``"edf"``, ``"bdf"``, ``"brainvision"``, ``"fif"``, ``"neo-matlab"``,
        ``"bids"``) or ``"nwb"``.

    Raises
    ------
    FileNotFoundError
        The path does not exist.
    FileFormatError
        Neither a recording we read through a library nor an NWB file; the message says what was found.
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(2, "No such file or directory", str(path))
    kind = _recording_kind(path)
    if kind is not None:
        return kind
    if path.is_dir():
        raise FileFormatError(f"{path} is a folder without dataset_description.json; give a BIDS dataset's root or "
                              "a recording file.")
    with open(path, "rb") as fh:
        if _has_hdf5_signature(fh, path.stat().st_size) and _hdf5_kind(path) == "nwb":
            return "nwb"
    raise FileFormatError(
        f"{path} is not a recording stimsteer reads through a library: expected EDF/BDF, BrainVision (.vhdr), FIF, "
        "a Neo MATLAB file, an NWB file or a BIDS dataset folder. Name a Neo IO in the description "
        "([recording] neo_io) for other acquisition formats."
    )
