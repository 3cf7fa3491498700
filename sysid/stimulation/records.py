"""A recorded pulse table kept in a session's metadata, and read back.

A session encoded from pulse events can carry the events themselves, so that anyone can re-encode them and check
that the model input is what the declared mapping makes of them. The table is stored column-wise (JSON lists, one
entry per pulse) with the unit of every column::

    metadata["pulses"] = {"columns": {"time_s": [...], "site": [...], "amplitude": [...], ...},
                          "units": {"time_s": "s", "amplitude": "uA", ...}, "n_pulses": 12345}

:func:`pulse_table_from_record` gives back a :class:`pandas.DataFrame` that
:func:`stimsteer.sysid.stimulation.encode_pulse_table` takes.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..exceptions import SessionError

__all__ = ["PULSE_TABLE_COLUMNS", "pulse_table_record", "pulse_table_from_record"]

#: Columns of a recorded pulse table (``amplitude`` and ``second_phase_amplitude`` in the site's amplitude unit).
PULSE_TABLE_COLUMNS = ("time_s", "site", "amplitude", "phase_width_us", "second_phase_amplitude", "leading_phase")


def pulse_table_record(frame: pd.DataFrame, *, units: dict) -> dict:
    """A pulse table as a JSON-safe record (column-wise lists, units, count).

    Parameters
    ----------
    frame : pandas.DataFrame
        One row per pulse; needs ``time_s``, ``site`` and ``amplitude``.
    units : dict
        The unit of each numeric column, e.g. ``{"time_s": "s", "amplitude": "uA"}``.
    """
    missing = [c for c in ("time_s", "site", "amplitude") if c not in frame.columns]
    if missing:
        raise SessionError(f"a pulse table needs the columns time_s, site and amplitude; it lacks {missing}.")
    cols = {}
    for c in frame.columns:
        values = frame[c].tolist()
        numeric = pd.api.types.is_numeric_dtype(frame[c])
        cols[str(c)] = [float(v) for v in values] if numeric else [str(v) for v in values]
    return {"columns": cols, "units": dict(units), "n_pulses": int(len(frame))}


def pulse_table_from_record(record: dict) -> pd.DataFrame:
    """The :class:`pandas.DataFrame` of a record written by :func:`pulse_table_record`."""
    try:
        cols = record["columns"]
        frame = pd.DataFrame({k: (np.asarray(v, np.float64) if all(isinstance(x, (int, float)) for x in v) else
                                  [str(x) for x in v]) for k, v in cols.items()})
    except (KeyError, TypeError, ValueError) as exc:
        raise SessionError(f"the recorded pulse table cannot be read ({exc}); expected {{'columns': {{name: list}}, "
                           "'units': ..., 'n_pulses': ...}.") from None
    if len(frame) != int(record.get("n_pulses", len(frame))):
        raise SessionError(f"the recorded pulse table holds {len(frame)} pulses, its record says "
                           f"{record.get('n_pulses')}.")
    return frame
