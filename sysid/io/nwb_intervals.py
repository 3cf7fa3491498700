"""An NWB file of ``TimeIntervals`` tables written with h5py, in the layout pynwb writes (the ``nwb`` extra).

:func:`write_nwb_intervals` writes an ``NWBFile`` whose only content is tables under ``/intervals`` (each a
``TimeIntervals``: ``start_time``, ``stop_time``, any further ``VectorData`` columns and their ``id``), the file's
notes, and the specifications of the installed NWB schema cached under ``/specifications`` (as pynwb caches them),
so readers and validators check the file against the schema it was written for.

Why not pynwb: building the same file through pynwb costs about 1.6 s of CPU (its import loads and resolves the
whole NWB schema, 1.1 s, and every object passes its argument checks, about 0.5 s more) against about 0.1 s here
(reading the schema's YAML text for the cache). The schema files are those of the installed pynwb and hdmf (found
without importing them): without pynwb there is no schema to cache and :func:`write_nwb_intervals` returns False,
as the pynwb writer did; a schema of another major version than the one this layout follows (NWB 2) falls back to
pynwb's own writer.

The layout (NWB 2.x, ``nwb.file.yaml`` and ``nwb.epoch.yaml`` of the NWB schema; ``table.yaml`` of hdmf-common):
the root group carries ``namespace = "core"``, ``neurodata_type = "NWBFile"``, ``nwb_version`` and ``object_id``;
the required groups ``acquisition``, ``analysis``, ``processing``, ``stimulus/presentation``,
``stimulus/templates`` and ``general`` exist (empty); the datasets ``identifier``, ``session_description``,
``session_start_time``, ``timestamps_reference_time`` (ISO 8601 text), ``file_create_date`` (one ISO 8601 text) and
``general/notes``. Text is variable-length UTF-8, except the dates (ASCII), as pynwb writes them.
"""

from __future__ import annotations

import importlib.util
import json
import uuid
from datetime import datetime, timezone
from functools import lru_cache
from pathlib import Path

import h5py
import numpy as np

__all__ = ["write_nwb_intervals", "IntervalColumn", "nwb_schema_available"]

_STR = h5py.string_dtype("utf-8")
_ASCII = h5py.string_dtype("ascii")
# pynwb's descriptions of the two required columns (``TimeIntervals.__columns__``)
_TIME_COLUMNS = {"start_time": "Start time of epoch, in seconds", "stop_time": "Stop time of epoch, in seconds"}
_LAYOUT_MAJOR = "2"  # the NWB schema's major version this layout follows
_EMPTY_GROUPS = ("acquisition", "analysis", "processing", "stimulus/presentation", "stimulus/templates", "general")


class IntervalColumn:
    """One column of a ``TimeIntervals`` table: ``name``, ``description`` and ``values`` (floats, or text when
    ``text``: None becomes the empty string)."""

    __slots__ = ("name", "description", "values", "text")

    def __init__(self, name: str, description: str, values, text: bool = False):
        self.name, self.description, self.text = name, description, bool(text)
        self.values = [("" if v is None else str(v)) for v in values] if text else np.asarray(values, np.float64)


def nwb_schema_available() -> bool:
    """True when the installed pynwb ships an NWB schema this writer can cache (NWB 2.x)."""
    return _schema() is not None


def write_nwb_intervals(path, tables, *, identifier: str, session_description: str, notes: str,
                        session_start_time: datetime) -> bool:
    """Write an NWB file holding ``tables`` under ``/intervals``; False (nothing written) without pynwb.

    Parameters
    ----------
    path : str or Path
        The file to write (replaced if it exists; write into a temporary folder or path for atomicity).
    tables : list of (name, description, columns)
        One ``TimeIntervals`` table each; ``columns`` a list of :class:`IntervalColumn`, the first two
        ``start_time`` and ``stop_time`` (seconds from ``session_start_time``), all of one length.
    identifier, session_description, notes : str
        The file's ``identifier``, ``session_description`` and ``general/notes``.
    session_start_time : datetime
        With a time zone; also the ``timestamps_reference_time``.

    Returns
    -------
    bool
        True when written; False when no NWB schema is installed (pynwb missing).

    Raises
    ------
    ValueError
        A table whose first columns are not ``start_time`` and ``stop_time``, or whose columns differ in length.
    """
    schema = _schema()
    if schema is None:
        return False
    if schema == "other":
        return _write_with_pynwb(path, tables, identifier, session_description, notes, session_start_time)
    for name, _description, columns in tables:
        _check_table(name, columns)
    with h5py.File(path, "w") as f:
        _write_file_fields(f, schema["core"][0], identifier, session_description, notes, session_start_time)
        group = f.create_group("intervals")
        for name, description, columns in tables:
            _write_table(group.create_group(name), "TimeIntervals", "core", description, columns)
        _write_specifications(f, schema)
    return True


def _check_table(name, columns) -> None:
    if [c.name for c in columns[:2]] != ["start_time", "stop_time"]:
        raise ValueError(f"table {name!r}: the first two columns must be start_time and stop_time; got "
                         f"{[c.name for c in columns[:2]]}.")
    lengths = {len(c.values) for c in columns}
    if len(lengths) > 1:
        raise ValueError(f"table {name!r}: columns of different lengths {sorted(lengths)}; give one value per row.")


def _typed(obj, neurodata_type: str, namespace: str) -> None:
    obj.attrs["namespace"] = namespace
    obj.attrs["neurodata_type"] = neurodata_type
    obj.attrs["object_id"] = str(uuid.uuid4())


