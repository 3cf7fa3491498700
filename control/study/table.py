"""The study description: a folder of session files, or a small study file of our own, turned into a study table.

Three ways to describe a study:

* **A folder, one subfolder per subject**: ``ROOT/<subject>/<session file>``; every session file (our HDF5 layout,
  CSV, Parquet, NWB: whatever :func:`~stimsteer.sysid.load_session` reads) is one session, and the sessions of a
  subject are ordered by file name (name them so that this is the recording order, e.g. ``day1.h5``, ``day2.h5``).
  The condition comes from a session's metadata key ``condition`` when it has one.
* **A study file** (``*.toml``; ``ROOT/study.toml`` is used when the folder has one)::

      [study]
      name = "reach-stim-2026"
      [settings]                   # any StudySettings field; methods as "route/method"
      limits = "limits.toml"       # optional: declared limits of the closed loops (relative to the study file)
      methods = ["indirect/subspace", "direct/lsq"]
      [groups]                     # optional: subject -> group
      s01 = "sham"
      [[sessions]]                 # one table per session, in recording order within a subject
      file = "s01/monday.h5"       # relative to the study file
      subject = "s01"
      session = "monday"
      condition = "rest"           # optional

* **A BIDS dataset** (a folder with ``dataset_description.json``): each recording with an ``events.tsv`` is
  converted, following a description file (``stimsteer study --description``), into a session file of our HDF5
  layout beside the output (:mod:`stimsteer.control.study.bids`; reused on a rerun), subject and session from the
  BIDS entities, the task as the condition.

The table holds, per session: subject, session, order, condition, group, file, content hash (SHA-256 of the data,
:meth:`Session.content_hash`), trials, channels and rate. Files are opened one at a time and closed (our HDF5
layout is hashed chunk by chunk), so building the table holds at most one session in memory; the tasks read their
sessions again, lazily, on the worker that uses them. What a file holds is kept by path, size and file times for
the life of the process and, given a cache folder (``describe_study(..., cache=)``; :func:`run_study` passes its
task cache), in that folder's ``session_descriptions.json``, so describing the study again (a rerun with one new
session, in this process or another) opens only new or changed files.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from ...sysid import FileFormatError, SessionError, StimsteerWarning, load_session, open_session_file
from ...sysid._files import atomic_path

__all__ = ["StudyTable", "describe_study", "study_file_settings", "STUDY_FILE"]

#: The study file looked for in a study folder.
STUDY_FILE = "study.toml"
#: What the session files of a study hold, in its cache folder (see the module docstring).
DESCRIPTIONS_FILE = "session_descriptions.json"
_DESCRIPTIONS_FORMAT = 1
_SUFFIXES = {".h5", ".hdf5", ".csv", ".parquet", ".nwb"}
_COLUMNS = ["subject", "session", "order", "condition", "group", "file", "content_hash", "n_trials", "n_samples",
            "sample_rate_hz", "input_names", "output_names"]


@dataclass(frozen=True)
class StudyTable:
    """The sessions of a study, one row each, with what was excluded and why.

    Attributes
    ----------
    sessions : pandas.DataFrame
        Columns ``subject, session, order, condition, group, file, content_hash, n_trials, n_samples,
        sample_rate_hz, input_names, output_names`` (names as ``|``-joined strings); sorted by subject, order.
    excluded : pandas.DataFrame
        ``subject, session, file, reason``: sessions (or whole subjects) left out, by name.
    name : str
    source : str
        The folder or study file described.
    settings : dict
        The ``[settings]`` table of the study file (empty for a folder).
    """

    sessions: pd.DataFrame
    excluded: pd.DataFrame
    name: str
    source: str
    settings: dict

    @property
    def subjects(self) -> list:
        return sorted(self.sessions["subject"].unique())

    def __len__(self) -> int:
        return len(self.sessions)


def describe_study(path, *, min_trials: int = 4, channels=None, description=None, convert_dir=None,
                   cache=None) -> StudyTable:
    """Build the study table of a folder, a study file or a BIDS dataset (see the module docstring).

    Parameters
    ----------
    path : str or Path
    min_trials : int, default 4
        Sessions with fewer trials are excluded by name (a warning and the ``excluded`` table say so).
    channels : sequence of str, optional
        Explicit common subset of channels; then sessions may record more channels than these.
    description : Description, dict or path of a TOML file, optional
        For a BIDS dataset (required there): how each recording becomes a session (:mod:`stimsteer.sysid.description`).
    convert_dir : str or Path, optional
        For a BIDS dataset (required there): where its converted session files go (reused on a rerun).
    cache : str or Path, optional
        A folder (the study's task cache) where what each session file holds is kept between runs, by path, size
        and file times (a file changed since is read again); created when missing.

    Returns
    -------
    StudyTable

    Raises
    ------
    SessionError
        No session found; a file that is not a session; two sessions with the same content hash; sessions of one
        subject with different channel sets (named) and no ``channels``; a session lacking a named channel; a
        BIDS dataset this installation cannot read or that has no stimulation information.
    """
    path = Path(path)
    if not path.exists():
        raise SessionError(f"study {path} does not exist; give a folder of session files (one subfolder per "
                           f"subject) or a study file ({STUDY_FILE}).")
    if path.is_dir() and (path / STUDY_FILE).is_file():
        path = path / STUDY_FILE
    if path.is_file():
        name, settings, entries = _read_study_file(path)
    elif (path / "dataset_description.json").is_file():
        name, settings, entries = path.name, {}, _bids_entries(path, description, convert_dir)
    else:
        name, settings, entries = path.name, {}, _folder_entries(path)
    known, keys = _load_descriptions(cache), []
    rows = [_session_row(e, known, keys) for e in entries]
    _store_descriptions(cache, {k: _INFO[k] for k in keys})
    sessions, excluded = _exclude(pd.DataFrame(rows, columns=_COLUMNS), int(min_trials))
    _check_duplicates(sessions)
    _check_channels(sessions, channels)
    return StudyTable(sessions=sessions.sort_values(["subject", "order"], ignore_index=True),
                      excluded=excluded, name=str(name), source=str(path), settings=dict(settings))


def study_file_settings(path) -> dict:
    """The ``[settings]`` table of a study file (or of ``path/study.toml``); empty for a plain folder."""
    path = Path(path)
    if path.is_dir() and (path / STUDY_FILE).is_file():
        path = path / STUDY_FILE
    settings = dict(_load_toml(path).get("settings", {})) if path.is_file() else {}
    if isinstance(settings.get("limits"), str):  # a limits file, relative to the study file
        settings["limits"] = str(path.parent / settings["limits"])
    return settings


def _load_toml(path: Path) -> dict:
    try:
        import tomllib
    except ModuleNotFoundError:  # pragma: no cover - Python 3.10
        import tomli as tomllib
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise SessionError(f"study file {path} is not valid TOML ({exc}); see `stimsteer study --help` for the "
                           "layout.") from None


def _read_study_file(path: Path) -> tuple:
    data = _load_toml(path)
    listed = data.get("sessions")
    if not isinstance(listed, list) or not listed:
        raise SessionError(f"study file {path} names no sessions; add one [[sessions]] table per session with "
                           "file, subject and session.")
    groups = dict(data.get("groups", {}))
    entries = []
    for i, item in enumerate(listed):
        missing = [k for k in ("file", "subject", "session") if k not in item]
        if missing:
            raise SessionError(f"study file {path}: session {i + 1} lacks {missing}; every [[sessions]] table "
                               "needs file, subject and session.")
        subject = str(item["subject"])
        entries.append({"file": (path.parent / str(item["file"])).resolve(), "subject": subject,
                        "session": str(item["session"]), "order": item.get("order"),
                        "condition": item.get("condition"), "group": str(item.get("group", groups.get(subject, "")))})
    _order_within_subjects(entries)
    return data.get("study", {}).get("name", path.stem), dict(data.get("settings", {})), entries


def _order_within_subjects(entries) -> None:
    counts: dict = {}
    for e in entries:
        counts[e["subject"]] = counts.get(e["subject"], 0) + 1
        if e["order"] is None:
            e["order"] = counts[e["subject"]]


def _folder_entries(root: Path) -> list:
    loose = sorted(p.name for p in root.iterdir() if p.is_file() and p.suffix.lower() in _SUFFIXES)
    if loose:
        raise SessionError(f"study folder {root} holds session files at its top level ({loose[:3]}); put each "
                           f"subject's sessions in a subfolder named after the subject, or write a {STUDY_FILE}.")
    entries = []
    for sub in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        files = sorted(p for p in sub.iterdir() if p.is_file() and p.suffix.lower() in _SUFFIXES
                       and not p.name.startswith("."))
        for k, f in enumerate(files, start=1):
            entries.append({"file": f.resolve(), "subject": sub.name, "session": f.stem, "order": k,
                            "condition": None, "group": ""})
    if not entries:
        raise SessionError(f"study folder {root} holds no session files ({', '.join(sorted(_SUFFIXES))}) in "
                           "subject subfolders; put each subject's sessions in ROOT/<subject>/.")
    return entries


def _bids_entries(root: Path, description, convert_dir) -> list:
    """The recordings of a BIDS dataset, converted by :func:`.bids.convert_bids_dataset` into
    ``convert_dir`` following ``description`` (both required for a BIDS study)."""
    from .bids import convert_bids_dataset

    events = list(root.glob("sub-*/**/*_events.tsv"))
    if not events:
        raise SessionError(f"BIDS dataset {root} has no stimulation information: no *_events.tsv file under its "
                           "sub-*/ folders. Add the stimulation events (onset, duration and the stimulation "
                           "columns) or describe the study with a study file of already converted sessions.")
    if description is None or convert_dir is None:
        raise SessionError(f"{root} is a BIDS dataset: a study of it needs a description of how its recordings "
                           "become sessions (outputs, pulses, trials): give --description TOML (see `stimsteer "
                           "convert`).")
    rows = convert_bids_dataset(root, description=description, out_dir=convert_dir)
    return [{"file": Path(r["file"]), "subject": str(r["subject"]), "session": str(r["session"]),
             "order": k + 1, "condition": r.get("condition"), "group": ""} for k, r in enumerate(rows)]


def _session_row(entry: dict, known: dict, keys: list) -> dict:
    f = Path(entry["file"])
    if not f.is_file():
        raise SessionError(f"session file {f} (subject {entry['subject']}, session {entry['session']}) does not "
                           "exist; fix the path in the study file.")
    key, info = _file_info(f, known)
    keys.append(key)
    info = dict(info)
    cond = entry["condition"] if entry["condition"] is not None else info.pop("condition")
    info.pop("condition", None)
    return {"subject": entry["subject"], "session": entry["session"], "order": int(entry["order"]),
            "condition": str(cond or ""), "group": entry["group"], "file": str(f), **info}


# What a session file holds, by (resolved path, size, modification and status-change times in ns): a file rewritten
# since changes them (the status-change time even when a copy sets the old modification time back), so a study described again in this process (a rerun, a notebook) reads only new or changed
# files. Describing the benchmark's 120 small files took 1.1 s of CPU, most of it opening them (h5py), not hashing.
_INFO: dict = {}


def _file_info(f: Path, known: dict) -> tuple:
    """``(key, what the file holds)``: from this process's record, the cache folder's (``known``), or the file."""
    st = f.stat()
    key = f"{f.resolve()}|{st.st_size}|{st.st_mtime_ns}|{st.st_ctime_ns}"
    if key not in _INFO and key in known:
        _INFO[key] = known[key]
    if key not in _INFO:
        try:
            with open_session_file(f) as s:  # our HDF5 layout: hashed chunk by chunk, never loaded whole
                _INFO[key] = _info(s, s.content_hash())
        except FileFormatError:  # another layout (a table, NWB): read whole
            s = load_session(f)
            _INFO[key] = _info(s, s.content_hash())
    return key, _INFO[key]


def _load_descriptions(cache) -> dict:
    """The cache folder's record of session files (empty without a folder, or when it cannot be read: then every
    file is read again, never trusted half)."""
    if cache is None:
        return {}
    try:
        record = json.loads((Path(cache) / DESCRIPTIONS_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    ok = isinstance(record, dict) and record.get("format") == _DESCRIPTIONS_FORMAT
    files = record.get("files") if ok else None
    return dict(files) if isinstance(files, dict) else {}


def _store_descriptions(cache, keep: dict) -> None:
    """Write the record of this study's files (only theirs: a file removed or changed leaves it) atomically, when
    it changed."""
    if cache is None:
        return
    folder = Path(cache)
    if keep == _load_descriptions(cache):
        return
    folder.mkdir(parents=True, exist_ok=True)
    with atomic_path(folder / DESCRIPTIONS_FILE) as tmp:
        tmp.write_text(json.dumps({"format": _DESCRIPTIONS_FORMAT, "files": keep}), encoding="utf-8")


def _info(s, digest: str) -> dict:
    return {"content_hash": digest, "n_trials": int(s.n_trials), "n_samples": int(s.n_samples),
            "sample_rate_hz": float(s.sample_rate_hz), "input_names": "|".join(s.input_names),
            "output_names": "|".join(s.output_names), "condition": s.metadata.get("condition", "")}


def _exclude(table: pd.DataFrame, min_trials: int) -> tuple:
    few = table["n_trials"] < min_trials
    excluded = [{"subject": r.subject, "session": r.session, "file": r.file,
                 "reason": f"{r.n_trials} trials; the study needs at least {min_trials} per session"}
                for r in table[few].itertuples()]
    if excluded:
        names = ", ".join(f"{e['subject']}/{e['session']}" for e in excluded)
        warnings.warn(f"{len(excluded)} session(s) excluded for too few trials (fewer than {min_trials}): {names}. "
                      "They are listed in the study's excluded table.", StimsteerWarning, stacklevel=3)
    kept = table[~few]
    if kept.empty:
        raise SessionError(f"every session of the study has fewer than {min_trials} trials; record more trials "
                           "or lower min_trials.")
    return kept.reset_index(drop=True), pd.DataFrame(excluded, columns=["subject", "session", "file", "reason"])


def _check_duplicates(table: pd.DataFrame) -> None:
    dup = table[table.duplicated("content_hash", keep=False)]
    if not dup.empty:
        groups = [" = ".join(f"{r.subject}/{r.session} ({Path(r.file).name})" for r in g.itertuples())
                  for _h, g in dup.groupby("content_hash")]
        raise SessionError(f"sessions with identical data (same content hash): {'; '.join(groups)}. A session "
                           "listed twice would count twice in every pooled figure; remove the copies.")
    dup = table[table.duplicated(["subject", "session"], keep=False)]
    if not dup.empty:
        names = sorted(set(dup["subject"] + "/" + dup["session"]))
        raise SessionError(f"session names repeat within a subject: {names}; "
                           "give every session of a subject its own name.")


def _check_channels(table: pd.DataFrame, channels) -> None:
    if channels is not None:
        wanted = set(channels)
        for r in table.itertuples():
            have = set(r.input_names.split("|")) | set(r.output_names.split("|"))
            if wanted - have:
                raise SessionError(f"session {r.subject}/{r.session} ({r.file}) lacks the channels "
                                   f"{sorted(wanted - have)} of the common subset; it has {sorted(have)}.")
        return
    if len(table[["input_names", "output_names"]].drop_duplicates()) <= 1:
        return  # one channel set in the whole study (the common case): nothing to compare per subject
    for subject, g in table.groupby("subject"):
        sets = g[["input_names", "output_names"]].drop_duplicates()
        if len(sets) > 1:
            ref = g.iloc[0]
            for r in g.iloc[1:].itertuples():
                a = set(ref.input_names.split("|")) | set(ref.output_names.split("|"))
                b = set(r.input_names.split("|")) | set(r.output_names.split("|"))
                if a != b or (ref.input_names, ref.output_names) != (r.input_names, r.output_names):
                    raise SessionError(
                        f"sessions of subject {subject} record different channels: {ref.session} has "
                        f"{sorted(a - b) or 'the same names in another order'} that {r.session} lacks, and "
                        f"{r.session} has {sorted(b - a)} that {ref.session} lacks. Name a common subset "
                        f"(--channels / StudySettings(channels=...)), e.g. {sorted(a & b)}.")
