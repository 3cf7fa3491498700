"""Sessions as CSV or Parquet tables, one row per sample.

CSV and Parquet table layout (version 1)
----------------------------------------
One row per sample, on a uniform time grid, in this column syntax (the same header strings in both containers):

=============================  ======================================================================
column header                  content
=============================  ======================================================================
``time [s]``                   required; sample time in seconds. The header may carry the exact rate:
``time [s] @ 1000 Hz``         then every time stamp must lie within 0.1 sample of ``t0 + k / rate``;
                               without it the rate is ``(T - 1) / (t_last - t0)`` rounded to 9
                               significant digits and the same grid check applies. A ``t0`` other than
                               0 is kept in the metadata as ``start_time_s``.
``trial``                      required; integer trial label of the row. Rows with the same label form
                               one trial and must be contiguous; labels are otherwise free. An empty cell
                               or a negative label marks a row outside every trial (allowed, e.g. the
                               gaps between trials).
``valid``                      optional; 1/0 or true/false, 1 = valid sample. Default: all valid.
``condition``                  optional; a text label of the trial's condition (``"off"``, ``"130Hz"``),
                               the same on every row of a trial (empty outside trials). It becomes the
                               metadata key ``trial_conditions``, one label per trial, which
                               ``fit --conditions`` and ``network --conditions`` read.
``in:<name> [<unit>]``         one column per stimulation input, e.g. ``in:site_a [uA]``
``out:<name> [<unit>]``        one column per recorded output, e.g. ``out:lfp_1 [mV]``; at least one
=============================  ======================================================================

Channel names may not contain square brackets and the unit is required (``[a.u.]`` for arbitrary units); any
other column is refused, so a misspelt header is caught. Lines before the header that start with ``#`` are
comments and are skipped (schedule files open with the caution there). An empty cell (or ``nan``) in a channel
column marks its row as a masked sample, with or without a ``valid`` column (the rows so masked are counted per
channel in the metadata key ``masked_empty_cells``). The writer
emits ``time [s] @ <rate> Hz``, the label ``-1`` outside trials, and ``valid`` as 1/0; numbers are written in
the shortest form that reads back to the identical float64. Parquet files also store the layout name, version
and the metadata JSON in the schema metadata keys ``stimsteer_layout``, ``stimsteer_layout_version`` and
``stimsteer_metadata``; CSV files store the metadata JSON on a first comment line, ``# stimsteer-metadata: {...}``.
"""

from __future__ import annotations

import csv
import json
import math
import re
from pathlib import Path

import numpy as np

from ..exceptions import FileFormatError
from .._headers import CHANNEL_RE as _CHANNEL_RE, TIME_RE as _TIME_RE
from ..session import Session
from ._common import LAYOUT_VERSION, _as_session, _metadata_json


_TABLE_LAYOUT = "stimsteer-table"
_CSV_METADATA = "# stimsteer-metadata: "  # a CSV table's comment line holding the session metadata (JSON)
_ROLE_RE = re.compile(r"^\s*(in|out)\s*:")
_CONDITIONS_KEY = "trial_conditions"  # the metadata key of one condition label per trial (sysid.conditions)


# ==================================================================================================== tables
def _format_rate(rate: float) -> str:
    return np.format_float_positional(rate, trim="-")


def _channel_header(role: str, name: str, unit: str) -> str:
    header = f"{role}:{name} [{unit}]"
    m = _CHANNEL_RE.match(header)
    if m is None or (m["name"], m["unit"].strip()) != (name, unit):
        raise FileFormatError(
            f"channel {name!r} with unit {unit!r} cannot be written as a table header '{role}:<name> [<unit>]' "
            "(square brackets and leading/trailing spaces are not allowed there); rename the channel or save "
            "as .h5."
        )
    return header


def _start_time_s(metadata) -> float:
    t0 = metadata.get("start_time_s", 0.0)
    return float(t0) if isinstance(t0, (int, float)) and math.isfinite(t0) else 0.0


