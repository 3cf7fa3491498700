"""A session from a lab's recording and a description: the Python side of ``stimsteer convert``.

:func:`read_recording` opens any source recognised by content (EDF/BDF, BrainVision, FIF, Neo MATLAB, NWB, a BIDS
dataset, or one of our own session files, whose trials are kept) or by the Neo IO the description names;
:func:`build_session` turns a :class:`~stimsteer.sysid.io._recording.Recording` into a
:class:`~stimsteer.sysid.session.Session` following a :class:`~stimsteer.sysid.description.Description`.
:func:`session_from_mne` and :func:`session_from_neo` do both for objects already in memory. The steps, in order:
channels onto the model grid (clock alignment with the stated anti-aliasing), pulse tables onto the grid
(:data:`stimsteer.sysid.events.PULSE_MAPPING`), bad intervals and uncovered samples masked, line noise, artifacts,
biomarkers, trials. The metadata records each.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from .artifacts import interpolate_artifacts, subtract_template
from .biomarkers import add_band_power_outputs, binned_spike_rate, remove_line_noise
from .description import Description, parse_description
from .events import (align_channel, encode_pulses, pulse_train_onsets, select_events, trials_from_events,
                     trigger_times)
from .exceptions import InvalidParameterError, SessionError
from .io._recording import Recording
from .prep import blank_artifacts
from .session import Session

__all__ = ["read_recording", "build_session", "session_from_mne", "session_from_neo", "recording_from_session"]


def read_recording(path, description: Description) -> Recording:
    """Open a recording by content (or with the Neo IO the description names).

    Raises
    ------
    FileNotFoundError, FileFormatError
    """
    from .io.detect import detect_recording

    rec_opts = description.recording
    if rec_opts.get("neo_io"):
        from .io.neo import read_neo_file
        return read_neo_file(path, io=str(rec_opts["neo_io"]), segment=int(rec_opts.get("segment", 0)))
    kind = _session_kind(path)
    if kind is not None:
        from .io import load_session
        return recording_from_session(load_session(path), source=str(path))
    kind = detect_recording(path)
    if kind in ("edf", "bdf", "brainvision", "fif"):
        from .io.mne import read_mne_file
        return read_mne_file(path, kind, names=_named_channels(description),
                             types=description.channels.get("output_types"))
    if kind == "neo-matlab":
        from .io.neo import read_neo_file
        return read_neo_file(path, io="NeoMatlabIO", segment=int(rec_opts.get("segment", 0)))
    if kind == "nwb":
        from .io.nwb import read_nwb_recording
        return read_nwb_recording(path)
    from .io.bids import read_bids
    entities = rec_opts.get("bids")
    if not isinstance(entities, dict) or "subject" not in entities or "task" not in entities:
        raise InvalidParameterError(f"{path} is a BIDS dataset: name the recording in the description with "
                                    "[recording] bids = {subject = ..., task = ...} (and session, run, acquisition "
                                    "when the dataset has them).")
    return read_bids(path, **{k: (str(v) if v is not None else None) for k, v in entities.items()})


def _named_channels(desc: Description) -> list[str]:
    """The channels a description reads by name (inputs, outputs, a trigger); empty when it names no input or no
    output (then every channel is read)."""
    ch = desc.channels
    inputs, outputs = list(ch.get("inputs") or []), list(ch.get("outputs") or [])
    if not inputs and not desc.pulses:
        return []
    if not outputs and not ch.get("output_types"):
        return []
    trigger = [str(desc.trials["trigger"])] if "trigger" in (desc.trials or {}) else []
    return inputs + outputs + trigger


def _session_kind(path) -> str | None:
    from .io.detect import detect_format
    from .exceptions import FileFormatError

    try:
        kind = detect_format(path)
    except (FileFormatError, OSError):
        return None
    return kind if kind in ("hdf5", "csv", "parquet") else None


def recording_from_session(session: Session, *, source: str = "session") -> Recording:
    """A session file seen as a recording (so a description can re-select channels, remove artifacts, add
    biomarkers): every input and output is a channel on the session's grid (a read-only view of its column, not a
    copy), masked runs are bad intervals, blanked outputs stay blanked, and the trials are kept (used when the
    description has no ``[trials]``)."""
    from .io._recording import Channel

    rate, t0 = session.sample_rate_hz, float(session.metadata.get("start_time_s", 0.0))
    chans = [Channel(n, session.u[:, j], unit, rate, t0, "input")
             for j, (n, unit) in enumerate(zip(session.input_names, session.input_units))]
    chans += [Channel(n, session.y[:, j], unit, rate, t0, "output")
              for j, (n, unit) in enumerate(zip(session.output_names, session.output_units))]
    meta = {"format": "stimsteer-session", "source": source, "session_trials": session.trials.tolist(),
            "session_metadata": dict(session.metadata)}
    return Recording(channels=tuple(chans), bad_intervals=_runs_s(~session.mask, t0, rate), metadata=meta,
                     blanked_outputs=_runs_s(~session.output_mask, t0, rate))


def _runs_s(flags: np.ndarray, t0: float, rate: float) -> list:
    """The runs of True in ``flags`` as ``[start_s, stop_s)`` intervals."""
    edges = np.flatnonzero(np.diff(np.concatenate(([0], flags.astype(np.int8), [0]))))
    return [(t0 + a / rate, t0 + b / rate) for a, b in zip(edges[::2], edges[1::2])]


# ==================================================================================================== the grid
def _grid(rec: Recording, desc: Description) -> tuple[float, float, int]:
    first = rec.channel(desc.channels["outputs"][0])
    rate = float(desc.grid.get("sample_rate_hz", first.sample_rate_hz))
    if not (math.isfinite(rate) and rate > 0):
        raise InvalidParameterError(f"[grid] sample_rate_hz must be a positive number of Hz; got {rate}.")
    outs = [rec.channel(n) for n in desc.channels["outputs"]]
    t0 = max(c.start_time_s for c in outs)
    t1 = min(c.stop_time_s for c in outs)
    n = int(math.floor((t1 - t0) * rate + 1e-6))
    if n < 1:
        raise SessionError(f"the outputs {desc.channels['outputs']} share no common time span; check their start "
                           "times.")
    return rate, t0, n


def _unit_factor(src: str, dst: str | None, name: str) -> tuple[float, str]:
    if dst is None or dst == src:
        return 1.0, src
    try:
        import quantities as pq
        return float(pq.Quantity(1.0, src).rescale(dst).magnitude), dst
    except ImportError:
        raise InvalidParameterError("unit conversion needs the optional package quantities; "
                                    'pip install "stimsteer[neo]", or remove output_unit/input_unit.') from None
    except Exception as exc:  # quantities raises ValueError, LookupError or SyntaxError for unknown units
        raise SessionError(f"channel '{name}' is in '{src}', which cannot be converted to '{dst}' ({exc}); fix "
                           "the unit in the description or the file.") from None


def _on_grid(rec: Recording, names, grid, desc: Description, side: str, out: np.ndarray):
    """The named channels onto the grid, into the columns of ``out`` (window by window: see
    :func:`~stimsteer.sysid.events.align_channel`); samples outside a channel's span become 0 and uncovered."""
    rate, t0, n = grid
    how = desc.grid.get(f"{side}_anti_aliasing", "fir" if side == "output" else "mean")
    offsets = desc.grid.get("clock_offset_s", {})
    units, covered, aligned = [], np.ones(n, dtype=bool), []
    for j, name in enumerate(names):
        ch = rec.channel(name)
        col = out[:, j]
        _v, cov, align = align_channel(ch.data, source_rate_hz=ch.sample_rate_hz, source_start_s=ch.start_time_s,
                                       target_rate_hz=rate, target_start_s=t0, n_target=n,
                                       offset_s=float(offsets.get(name, 0.0)), anti_aliasing=how, name=name,
                                       out=col)
        factor, unit = _unit_factor(ch.unit, desc.channels.get(f"{side}_unit"), name)
        if factor != 1.0:
            col *= factor
        # samples outside a channel's span are NaN after alignment; they are masked, and 0 keeps filters finite
        col[~cov] = 0.0
        units.append(unit)
        covered &= cov
        aligned.append(align.to_dict())
    return units, covered, aligned


