"""Sessions in NWB files (the ``nwb`` extra).

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

import json
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from ..exceptions import FileFormatError, StimsteerError
from ..session import Session
from ._common import _as_session, _metadata_json
from .tables import _start_time_s, _time_grid


_NWB_HINT = 'install the optional NWB support with: pip install "stimsteer[nwb]"'


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
        raise FileFormatError(f"{path} is an NWB file without {kind} TimeSeries in {where}; stimsteer reads the "
                              "stimulation inputs from the stimulus group and the recorded outputs from acquisition. "
                              "For series elsewhere (processing modules) or at other rates, name them in a "
                              "description and build the session with `stimsteer convert`.")
    if order is not None and sorted(order) == sorted(ts.name for ts in series):
        series.sort(key=lambda ts: order.index(ts.name))
    out = []
    for ts in series:
        data = _converted(ts)
        names = [ts.name] if data.shape[1] == 1 else [f"{ts.name}_{j}" for j in range(data.shape[1])]
        out.append({"name": ts.name, "data": data, "names": names, "unit": str(ts.unit),
                    "timing": _nwb_timing(ts, data.shape[0], path)})
    return out


def _converted(ts) -> np.ndarray:
    """The series' values in its unit: ``data · conversion · channel_conversion + offset`` (NWB 2 schema,
    TimeSeries.data and ElectricalSeries.channel_conversion), time-major 2-D."""
    data = np.asarray(ts.data[()], dtype=np.float64)
    data = data.reshape(data.shape[0], -1) * float(ts.conversion)
    per_channel = getattr(ts, "channel_conversion", None)
    if per_channel is not None:
        data = data * np.asarray(per_channel[()], dtype=np.float64).reshape(1, -1)
    return data + float(getattr(ts, "offset", 0.0) or 0.0)


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
                "Build the session with `stimsteer convert` and a description, which aligns them onto one grid."
            )
    return rate, t0, n


# ==================================================================================================== recording
def _electrode_labels(ts) -> tuple[list | None, list | None]:
    region = getattr(ts, "electrodes", None)
    if region is None:
        return None, None
    table = region.table
    rows = np.asarray(region.data[()], dtype=np.int64).reshape(-1)
    cols = set(table.colnames)
    ids = np.asarray(table.id[()])[rows]
    labels = ([str(table["label"][int(r)]) for r in rows] if "label" in cols else [f"e{int(i)}" for i in ids])
    locations = [str(table["location"][int(r)]) for r in rows] if "location" in cols else None
    return labels, locations


def _series_channels(ts, kind: str, path: Path) -> tuple[list, dict]:
    from ._recording import Channel

    columns = _lazy_columns(ts, path)
    if columns is None:  # data held in memory (not an HDF5 dataset of the file): converted whole
        data = _converted(ts)
        columns = [data[:, j].copy() for j in range(data.shape[1])]
    rate, t0 = _nwb_timing(ts, columns[0].shape[0], path)
    labels, locations = _electrode_labels(ts)
    if labels is None or len(labels) != len(columns):
        labels = [ts.name] if len(columns) == 1 else [f"{ts.name}_{j}" for j in range(len(columns))]
    unit = {"volts": "V", "amperes": "A"}.get(str(ts.unit), str(ts.unit))
    chans = [Channel(name=n, data=columns[j], unit=unit, sample_rate_hz=rate, start_time_s=t0, kind=kind)
             for j, n in enumerate(labels)]
    info = {"series": ts.name, "kind": kind, "channels": labels, "conversion": float(ts.conversion),
            "offset": float(getattr(ts, "offset", 0.0) or 0.0),
            "channel_conversion": (np.asarray(ts.channel_conversion[()]).tolist()
                                   if getattr(ts, "channel_conversion", None) is not None else None)}
    if locations is not None:
        info["locations"] = locations
    return chans, info


def _lazy_columns(ts, path: Path) -> list | None:
    """The series' channels as :class:`~stimsteer.sysid.io._recording.LazySamples` reading windows of its HDF5
    dataset (the file reopened per window, after pynwb has closed it), converted as :func:`_converted` does; None
    when the data are not a dataset of ``path``."""
    import h5py

    from ._recording import LazySamples

    ds = ts.data
    if not isinstance(ds, h5py.Dataset) or ds.ndim not in (1, 2) or ds.shape[0] == 0:
        return None
    where, n, width = ds.name, int(ds.shape[0]), 1 if ds.ndim == 1 else int(ds.shape[1])
    conversion, offset = float(ts.conversion), float(getattr(ts, "offset", 0.0) or 0.0)
    per = getattr(ts, "channel_conversion", None)
    per = np.asarray(per[()], dtype=np.float64).reshape(-1) if per is not None else None

    def column(j: int):
        def read(start: int, stop: int) -> np.ndarray:
            with h5py.File(path, "r") as f:
                x = np.asarray(f[where][start:stop], dtype=np.float64).reshape(stop - start, -1)[:, j]
            x = x * conversion  # the order of _converted, so the values agree to the last bit
            return (x * per[j] if per is not None else x) + offset
        return read

    return [LazySamples(n, column(j)) for j in range(width)]


def _all_series(nwb):
    import pynwb

    for ts in nwb.stimulus.values():
        if isinstance(ts, pynwb.TimeSeries):
            yield ts, "stimulus"
    for obj in nwb.acquisition.values():
        yield from _unpack(obj, "acquisition")
    for name, module in nwb.processing.items():
        for obj in module.data_interfaces.values():
            yield from _unpack(obj, f"processing/{name}")


def _unpack(obj, kind: str):
    import pynwb

    if isinstance(obj, pynwb.TimeSeries):
        yield obj, kind
    elif hasattr(obj, "electrical_series"):  # LFP / FilteredEphys containers
        for ts in obj.electrical_series.values():
            yield ts, kind


def _interval_events(nwb) -> tuple[list, list]:
    events, bad = [], []
    tables = [("trials", nwb.trials), ("epochs", nwb.epochs)]
    tables += [(name, t) for name, t in (nwb.intervals or {}).items() if name not in ("trials", "epochs",
                                                                                       "invalid_times")]
    for name, table in tables:
        if table is None or len(table) == 0:
            continue
        frame = table.to_dataframe()
        for _, row in frame.iterrows():
            tags = row.get("tags") if "tags" in frame.columns else None
            label = str(tags[0]) if tags is not None and len(tags) else name
            events.append({"time_s": float(row["start_time"]), "label": label,
                           "duration_s": float(row["stop_time"] - row["start_time"]), "table": name})
    if nwb.invalid_times is not None and len(nwb.invalid_times):
        frame = nwb.invalid_times.to_dataframe()
        bad = [(float(a), float(b)) for a, b in zip(frame["start_time"], frame["stop_time"])]
    return sorted(events, key=lambda e: e["time_s"]), bad


def read_nwb_recording(path) -> "Recording":
    """Every series of an NWB file as a :class:`~stimsteer.sysid.io._recording.Recording`.

    Series come from ``/stimulus/presentation``, ``/acquisition`` and every ``processing`` module (LFP and other
    ElectricalSeries containers included), each on its own rate and start time, with
    ``data · conversion · channel_conversion + offset`` applied; ElectricalSeries channels are named by the
    electrodes table's ``label`` column (else ``e<id>``) and their locations are kept in the metadata. The
    trials, epochs and other interval tables give events (label: the first tag, else the table's name), and
    ``invalid_times`` gives bad intervals.

    Raises
    ------
    FileFormatError
        pynwb missing, or the file unreadable.

    Notes
    -----
    A channel name used by two series (the same electrode in the raw series and in a processed LFP) becomes
    ``<series>.<name>`` in both.
    """
    from ._recording import Recording

    path = Path(path)
    pynwb = _import_pynwb(path, "read")
    try:
        with pynwb.NWBHDF5IO(str(path), "r") as io:
            nwb = io.read()
            chans, infos = [], []
            for ts, kind in _all_series(nwb):
                c, info = _series_channels(ts, kind, path)
                chans += [(ts.name, ch) for ch in c]
                infos.append(info)
            events, bad = _interval_events(nwb)
            ident = str(nwb.identifier)
    except StimsteerError:
        raise
    except Exception as exc:  # pynwb / hdmf raise many unrelated classes for files they cannot build
        raise FileFormatError(f"{path} cannot be read as an NWB file ({type(exc).__name__}: {exc}).") from None
    chans = _distinct_names(chans)
    meta = {"format": "nwb", "file": path.name, "nwb_identifier": ident, "series": infos,
            "pynwb_version": pynwb.__version__}
    return Recording(channels=tuple(chans), events=events, bad_intervals=bad, metadata=meta)


def _distinct_names(pairs) -> list:
    import dataclasses

    names = [c.name for _, c in pairs]
    return [dataclasses.replace(c, name=f"{series}.{c.name}") if names.count(c.name) > 1 else c
            for series, c in pairs]
