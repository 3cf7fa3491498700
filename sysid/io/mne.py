"""Recordings through MNE-Python (the ``mne`` extra): ``Raw`` objects and the files MNE reads.

A ``Raw`` becomes a :class:`~stimsteer.sysid.io._recording.Recording`: every channel with its MNE type
(``seeg``, ``ecog``, ``eeg``, ``stim``, ``misc``, ...), its values as MNE returns them (SI units: volts, not µV) and
the unit MNE holds for it; annotations become events (``onset`` relative to the first sample, ``description`` as
the label, ``duration``), and annotations whose description starts with ``BAD`` (MNE's convention, e.g.
``BAD_artifact``) become bad intervals (masked samples). Files are recognised by their content (EDF and BDF headers,
the BrainVision header line, the FIF file-id tag) and opened with MNE's reader for that format, without loading
the data until channels are picked.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..exceptions import FileFormatError, SessionError
from ._recording import Channel, LazySamples, Recording

__all__ = ["recording_from_mne", "read_mne_file", "MNE_KINDS"]

_HINT = 'install the optional MNE support with: pip install "stimsteer[mne]"'

#: The layouts :func:`read_mne_file` opens, by the name :func:`stimsteer.sysid.io.detect.detect_recording` gives.
MNE_KINDS = ("edf", "bdf", "brainvision", "fif")


def _import_mne(what: str):
    try:
        import mne
    except ImportError:
        raise FileFormatError(f"cannot read {what}: it needs the optional package mne, which is not installed; "
                              f"{_HINT}") from None
    return mne


def _unit_names(mne) -> dict:
    from mne.io.constants import FIFF

    names = {}
    for key in dir(FIFF):
        if key.startswith("FIFF_UNIT_"):
            names[int(getattr(FIFF, key))] = key[len("FIFF_UNIT_"):]
    pretty = {"V": "V", "T": "T", "T_M": "T/m", "A": "A", "NONE": "a.u.", "UNITLESS": "a.u.", "CEL": "degC",
              "AM": "A*m", "HZ": "Hz", "SEC": "s", "OHM": "Ohm", "M": "m", "PA": "Pa"}
    return {code: pretty.get(n, n) for code, n in names.items()}


def _channel_unit(ch: dict, names: dict) -> str:
    unit = names.get(int(ch["unit"]), "a.u.")
    mul = int(ch.get("unit_mul", 0) or 0)
    return unit if mul == 0 else f"1e{mul} {unit}"


def recording_from_mne(raw, *, picks=None, source: str = "mne.io.Raw", lazy: bool = False) -> Recording:
    """A :class:`Recording` from an MNE ``Raw`` object.

    Parameters
    ----------
    raw : mne.io.BaseRaw
    picks : str, list of str, optional
        Channel names or MNE channel types to keep (``mne``'s ``picks``); default all channels.
    source : str
        What the recording came from (kept in its metadata).
    lazy : bool, default False
        Hand the channels over as :class:`~stimsteer.sysid.io._recording.LazySamples` that read windows from
        ``raw`` on demand (``raw.get_data(picks, start, stop)``), instead of reading them whole now (a file opened
        without preloading is then never loaded whole).

    Returns
    -------
    Recording

    Raises
    ------
    SessionError
        ``picks`` names channels or types the ``Raw`` does not have (the message lists the ones it has).
    """
    mne = _import_mne("an MNE Raw object")
    if not isinstance(raw, mne.io.BaseRaw):
        raise SessionError(f"recording_from_mne needs an mne.io.Raw object; got {type(raw).__name__}.")
    if picks is not None:
        wanted = [picks] if isinstance(picks, str) else list(picks)
        have = set(raw.ch_names) | set(raw.get_channel_types())
        missing = [p for p in wanted if p not in have]
        if missing:
            raise SessionError(f"picks {missing} match no channel or channel type of the recording; it has channels "
                               f"{list(raw.ch_names)} of types {sorted(set(raw.get_channel_types()))}.")
        raw = raw.copy().pick(wanted)
    names = _unit_names(mne)
    rate = float(raw.info["sfreq"])
    kinds = raw.get_channel_types()
    if lazy:
        data = [LazySamples(raw.n_times, _window_of(raw, i)) for i in range(len(raw.ch_names))]
    else:
        data = list(raw.get_data())  # SI units, as MNE hands them over
    chans = tuple(Channel(name=n, data=data[i] if lazy else np.asarray(data[i], dtype=np.float64),
                          unit=_channel_unit(ch, names), sample_rate_hz=rate, start_time_s=0.0, kind=kinds[i])
                  for i, (n, ch) in enumerate(zip(raw.ch_names, raw.info["chs"])))
    events, bad = _annotations(raw)
    meta = {"format": "mne", "source": source, "mne_version": mne.__version__,
            "first_sample": int(raw.first_samp)}
    return Recording(channels=chans, events=events, bad_intervals=bad, metadata=meta)


def _window_of(raw, i: int):
    def read(start: int, stop: int) -> np.ndarray:
        return raw.get_data(picks=[i], start=start, stop=stop)[0]  # SI units, as MNE hands them over
    return read


def _annotations(raw) -> tuple[list, list]:
    ann = raw.annotations
    # with an orig_time, MNE onsets count from the measurement start; the data start at first_time after it
    shift = raw.first_time if ann.orig_time is not None else 0.0
    events, bad = [], []
    for onset, duration, desc in zip(ann.onset, ann.duration, ann.description):
        t = float(onset) - float(shift)
        # BrainVision markers come back as "<type>/<description>" (e.g. "Comment/BAD_move")
        if str(desc).rsplit("/", 1)[-1].upper().startswith("BAD"):
            bad.append((t, t + float(duration)))
        else:
            events.append({"time_s": t, "label": str(desc), "duration_s": float(duration)})
    return events, bad


def read_mne_file(path, kind: str, *, names=None, types=None) -> Recording:
    """Open a file MNE reads (``kind`` from content detection) as a :class:`Recording`.

    Parameters
    ----------
    path : str or Path
    kind : str
        One of :data:`MNE_KINDS`.
    names, types : sequence of str, optional
        Read only these channels and the channels of these MNE types (what a description uses): a recording of
        many channels is then never loaded whole. When a named channel is not in the file, every channel is read,
        so that the error raised later lists them all.

    Returns
    -------
    Recording
        Its channels are :class:`~stimsteer.sysid.io._recording.LazySamples`: windows are read from the file when
        a session is built (:func:`~stimsteer.sysid.events.align_channel`), never the whole channel at once.

    Raises
    ------
    FileFormatError
        MNE is not installed, or MNE cannot read the file (its reason is given).
    """
    path = Path(path)
    mne = _import_mne(str(path))
    readers = {"edf": mne.io.read_raw_edf, "bdf": mne.io.read_raw_bdf,
               "brainvision": mne.io.read_raw_brainvision, "fif": mne.io.read_raw_fif}
    if kind not in readers:
        raise FileFormatError(f"{path}: unknown MNE layout {kind!r}; expected one of {list(MNE_KINDS)}.")
    try:
        raw = readers[kind](str(path), preload=False, verbose="error")
    except Exception as exc:  # MNE raises many unrelated classes for files it cannot parse
        raise FileFormatError(f"{path} cannot be read as {kind} by MNE ({type(exc).__name__}: {exc}).") from None
    rec = recording_from_mne(raw, picks=_picks(raw, names, types), source=str(path), lazy=True)
    return Recording(rec.channels, rec.events, rec.bad_intervals, rec.spike_times, rec.pulses,
                     {**rec.metadata, "format": f"mne-{kind}", "file": path.name})


def _picks(raw, names, types) -> list | None:
    """The channels to read (file order), or None for all: a description that names no channel, or names one the
    file lacks."""
    names, types = list(names or []), set(types or [])
    if not names or not set(names) <= set(raw.ch_names):
        return None
    kinds = raw.get_channel_types()
    if types and not types & set(kinds):
        return None  # the error raised later lists every type the file has
    return [n for n, k in zip(raw.ch_names, kinds) if n in names or k in types]