def _pulses(rec: Recording, desc: Description, grid) -> tuple[list, list, list, dict | None]:
    p = desc.pulses
    if not p:
        return [], [], [], None
    rows = _pulse_rows(rec, desc)
    described = _stimulation(desc)  # [pulses] stimulation = "<description.toml>": the declared mapping
    sites = [str(s) for s in p.get("sites", described.names if described else sorted({str(r["site"]) for r in rows}))]
    rate, t0, n = grid
    u, record = encode_pulses(rows, sites, sample_rate_hz=rate, n_samples=n, start_time_s=t0,
                              offset_s=float(p.get("clock_offset_s", 0.0)), stimulation=described)
    if described is not None:
        return [u[:, j] for j in range(len(sites))], sites, list(record["model_units"]), record
    unit = str(p.get("unit", rows[0].get("unit", "a.u.") if rows else "a.u."))
    return [u[:, j] for j in range(len(sites))], sites, [unit] * len(sites), {**record, "unit": unit}


def _stimulation(desc: Description):
    """The stimulation description named by ``[pulses] stimulation`` (relative to the description file), or None."""
    name = desc.pulses.get("stimulation")
    if name is None:
        return None
    from .stimulation import load_stimulation

    return load_stimulation(desc.folder / str(name))


def _pulse_rows(rec: Recording, desc: Description) -> list[dict]:
    p = desc.pulses
    if p.get("from_recording"):
        if not rec.pulses:
            raise SessionError("[pulses] from_recording = true, but the recording carries no stimulation pulses "
                               "(a BIDS events.tsv needs electrical_stimulation_site and _current columns).")
        return list(rec.pulses)
    if "file" not in p:
        raise InvalidParameterError("[pulses] needs file = \"<table.csv>\" or from_recording = true.")
    import pandas as pd

    path = (desc.folder / str(p["file"]))
    table = pd.read_csv(path)
    missing = [c for c in ("time_s", "site", "amplitude") if c not in table.columns]
    if missing:
        raise SessionError(f"{path}: the pulse table lacks column(s) {missing}; it has {list(table.columns)}.")
    return table.to_dict("records")