def _write_file_fields(f, nwb_version, identifier, session_description, notes, start) -> None:
    _typed(f, "NWBFile", "core")
    f.attrs["nwb_version"] = nwb_version
    for name in _EMPTY_GROUPS:
        f.require_group(name)
    f.create_dataset("identifier", data=identifier, dtype=_STR)
    f.create_dataset("session_description", data=session_description, dtype=_STR)
    f.create_dataset("general/notes", data=notes, dtype=_STR)
    for name in ("session_start_time", "timestamps_reference_time"):
        f.create_dataset(name, data=start.isoformat(), dtype=_ASCII)
    created = datetime.now(timezone.utc).astimezone().isoformat()
    f.create_dataset("file_create_date", data=[created], dtype=_ASCII, maxshape=(1,))


def _column(group, column: IntervalColumn) -> None:
    n = len(column.values)
    data = np.array(column.values, dtype=object) if column.text else column.values
    d = group.create_dataset(column.name, data=data, dtype=_STR if column.text else np.float64,
                             maxshape=(None,), chunks=(max(n, 1),))
    d.attrs["description"] = _TIME_COLUMNS.get(column.name, column.description)
    _typed(d, "VectorData", "hdmf-common")


def _write_table(group, neurodata_type, namespace, description, columns) -> None:
    _typed(group, neurodata_type, namespace)
    group.attrs["description"] = description
    group.attrs.create("colnames", np.array([c.name for c in columns], dtype=object), dtype=_STR)
    for column in columns:
        _column(group, column)
    n = len(columns[0].values)
    ids = group.create_dataset("id", data=np.arange(n, dtype=np.int64), maxshape=(None,), chunks=(max(n, 1),))
    _typed(ids, "ElementIdentifiers", "hdmf-common")


def _write_specifications(f, schema) -> None:
    """The schema cached as pynwb caches it: ``/specifications/<namespace>/<version>/<source>`` JSON text, and the
    root's ``.specloc`` reference to the group."""
    spec = f.create_group("specifications")
    f.attrs[".specloc"] = spec.ref
    for ns_name, (version, texts) in schema.items():
        group = spec.create_group(f"{ns_name}/{version}")
        for source, text in texts.items():
            group.create_dataset(source, data=text, dtype=_STR)


@lru_cache(maxsize=1)
def _schema():
    """``{namespace: (version, {source: JSON text})}`` of the installed core, hdmf-common and hdmf-experimental
    schemas; None without pynwb; ``"other"`` for a core schema of another major version than this layout's."""
    pynwb_spec, hdmf_spec = importlib.util.find_spec("pynwb"), importlib.util.find_spec("hdmf")
    if pynwb_spec is None or hdmf_spec is None or not pynwb_spec.origin or not hdmf_spec.origin:
        return None
    core = Path(pynwb_spec.origin).parent / "nwb-schema" / "core"
    common = Path(hdmf_spec.origin).parent / "common" / "hdmf-common-schema" / "common"
    if not (core / "nwb.namespace.yaml").is_file() or not (common / "namespace.yaml").is_file():
        return None
    out = {}
    for folder, ns_file in ((core, "nwb.namespace.yaml"), (common, "namespace.yaml")):
        for ns in _load_yaml(folder / ns_file)["namespaces"]:
            out[ns["name"]] = (str(ns["version"]), _namespace_texts(folder, ns))
    if "core" not in out or out["core"][0].split(".")[0] != _LAYOUT_MAJOR:
        return "other" if "core" in out else None
    return out


def _namespace_texts(folder: Path, ns: dict) -> dict:
    """The namespace and each of its sources as hdmf caches them (``H5SpecWriter``): compact JSON, the sources named
    by their file name without ``.yaml``, the namespace's schema list naming sources and included namespaces only."""
    schema, texts = [], {}
    for item in ns["schema"]:
        if "namespace" in item:
            schema.append({"namespace": item["namespace"]})
            continue
        stem = Path(item["source"]).stem
        schema.append({"source": stem})
        texts[stem] = json.dumps(_load_yaml(folder / item["source"]), separators=(",", ":"))
    texts["namespace"] = json.dumps({"namespaces": [{**ns, "schema": schema}]}, separators=(",", ":"))
    return texts


def _load_yaml(path: Path):
    """A schema file's content: PyYAML's C loader when present (0.1 s for the whole schema), else ruamel.yaml,
    which hdmf depends on (pure Python, about 1 s)."""
    text = path.read_text(encoding="utf-8")
    try:
        import yaml
    except ImportError:
        from ruamel.yaml import YAML

        return YAML(typ="safe", pure=True).load(text)
    return yaml.load(text, Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader))


def _write_with_pynwb(path, tables, identifier, session_description, notes, start) -> bool:
    """The same tables through pynwb (an NWB schema of another major version: pynwb knows its layout)."""
    from hdmf.common import VectorData
    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.epoch import TimeIntervals

    nwb = NWBFile(session_description=session_description, identifier=identifier, session_start_time=start,
                  notes=notes)
    for name, description, columns in tables:
        _check_table(name, columns)
        if not len(columns[0].values):  # pynwb takes no empty columns: the bare table
            nwb.add_time_intervals(TimeIntervals(name=name, description=description))
            continue
        data = [VectorData(name=c.name, description=_TIME_COLUMNS.get(c.name, c.description),
                           data=list(c.values) if c.text else c.values.tolist()) for c in columns]
        nwb.add_time_intervals(TimeIntervals(name=name, description=description, columns=data,
                                             id=list(range(len(columns[0].values)))))
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)
    return True
