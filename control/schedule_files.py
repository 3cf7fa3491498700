"""Schedule files: a designed schedule as a CSV table, and back.

The column syntax is that of the session table layout of :mod:`stimsteer.sysid.io` without output columns:
``time [s] @ <rate> Hz``, ``trial`` (trial label, ``-1`` in rests) and ``in:<name> [<unit>]`` per input; one row
per sample. The file opens with the caution as a ``#`` line (a schedule is stimulation to deliver; every reader
skips it). :func:`load_schedule` reads a schedule back (a session table is accepted too: its input side is read).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..sysid import FileFormatError
from ..sysid._files import atomic_path
from ..sysid._headers import CHANNEL_RE as _CHANNEL_RE, TIME_RE as _TIME_RE
from ..sysid.caution import CAUTION
from ..sysid.io import comment_lines
from ..sysid.io.tables import _data_row

if TYPE_CHECKING:
    from .schedule import Schedule

__all__ = ["save_schedule", "load_schedule"]

_LAYOUT_HINT = ("expected the columns 'time [s] @ <rate> Hz', 'trial' and one 'in:<name> [<unit>]' per input "
                "(as written by `stimsteer schedule`)")


def save_schedule(schedule: "Schedule", path, *, overwrite: bool = False) -> Path:
    """Write a schedule as a CSV table (layout in the module docstring), atomically.

    Parameters
    ----------
    schedule : Schedule
    path : str or Path
        Output file, usually ``.csv``.
    overwrite : bool, default False

    Returns
    -------
    Path

    Raises
    ------
    FileFormatError
        When ``path`` exists and ``overwrite`` is False, or a channel name cannot be written in the layout.
    """
    path = Path(path)
    if path.exists() and not overwrite:
        raise FileFormatError(f"{path} already exists; pass overwrite=True (--force) to replace it, or choose "
                              "another name.")
    label = np.full(schedule.n_samples, -1, dtype=np.int64)
    for i, (a, b) in enumerate(schedule.trials):
        label[a:b] = i
    cols = {f"time [s] @ {np.format_float_positional(schedule.sample_rate_hz, trim='-')} Hz":
            np.arange(schedule.n_samples) / schedule.sample_rate_hz, "trial": label}
    for j, (name, unit) in enumerate(zip(schedule.input_names, schedule.input_units)):
        header = f"in:{name} [{unit}]"
        ch = _CHANNEL_RE.match(header)
        if ch is None or (ch["name"], ch["unit"].strip()) != (name, unit):
            raise FileFormatError(f"input {name!r} with unit {unit!r} cannot be written as 'in:<name> [<unit>]' "
                                  "(no square brackets or edge spaces); rename it.")
        cols[header] = np.asarray(schedule.u[:, j], dtype=np.float64)
    with atomic_path(path) as tmp:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(f"# {CAUTION}\n")  # a schedule is stimulation to deliver; every reader skips this comment
            fh.write(_csv_text(cols))
    return path


def _csv_text(cols: dict) -> str:
    """The columns as CSV text, byte for byte as ``pandas.DataFrame(cols).to_csv(index=False)`` writes them (the
    header quoted where the csv module would, each float as its shortest round-trip text, NaN empty).

    Each distinct value is formatted once (a schedule holds few levels besides its time column): pandas formats
    every cell, 0.3 s of the demo's schedule step.
    """
    import csv
    import io

    head = io.StringIO()
    csv.writer(head, lineterminator="\n").writerow(list(cols))
    texts = [_column_text(np.asarray(v)) for v in cols.values()]
    return head.getvalue() + "".join(",".join(row) + "\n" for row in zip(*texts))


def _column_text(values: np.ndarray) -> list:
    """Each value's text: integers as such, floats as Python's ``repr`` (NumPy's and pandas' text too), NaN ''."""
    if values.dtype.kind in "iu":
        return [str(v) for v in values.tolist()]
    bits = np.ascontiguousarray(values, dtype=np.float64).view(np.int64)  # bit patterns: -0.0 is not 0.0
    levels, where = np.unique(bits, return_inverse=True)
    words = ["" if math.isnan(x) else repr(x) for x in levels.view(np.float64).tolist()]
    return [words[k] for k in where.ravel().tolist()]


def _parse_columns(columns, path):
    spec = {"time": None, "rate": None, "trial": None, "in": []}
    for col in columns:
        t, ch = _TIME_RE.match(col), _CHANNEL_RE.match(col)
        if t is not None:
            spec["time"], spec["rate"] = col, t["rate"]
        elif col.strip() == "trial":
            spec["trial"] = col
        elif ch is not None and ch["role"] == "in":
            if not ch["name"] or not ch["unit"].strip():
                raise FileFormatError(f"{path}: column {col!r} needs an input name and a unit, as in 'in:site_a [uA]'.")
            spec["in"].append((col, ch["name"], ch["unit"].strip()))
        elif not (ch is not None or col.strip() == "valid"):
            raise FileFormatError(f"{path} is not a stimsteer schedule: column {col!r} is not recognised; "
                                  f"{_LAYOUT_HINT}.")
    missing = [k for k in ("time", "trial") if spec[k] is None] + ([] if spec["in"] else ["in:<name> [<unit>]"])
    if missing:
        raise FileFormatError(f"{path} is not a stimsteer schedule: missing {missing}; {_LAYOUT_HINT}.")
    return spec


def _rate_of(t, rate_text, path):
    if rate_text is not None:
        try:
            rate = float(rate_text)
        except ValueError:
            raise FileFormatError(f"{path}: the rate {rate_text!r} in the time header is not a number.") from None
    elif t.size >= 2 and t[-1] > t[0]:
        rate = float(f"{(t.size - 1) / (t[-1] - t[0]):.9g}")
    else:
        raise FileFormatError(f"{path}: cannot tell the sampling rate; write the header as 'time [s] @ <rate> Hz'.")
    if not math.isfinite(rate) or rate <= 0:
        raise FileFormatError(f"{path}: the sampling rate must be positive; got {rate} Hz.")
    off = np.flatnonzero(np.abs(t - (t[0] + np.arange(t.size) / rate)) > 0.1 / rate)
    if off.size:
        raise FileFormatError(f"{path}: time stamps are not on a uniform {rate:g} Hz grid (row {int(off[0])}); "
                              "a schedule has one row per sample.")
    return rate


def _trials_of(labels, path):
    if not np.all(np.isnan(labels) | (labels == np.round(labels))):
        raise FileFormatError(f"{path}: the 'trial' column must hold whole numbers (-1 or empty in rests).")
    ids = np.where(np.isfinite(labels) & (labels >= 0), labels, -1).astype(np.int64)
    cuts = np.flatnonzero(np.diff(ids)) + 1
    runs = [(int(a), int(b), int(ids[a])) for a, b in zip(np.r_[0, cuts], np.r_[cuts, ids.size]) if ids[a] >= 0]
    labels_seen = [r[2] for r in runs]
    if not runs or len(set(labels_seen)) != len(labels_seen):
        raise FileFormatError(f"{path}: trials must be labelled 0, 1, ... with the rows of each trial contiguous; "
                              f"found runs labelled {labels_seen}.")
    return np.array([(a, b) for a, b, _ in runs], dtype=np.int64)


def load_schedule(path):
    """Read a schedule CSV back as the input side of a session.

    Parameters
    ----------
    path : str or Path
        A file written by :func:`save_schedule` (a session table is accepted too: its outputs are ignored).

    Returns
    -------
    u : ndarray, shape (n_samples, n_inputs)
    trials : ndarray of int, shape (n_trials, 2)
    names : tuple of str
    units : tuple of str
    sample_rate_hz : float

    Raises
    ------
    FileFormatError
        When the file is not a schedule in this layout (the message names the column or row at fault).
    """
    import pandas as pd

    path = Path(path)
    try:
        extra = {"float_precision": "round_trip"} if int(pd.__version__.split(".")[0]) < 3 else {}
        frame = pd.read_csv(path, encoding="utf-8-sig", skiprows=comment_lines(path), **extra)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError) as exc:
        raise FileFormatError(f"{path} is not a readable CSV schedule ({exc}); {_LAYOUT_HINT}.") from None
    spec = _parse_columns([str(c) for c in frame.columns], path)
    if len(frame) == 0:
        raise FileFormatError(f"{path} holds a header but no rows; a schedule has one row per sample.")

    def numeric(col):
        v = pd.to_numeric(frame[col], errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
        return v

    t = numeric(spec["time"])
    if not np.all(np.isfinite(t)):
        raise FileFormatError(f"{path}: every row needs a finite time in {spec['time']!r}.")
    rate = _rate_of(t, spec["rate"], path)
    trials = _trials_of(numeric(spec["trial"]), path)
    u = np.column_stack([numeric(c) for c, _, _ in spec["in"]])
    bad = np.argwhere(~np.isfinite(u))
    if bad.size:
        r, c = bad[0]
        raise FileFormatError(f"{path}: input {spec['in'][c][1]!r} has no finite value at {_data_row(int(r))}; a "
                              "schedule must give every amplitude.")
    return (u, trials, tuple(n for _, n, _ in spec["in"]), tuple(x for _, _, x in spec["in"]), rate)