# ==================================================================================================== steps
def _base_session(rec: Recording, desc: Description, source: str) -> tuple[Session, dict]:
    grid = _grid(rec, desc)
    rate, t0, n = grid
    outputs, inputs = list(desc.channels["outputs"]), list(desc.channels["inputs"])
    # the session's arrays are allocated once and filled in place: the recording is read window by window
    y_arr = np.empty((n, len(outputs)))
    y_units, y_cov, y_align = _on_grid(rec, outputs, grid, desc, "output", y_arr)
    for name in inputs:
        rec.channel(name)  # a missing input is reported before the pulse table is read, as before
    pu, sites, p_units, mapping = _pulses(rec, desc, grid)
    u_arr = np.empty((n, len(inputs) + len(pu)))
    u_units, u_cov, u_align = _on_grid(rec, inputs, grid, desc, "input", u_arr)
    for j, col in enumerate(pu):
        u_arr[:, len(inputs) + j] = col
    del pu
    u_arr.setflags(write=False)  # handed to the session without a copy (Session keeps frozen arrays as they are)
    y_arr.setflags(write=False)
    mask, shown = y_cov & u_cov, np.ones(n, dtype=bool)
    for flags, intervals in ((mask, rec.bad_intervals), (shown, rec.blanked_outputs)):
        for a, b in intervals:
            lo, hi = max(0, math.ceil((a - t0) * rate - 1e-6)), min(n, math.ceil((b - t0) * rate - 1e-6))
            flags[lo:hi] = False
    meta = {"source": {**rec.metadata, "path": source}, "description": desc.as_dict(),
            "clock_alignment": u_align + y_align, "start_time_s": t0, "n_bad_intervals": len(rec.bad_intervals)}
    if mapping is not None:
        meta["pulse_mapping"] = mapping
        if "description" in mapping:
            meta["stimulation"] = mapping
    session = Session(u=u_arr, y=y_arr, sample_rate_hz=rate, mask=mask, output_mask=shown,
                      input_names=list(desc.channels["inputs"]) + sites, output_names=list(desc.channels["outputs"]),
                      input_units=u_units + p_units, output_units=y_units, metadata=meta)
    return session, {"grid": grid}