def _table_columns(session: Session) -> dict:
    if session.n_outputs == 0:
        raise FileFormatError("the table layout needs at least one output channel; this session has none. "
                              "Save it as .h5.")
    if not session.output_mask.all():  # a table has one validity column; blanked outputs would be lost silently
        raise FileFormatError(f"the table layout cannot keep blanked outputs ({int((~session.output_mask).sum())} "
                              "samples blanked by blank_artifacts); save the session as .h5, which keeps them.")
    rate = session.sample_rate_hz
    label = np.full(session.n_samples, -1, dtype=np.int64)
    for i, (a, b) in enumerate(session.trials):
        label[a:b] = i
    cols = {
        f"time [s] @ {_format_rate(rate)} Hz": _start_time_s(session.metadata) + np.arange(session.n_samples) / rate,
        "trial": label,
        "valid": session.mask.astype(np.int64),
    }
    conditions = session.metadata.get(_CONDITIONS_KEY)
    if conditions is not None and len(conditions) == session.n_trials:
        cols["condition"] = np.full(session.n_samples, "", dtype=object)
        for c, (a, b) in zip(conditions, session.trials):
            cols["condition"][a:b] = str(c)
    for role, data, names, units in (("in", session.u, session.input_names, session.input_units),
                                      ("out", session.y, session.output_names, session.output_units)):
        for j, (name, unit) in enumerate(zip(names, units)):
            cols[_channel_header(role, name, unit)] = np.asarray(data[:, j], dtype=np.float64)
    return cols


def _write_csv(session: Session, tmp: Path) -> None:
    import pandas as pd

    cols = _table_columns(session)
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        if session.metadata:
            fh.write(f"{_CSV_METADATA}{_metadata_json(session.metadata)}\n")
        pd.DataFrame(cols).to_csv(fh, index=False)


