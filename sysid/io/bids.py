"""iEEG-BIDS datasets through mne-bids (the ``bids`` extra).

A recording of a BIDS dataset is named by its entities (subject, session, task, run, acquisition) under the
dataset's root (the folder holding ``dataset_description.json``). ``mne_bids.read_raw_bids`` reads the data, the
channel types and the annotations (``events.tsv``), which become a
:class:`~stimsteer.sysid.io._recording.Recording` as for any MNE ``Raw``. When ``events.tsv`` carries the
electrical-stimulation columns of the BIDS iEEG specification (``electrical_stimulation_site`` and
``electrical_stimulation_current``; BIDS specification, iEEG, "Electrical stimulation", from memory), each row with
a site is also a stimulation pulse (``time_s`` = ``onset``, ``site``, ``amplitude`` = the current), in the unit
that ``events.json`` declares for the column, or amperes, the specification's unit, when it declares none.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..exceptions import FileFormatError, SessionError
from ._recording import Recording
from .mne import recording_from_mne

__all__ = ["read_bids", "find_bids_root", "bids_recordings", "STIM_SITE", "STIM_CURRENT"]

_HINT = 'install the optional BIDS support with: pip install "stimsteer[bids]"'
STIM_SITE = "electrical_stimulation_site"
STIM_CURRENT = "electrical_stimulation_current"
# the files mne-bids opens as raw data (a BrainVision recording is its .vhdr header, not the .eeg/.vmrk beside it)
_DATA_EXTENSIONS = (".vhdr", ".edf", ".bdf", ".set", ".fif", ".nwb", ".mefd")
_ENTITIES = ("subject", "session", "task", "run", "acquisition")


def find_bids_root(path) -> Path | None:
    """The BIDS root at or above ``path`` (the first folder holding ``dataset_description.json``), else None."""
    path = Path(path).resolve()
    for folder in [path] + list(path.parents):
        if folder.is_dir() and (folder / "dataset_description.json").is_file():
            return folder
    return None


def _import_mne_bids(root: Path):
    try:
        import mne_bids
    except ImportError:
        raise FileFormatError(f"cannot read the BIDS dataset {root}: it needs the optional package mne-bids, which "
                              f"is not installed; {_HINT}") from None
    return mne_bids


def read_bids(root, *, subject: str, task: str, session: str | None = None, run=None,
              acquisition: str | None = None, datatype: str = "ieeg") -> Recording:
    """One recording of a BIDS dataset as a :class:`Recording`, with the stimulation pulses of ``events.tsv``.

    Raises
    ------
    FileFormatError
        mne-bids missing, ``root`` not a BIDS dataset, or no recording with those entities (the message lists
        the recordings the dataset has).
    """
    root = Path(root)
    if find_bids_root(root) != root.resolve():
        raise FileFormatError(f"{root} is not the root of a BIDS dataset (no dataset_description.json there); give "
                              "the dataset's top folder.")
    mne_bids = _import_mne_bids(root)
    bp = mne_bids.BIDSPath(root=root, subject=subject, session=session, task=task, run=run,
                           acquisition=acquisition, datatype=datatype)
    matches = [p for p in bp.match() if p.suffix == datatype and p.extension in _DATA_EXTENSIONS]
    if not matches:
        have = sorted({p.basename for p in mne_bids.BIDSPath(root=root, datatype=datatype).match()
                       if p.suffix == datatype and p.extension in _DATA_EXTENSIONS})
        raise FileFormatError(f"the BIDS dataset {root} has no {datatype} recording for subject={subject!r}, "
                              f"session={session!r}, task={task!r}, run={run!r}; it has {have or 'none'}.")
    try:
        raw = mne_bids.read_raw_bids(matches[0], verbose="error")
    except Exception as exc:  # mne-bids raises many unrelated classes for datasets it cannot read
        raise FileFormatError(f"{matches[0].fpath} cannot be read by mne-bids ({type(exc).__name__}: {exc}).") from None
    rec = recording_from_mne(raw, source=str(matches[0].fpath), lazy=True)  # windows read when the session is built
    pulses = _stimulation_pulses(matches[0].copy().update(suffix="events", extension=".tsv").fpath)
    meta = {**rec.metadata, "format": "bids", "bids_root": str(root), "file": matches[0].basename,
            "entities": {k: v for k, v in zip(_ENTITIES, (subject, session, task, run, acquisition)) if v}}
    return Recording(rec.channels, rec.events, rec.bad_intervals, rec.spike_times, pulses, meta)


def _stimulation_pulses(events_tsv: Path) -> list[dict]:
    if not events_tsv.is_file():
        return []
    import pandas as pd

    table = pd.read_csv(events_tsv, sep="\t", na_values=["n/a"], keep_default_na=False)
    if STIM_SITE not in table.columns or STIM_CURRENT not in table.columns:
        return []
    unit = _declared_unit(events_tsv.with_suffix(".json"), STIM_CURRENT) or "A"
    rows = table[table[STIM_SITE].notna()]
    current = pd.to_numeric(rows[STIM_CURRENT], errors="coerce")
    if current.isna().any():
        bad = [int(k) + 1 for k in rows.index[current.isna()]]
        raise SessionError(f"{events_tsv}: column {STIM_CURRENT} holds non-numeric values on rows with a "
                           f"stimulation site (data rows {bad}, counted from 1 after the header); fix the table.")
    return [{"time_s": float(t), "site": str(s), "amplitude": float(a), "unit": unit}
            for t, s, a in zip(rows["onset"], rows[STIM_SITE], np.asarray(current, dtype=np.float64))]


def _declared_unit(sidecar: Path, column: str) -> str | None:
    if not sidecar.is_file():
        return None
    try:
        desc = json.loads(sidecar.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    entry = desc.get(column) if isinstance(desc, dict) else None
    return str(entry["Units"]) if isinstance(entry, dict) and "Units" in entry else None


# ------------------------------------------------------------------------------------------------ a dataset as a study
def bids_recordings(root, *, datatype: str = "ieeg") -> list[dict]:
    """The recordings of a BIDS dataset that carry stimulation information (an ``events.tsv`` beside them).

    Parameters
    ----------
    root : str or Path
        The dataset's root (holding ``dataset_description.json``).
    datatype : str, default "ieeg"

    Returns
    -------
    list of dict
        One per recording, in BIDS order: ``entities`` (subject, session, task, run, acquisition: those set, for
        :func:`read_bids`), ``subject``, ``session`` (the BIDS session, or task and run when the dataset has no
        sessions), ``condition`` (the task), ``source`` (the raw data file, a Path), ``name`` (its BIDS base name).

    Raises
    ------
    SessionError
        No recording with an ``events.tsv``: the dataset holds no stimulation information.
    FileFormatError
        mne-bids missing or ``root`` not a BIDS root.
    """
    root = Path(root)
    if find_bids_root(root) != root.resolve():
        raise FileFormatError(f"{root} is not the root of a BIDS dataset (no dataset_description.json there); give "
                              "the dataset's top folder.")
    mne_bids = _import_mne_bids(root)
    found = [p for p in mne_bids.BIDSPath(root=root, datatype=datatype).match()
             if p.suffix == datatype and p.extension in _DATA_EXTENSIONS
             and p.copy().update(suffix="events", extension=".tsv").fpath.is_file()]
    if not found:
        raise SessionError(f"the BIDS dataset {root} has no {datatype} recording with an events.tsv, so no "
                           "stimulation information; add the stimulation events (onset and the "
                           f"{STIM_SITE}/{STIM_CURRENT} columns) to each recording's events.tsv.")
    out = []
    for bp in found:
        ent = {k: v for k, v in zip(_ENTITIES, (bp.subject, bp.session, bp.task, bp.run, bp.acquisition))
               if v is not None}
        out.append({"entities": ent, "subject": str(bp.subject),
                    "session": str(bp.session or "-".join(str(x) for x in (bp.task, bp.run) if x)),
                    "condition": str(bp.task or ""), "source": bp.fpath, "name": bp.basename,
                    "datatype": datatype})
    return out