def _apply_artifacts(session: Session, spec: dict) -> Session:
    if not spec:
        return session
    method = spec.get("method")
    kw = {"window_s": spec.get("window_s"), "threshold": float(spec.get("threshold", 0.0))}
    if kw["window_s"] is None:
        raise InvalidParameterError("[artifacts] needs window_s, the artifact's length in seconds.")
    if method == "template":
        return subtract_template(session, scale=str(spec.get("scale", "amplitude")), **kw)
    if method == "interpolate":
        return interpolate_artifacts(session, **kw)
    if method == "blank":
        return blank_artifacts(session, window_s=kw["window_s"], onset_threshold=kw["threshold"])
    raise InvalidParameterError(f"[artifacts] method must be 'blank', 'template' or 'interpolate'; got {method!r}.")


def _apply_biomarkers(session: Session, rec: Recording, specs: list, grid) -> Session:
    for spec in specs:
        kind = spec.get("kind")
        if kind == "band_power":
            session = add_band_power_outputs(
                session, channels=spec.get("channels", []), band_hz=spec.get("band_hz"), phase=spec.get("phase"),
                names=spec.get("names"), order=int(spec.get("order", 4)), smoothing_hz=spec.get("smoothing_hz"),
                keep_source=bool(spec.get("keep_source", True)))
        elif kind == "spike_rate":
            session = _add_rates(session, rec, spec, grid)
        else:
            raise InvalidParameterError(f"[[biomarkers]] kind must be 'band_power' or 'spike_rate'; got {kind!r}.")
    return session


def _add_rates(session: Session, rec: Recording, spec: dict, grid) -> Session:
    rate, t0, n = grid
    units = [spec["units"]] if isinstance(spec.get("units"), str) else list(spec.get("units", []))
    missing = [x for x in units if x not in rec.spike_times]
    if missing or not units:
        raise SessionError(f"spike units {missing or units} are not in the recording; it has "
                           f"{sorted(rec.spike_times) or 'no spike trains'}.")
    names = list(spec.get("names", [f"{x}_rate" for x in units]))
    rates = [binned_spike_rate(rec.spike_times[x], sample_rate_hz=rate, n_samples=n, start_time_s=t0) for x in units]
    derived = dict(session.metadata.get("derived_outputs", {}))
    for x, name in zip(units, names):
        derived[name] = {"kind": "spike_rate", "source": x, "unit": "Hz",
                         "definition": "spike count in [t_k, t_k + 1/rate) times the rate"}
    return session.replace(y=np.column_stack([session.y] + rates), output_names=session.output_names + tuple(names),
                           output_units=session.output_units + ("Hz",) * len(names),
                           metadata={**session.metadata, "derived_outputs": derived})


def _trial_times(session: Session, rec: Recording, spec: dict, grid) -> np.ndarray:
    if "events" in spec:
        return select_events(rec.events, spec["events"])
    if "trigger" in spec:
        if "threshold" not in spec:
            raise InvalidParameterError("[trials] trigger needs threshold, in the trigger channel's unit.")
        ch = rec.channel(str(spec["trigger"]))
        return trigger_times(ch.data, sample_rate_hz=ch.sample_rate_hz, threshold=spec["threshold"],
                             start_time_s=ch.start_time_s, min_interval_s=float(spec.get("min_interval_s", 0.0)))
    if "pulse_trains_gap_s" in spec:
        rate, t0, _n = grid
        k = np.flatnonzero(np.any(session.u != 0, axis=1))
        if k.size == 0:
            raise SessionError("[trials] pulse_trains_gap_s: the inputs never deliver a pulse.")
        return pulse_train_onsets(t0 + k / rate, gap_s=float(spec["pulse_trains_gap_s"]))
    raise InvalidParameterError("[trials] needs events = [labels], trigger = \"channel\" with threshold, or "
                                "pulse_trains_gap_s.")