def _write_parquet(session: Session, tmp: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    cols = _table_columns(session)
    meta = {
        "stimsteer_layout": _TABLE_LAYOUT,
        "stimsteer_layout_version": str(LAYOUT_VERSION),
        "stimsteer_metadata": _metadata_json(session.metadata),
    }
    table = pa.table({k: pa.array(v) for k, v in cols.items()}).replace_schema_metadata(meta)
    pq.write_table(table, tmp)


def comment_lines(path) -> int:
    """Number of leading lines of a CSV table that start with ``#`` (comments before the header, e.g. the
    caution that ``stimsteer schedule`` writes); readers pass it to ``pandas.read_csv(skiprows=...)``."""
    n = 0
    with open(path, encoding="utf-8-sig", errors="replace") as fh:
        for line in fh:
            if not line.startswith("#"):
                break
            n += 1
    return n


def _csv_metadata(line: str, path: Path) -> dict:
    text = line[len(_CSV_METADATA):].strip()
    try:
        meta = json.loads(text)
    except json.JSONDecodeError as exc:
        raise FileFormatError(f"{path}: the comment line '{_CSV_METADATA.strip()} ...' must hold one JSON object "
                              f"({exc}); repair it or delete the line.") from None
    if not isinstance(meta, dict):
        raise FileFormatError(f"{path}: the comment line '{_CSV_METADATA.strip()} ...' must hold a JSON object; "
                              f"found {type(meta).__name__}.")
    return meta


def _read_csv_frame(path: Path):
    import pandas as pd

    skip = comment_lines(path)
    metadata = {}
    with open(path, newline="", encoding="utf-8-sig") as fh:
        for _ in range(skip):
            line = fh.readline()
            if line.startswith(_CSV_METADATA):
                metadata = _csv_metadata(line, path)
        try:
            header = next(csv.reader(fh), [])
        except (csv.Error, UnicodeDecodeError) as exc:
            raise FileFormatError(f"{path} is not a readable CSV table ({exc}).") from None
    _parse_header(header, path)  # fail fast, before the data are parsed
    # pandas < 3 parses floats exactly only with the round-trip parser; pandas 3 does so by default.
    extra = {"float_precision": "round_trip"} if int(pd.__version__.split(".")[0]) < 3 else {}
    try:
        return pd.read_csv(path, encoding="utf-8-sig", skiprows=skip, **extra), metadata
    except (pd.errors.ParserError, ValueError) as exc:
        raise FileFormatError(f"{path} is not a readable CSV table: {exc}") from None


def _read_parquet_frame(path: Path):
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except Exception as exc:  # pyarrow raises several unrelated classes for damaged files
        raise FileFormatError(f"{path} cannot be read as Parquet ({type(exc).__name__}: {exc}).") from None
    raw = table.schema.metadata or {}
    meta = {}
    if b"stimsteer_metadata" in raw:
        version = int(raw.get(b"stimsteer_layout_version", b"1"))
        if version > LAYOUT_VERSION:
            raise FileFormatError(f"{path} uses table layout version {version}; this stimsteer reads version "
                                  f"{LAYOUT_VERSION}. Upgrade stimsteer.")
        try:
            meta = json.loads(raw[b"stimsteer_metadata"].decode("utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise FileFormatError(f"{path}: the schema metadata 'stimsteer_metadata' is not JSON ({exc}).") from None
    return table.to_pandas(), meta


_TABLE_EXPECTED = ("'time [s]' (optionally 'time [s] @ <rate> Hz'), 'trial', optional 'valid' and 'condition', "
                   "and channel "
                   "columns 'in:<name> [<unit>]' / 'out:<name> [<unit>]'")


def _parse_header(columns, path: Path) -> dict:
    columns = [str(c) for c in columns]
    dupes = sorted({c for c in columns if columns.count(c) > 1})
    if dupes:
        raise FileFormatError(f"{path}: column headers must be unique; found duplicates {dupes}.")
    out = {"time": None, "rate": None, "trial": None, "valid": None, "condition": None, "in": [], "out": []}
    unknown = []
    for col in columns:
        t, ch = _TIME_RE.match(col), _CHANNEL_RE.match(col)
        if t is not None:
            out["time"], out["rate"] = col, t["rate"]
        elif col.strip() in ("trial", "valid", "condition"):
            out[col.strip()] = col
        elif ch is not None:
            if not ch["name"] or not ch["unit"].strip():
                raise FileFormatError(f"{path}: column {col!r} needs a channel name and a unit, as in "
                                      "'out:lfp_1 [mV]' (use [a.u.] for arbitrary units).")
            out[ch["role"]].append((col, ch["name"], ch["unit"].strip()))
        elif col.strip().lower() in ("time", "time_s", "time (s)"):
            raise FileFormatError(f"{path}: column {col!r} looks like the time column but has no unit; write it as "
                                  "'time [s]' (optionally 'time [s] @ <rate> Hz').")
        elif _ROLE_RE.match(col):
            raise FileFormatError(f"{path}: column {col!r} has no unit; units are required in this layout. "
                                  f"Write it as '{col.strip()} [<unit>]' (use [a.u.] for arbitrary units).")
        else:
            unknown.append(col)
    missing = [k for k in ("time", "trial") if out[k] is None] + ([] if out["out"] else ["out:<name> [<unit>]"])
    if unknown or missing:
        raise FileFormatError(
            f"{path} is not a stimsteer session table: expected columns {_TABLE_EXPECTED}; found {columns}"
            + (f"; missing {missing}" if missing else "") + (f"; not recognised {unknown}" if unknown else "")
            + ". Rename the columns to this layout."
        )
    return out


def _data_row(row: int) -> str:
    """A 0-based row of the data as people count it: from 1, after the header (and any comment lines)."""
    return f"data row {row + 1} (counted from 1 after the header)"


def _numeric(frame, col: str, path: Path) -> np.ndarray:
    import pandas as pd

    s = frame[col]
    if s.dtype == bool:
        return s.to_numpy(dtype=np.float64)
    values = pd.to_numeric(s, errors="coerce")
    bad = values.isna() & ~s.isna()
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        hint = (" Write a number there, or leave the cell empty to mark that sample missing."
                if col.startswith(("in:", "out:")) else " Write a number there.")
        raise FileFormatError(f"{path}: column {col!r} must be numeric; {_data_row(row)} holds {s.iloc[row]!r}."
                              + hint)
    return values.to_numpy(dtype=np.float64, na_value=np.nan)


def _time_grid(t: np.ndarray, rate_text, path: Path, col: str) -> tuple[float, float]:
    if not np.isfinite(t).all():
        raise FileFormatError(f"{path}: column {col!r} must hold a finite time for every row; found empty/NaN.")
    if rate_text is not None:
        try:
            rate = float(rate_text)
        except ValueError:
            raise FileFormatError(f"{path}: the rate in column {col!r} is not a number.") from None
    elif t.size >= 2 and t[-1] > t[0]:
        rate = float(f"{(t.size - 1) / (t[-1] - t[0]):.9g}")
    else:
        raise FileFormatError(f"{path}: cannot infer the sampling rate from column {col!r} ({t.size} row(s)); "
                              "write the header as 'time [s] @ <rate> Hz'.")
    if not math.isfinite(rate) or rate <= 0:
        raise FileFormatError(f"{path}: the sampling rate must be positive; got {rate} Hz from column {col!r}.")
    grid = t[0] + np.arange(t.size) / rate
    off = np.flatnonzero(np.abs(t - grid) > 0.1 / rate)
    if off.size:
        i = int(off[0])
        raise FileFormatError(
            f"{path}: time stamps are not on a uniform grid at {rate:g} Hz: {_data_row(i)} is at "
            f"{float(t[i])!r} s, the grid puts it at {float(grid[i])!r} s. Every sample must be a row: mark missing samples invalid (valid = 0) "
            "instead of dropping rows, or resample first."
        )
    return rate, float(t[0])


def _trials_from_labels(labels: np.ndarray, path: Path) -> np.ndarray:
    if np.any(np.isfinite(labels) & (labels != np.round(labels))):
        raise FileFormatError(f"{path}: the 'trial' column must hold whole numbers; found fractional labels.")
    ids = np.where(np.isfinite(labels) & (labels >= 0), labels, -1).astype(np.int64)
    cuts = np.flatnonzero(np.diff(ids)) + 1
    starts, stops = np.r_[0, cuts], np.r_[cuts, ids.size]
    runs = [(int(a), int(b), int(ids[a])) for a, b in zip(starts, stops) if ids[a] >= 0]
    seen = {}
    for a, b, label in runs:
        if label in seen:
            raise FileFormatError(
                f"{path}: trial {label} appears in two separate runs of rows (starting at data rows {seen[label] + 1} "
                f"and {a + 1}, counted from 1 after the header); the rows of one trial must be contiguous. Give each "
                "trial its own label."
            )
        seen[label] = a
    if not runs:
        raise FileFormatError(f"{path}: no row belongs to a trial (all 'trial' labels empty or negative); "
                              "label the rows of each trial 0, 1, 2, ...")
    return np.array([(a, b) for a, b, _ in runs], dtype=np.int64)


def _valid_column(frame, col: str | None, path: Path) -> np.ndarray | None:
    if col is None:
        return None
    s = frame[col]
    if s.dtype == bool:
        return s.to_numpy()
    text = s.astype(str).str.strip().str.lower()
    truth = {"1": True, "1.0": True, "true": True, "0": False, "0.0": False, "false": False}
    bad = ~text.isin(list(truth))
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise FileFormatError(f"{path}: the 'valid' column must hold 1/0 or true/false; {_data_row(row)} holds "
                              f"{s.iloc[row]!r}.")
    return text.map(truth).to_numpy(dtype=bool)


def _mask_empty_cells(valid, values: np.ndarray, names, rate: float, meta: dict) -> np.ndarray | None:
    """The mask with every row holding an empty (NaN) cell marked invalid, with or without a ``valid`` column.

    The rows masked this way are counted per channel in ``meta["masked_empty_cells"]`` (channel, samples, first
    time in seconds), so ``inspect`` can say where the gaps are.
    """
    empty = np.isnan(values)
    if valid is not None:
        empty &= np.asarray(valid, bool)[:, None]  # cells of rows already invalid are not news
    rows = empty.any(axis=1)
    if not rows.any():
        return valid
    meta["masked_empty_cells"] = [
        {"channel": names[j], "samples": int(empty[:, j].sum()), "first_s": float(np.argmax(empty[:, j]) / rate)}
        for j in np.flatnonzero(empty.any(axis=0))]
    base = np.ones(values.shape[0], bool) if valid is None else np.asarray(valid, bool)
    return base & ~rows


def _label_text(value) -> str:
    """A condition cell as text: empty for a missing cell, ``2`` (not ``2.0``) for a whole number read as float."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value).strip()


def _conditions_from_column(column, trials: np.ndarray, stored, path: Path) -> list[str]:
    """One condition label per trial from the ``condition`` column: the one label on every row of the trial."""
    text = np.array([_label_text(v) for v in column.to_numpy(dtype=object)], dtype=object)
    labels = []
    for i, (a, b) in enumerate(trials):
        found = sorted(set(text[a:b]) - {""})
        if len(found) != 1 or (text[a:b] == "").any():
            what = f"labels {found}" if len(found) > 1 else "empty cells" if found else "no label"
            raise FileFormatError(f"{path}: the 'condition' column must hold one label on every row of a trial; "
                                  f"trial {i} (data rows {int(a) + 1}-{int(b)}, counted from 1 after the header) "
                                  f"has {what}. Give each row of the trial "
                                  "its trial's condition.")
        labels.append(found[0])
    if stored is not None and [str(c) for c in stored] != labels:
        raise FileFormatError(f"{path}: the 'condition' column ({labels}) disagrees with the metadata's "
                              f"{_CONDITIONS_KEY!r} ({list(stored)}); keep one of the two.")
    return labels


def _session_from_table(frame, path: Path, metadata: dict) -> Session:
    spec = _parse_header(list(frame.columns), path)
    if len(frame) == 0:
        raise FileFormatError(f"{path} holds a header but no rows; expected one row per sample.")
    rate, t0 = _time_grid(_numeric(frame, spec["time"], path), spec["rate"], path, spec["time"])
    trials = _trials_from_labels(_numeric(frame, spec["trial"], path), path)
    u = np.column_stack([_numeric(frame, c, path) for c, _, _ in spec["in"]]) if spec["in"] else \
        np.zeros((len(frame), 0))
    y = np.column_stack([_numeric(frame, c, path) for c, _, _ in spec["out"]])
    meta = dict(metadata)
    if t0 != 0.0:
        meta["start_time_s"] = t0
    if spec["condition"] is not None:
        meta[_CONDITIONS_KEY] = _conditions_from_column(frame[spec["condition"]], trials, meta.get(_CONDITIONS_KEY),
                                                        path)
    names = [f"{role}:{n}" for role, chans in (("in", spec["in"]), ("out", spec["out"])) for _, n, _ in chans]
    mask = _mask_empty_cells(_valid_column(frame, spec["valid"], path), np.column_stack([u, y]), names, rate, meta)
    return _as_session(
        path, u=u, y=y, sample_rate_hz=rate, trials=trials, mask=mask,
        input_names=[n for _, n, _ in spec["in"]], input_units=[x for _, _, x in spec["in"]],
        output_names=[n for _, n, _ in spec["out"]], output_units=[x for _, _, x in spec["out"]], metadata=meta,
    )
