"""Session files in and out: our HDF5 layout, CSV / Parquet tables, and NWB files (``nwb`` extra).

:func:`load_session` picks the reader from the file's *content* (the HDF5 signature and root attributes, the
Parquet magic bytes, a text header), never from the suffix alone, and raises :class:`FileFormatError` naming the
file, what was expected and what was found. :func:`save_session` picks the layout from the suffix and writes
atomically (a failure leaves no file behind; an existing file is kept unless ``overwrite=True``).
:func:`open_session_file` opens our HDF5 layout lazily: :meth:`SessionFile.read` touches only the chunks of the
requested window.

One module per source: :mod:`~stimsteer.sysid.io.hdf5` (our HDF5 layout, with :class:`SessionFile`),
:mod:`~stimsteer.sysid.io.tables` (CSV and Parquet tables), :mod:`~stimsteer.sysid.io.nwb` (NWB files, and every
series of one as a recording) with :mod:`~stimsteer.sysid.io.nwb_lazy` (an NWB session read window by window); their
docstrings describe each layout. :mod:`~stimsteer.sysid.io.detect` recognises a file's layout from its content and
:mod:`~stimsteer.sysid.io.dispatch` picks the reader or writer.

Recordings in the field's formats are read through the field's libraries into a
:class:`~stimsteer.sysid.io._recording.Recording` (channels on their own clocks, events, bad intervals, spike
times, pulses): :mod:`~stimsteer.sysid.io.mne` (MNE-Python: EDF/BDF, BrainVision, FIF, ``Raw`` objects),
:mod:`~stimsteer.sysid.io.neo` (Neo blocks and IOs), :mod:`~stimsteer.sysid.io.bids` (iEEG-BIDS through mne-bids).
:func:`detect_recording` names such a source from its content; :mod:`stimsteer.sysid.from_recording` turns a
recording and a description (:mod:`stimsteer.sysid.description`) into a session (``stimsteer convert``).
"""

from __future__ import annotations

from ._common import LAYOUT_NAME, LAYOUT_VERSION
from .detect import detect_format, detect_recording
from .dispatch import load_session, save_session
from .hdf5 import SessionFile, open_session_file
from .tables import comment_lines

__all__ = ["LAYOUT_NAME", "LAYOUT_VERSION", "SessionFile", "comment_lines", "detect_format", "detect_recording",
           "load_session",
           "open_session_file", "save_session"]