def _apply_trials(session: Session, rec: Recording, spec: dict, grid) -> Session:
    if not spec:
        kept = rec.metadata.get("session_trials")
        same_grid = kept is not None and session.metadata.get("start_time_s", 0.0) == rec.channels[0].start_time_s \
            and session.sample_rate_hz == rec.channels[0].sample_rate_hz
        return session.replace(trials=kept) if same_grid else session
    rate, t0, n = grid
    if "before_s" not in spec or "after_s" not in spec:
        raise InvalidParameterError("[trials] needs before_s and after_s, the window around each event in seconds.")
    windows = trials_from_events(_trial_times(session, rec, spec, grid), sample_rate_hz=rate, n_samples=n,
                                 start_time_s=t0, before_s=spec["before_s"], after_s=spec["after_s"],
                                 overlap=str(spec.get("overlap", "merge")))
    return session.replace(trials=windows.trials,
                           metadata={**session.metadata, "trials_from_events": windows.to_dict()})


def _resolved(rec: Recording, desc: Description) -> Description:
    """The description with ``output_types`` expanded into output names (recording order, inputs excluded)."""
    import dataclasses

    types = desc.channels.get("output_types") or []
    if not types:
        return desc
    taken = set(desc.channels["outputs"]) | set(desc.channels["inputs"])
    extra = [c.name for c in rec.channels if c.kind in types and c.name not in taken]
    if not extra and not desc.channels["outputs"]:
        raise SessionError(f"no channel of the types {types} in the recording; it has the types "
                           f"{sorted({c.kind for c in rec.channels})}. Fix [channels] output_types.")
    return dataclasses.replace(desc, channels={**desc.channels, "outputs": list(desc.channels["outputs"]) + extra})


def build_session(recording: Recording, description: Description, *, source: str = "") -> Session:
    """A session from a recording, following a description (see the module docstring).

    Raises
    ------
    SessionError
        A channel the recording lacks (the ones it has are listed), events that match nothing, windows outside the
        recording, clocks that do not overlap, units that cannot be converted.
    InvalidParameterError
        A description value of the wrong kind.
    """
    description = _resolved(recording, description)
    session, ctx = _base_session(recording, description, source)
    ln = description.line_noise
    if ln:
        session = remove_line_noise(session, line_hz=float(ln.get("line_hz", 50.0)), phase=ln.get("phase"),
                                    harmonics=int(ln.get("harmonics", 3)), quality=float(ln.get("quality", 30.0)))
    session = _apply_artifacts(session, description.artifacts)
    session = _apply_biomarkers(session, recording, description.biomarkers, ctx["grid"])
    return _apply_trials(session, recording, description.trials, ctx["grid"])


def session_from_mne(raw, description) -> Session:
    """A session from an MNE ``Raw`` object and a description (a :class:`Description` or a dict of its tables)."""
    from .io.mne import recording_from_mne
    desc = description if isinstance(description, Description) else parse_description(description)
    return build_session(recording_from_mne(raw), desc, source="mne.io.Raw")


def session_from_neo(block, description, *, segment: int = 0) -> Session:
    """A session from a Neo ``Block`` (or ``Segment``) and a description."""
    from .io.neo import recording_from_neo
    desc = description if isinstance(description, Description) else parse_description(description)
    return build_session(recording_from_neo(block, segment=segment), desc, source="neo.Block")


# Session.from_mne / Session.from_neo: attached here (this module is imported with the package) because the
# session module cannot import this one back without an import cycle.
def _from_mne(cls, raw, description) -> Session:
    """A session from an MNE ``Raw`` object and a description (a dict of its tables, or a parsed one): see
    :func:`stimsteer.sysid.from_recording.session_from_mne`."""
    return session_from_mne(raw, description)


def _from_neo(cls, block, description, *, segment: int = 0) -> Session:
    """A session from a Neo ``Block`` (or ``Segment``) and a description: see
    :func:`stimsteer.sysid.from_recording.session_from_neo`."""
    return session_from_neo(block, description, segment=segment)


Session.from_mne = classmethod(_from_mne)
Session.from_neo = classmethod(_from_neo)
