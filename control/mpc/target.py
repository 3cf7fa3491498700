"""Targets of a plan from text: a CSV table over the horizon, ``name=value`` pairs, or one number per output.

:func:`parse_target` is what ``stimsteer plan --target`` reads; a malformed target is a :class:`SessionError`
(it is data given for one plan, like a past window), a missing file a ``FileNotFoundError``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ...sysid import SessionError

__all__ = ["parse_target"]


def _target_column(col, output_names):
    """Output name of a target-table column (``<name>``, ``target:<name>`` or either with `` [unit]``)."""
    name = str(col).strip()
    if name.startswith("target:"):
        name = name[len("target:"):]
    name = name.split("[")[0].strip()
    return name if name in output_names else None


def parse_target(spec, output_names, horizon_steps=None):
    """Read a target: a CSV table over the horizon, or a constant ``name=value,...``.

    Parameters
    ----------
    spec : str or Path
        Either a CSV file with one column per tracked output (header ``<name>``, ``target:<name>`` or either
        followed by `` [unit]``; an optional ``step`` or ``time [s]`` column is ignored) and one row per horizon
        step, or a text ``name=value,name=value`` for a constant target of some outputs, or ``v1,v2,...`` (one
        value per output, in the predictor's order) for a constant target of all of them.
    output_names : sequence of str
        The predictor's outputs. Outputs not named in the target are not tracked.
    horizon_steps : int, optional
        Rows needed (a longer table is cut); default all rows of the table.

    Returns
    -------
    target : ndarray, shape (n_steps, n_outputs)
        Untracked outputs hold 0 (their weight is 0).
    tracked : ndarray of bool, shape (n_outputs,)

    Raises
    ------
    SessionError
        Unknown output names, duplicate or non-numeric values, too few rows, nothing tracked.
    FileNotFoundError
        When ``spec`` names no existing file and is not a ``name=value`` list.
    """
    output_names = tuple(output_names)
    text = str(spec)
    if _is_constant_target(text):
        values = {}
        for part in (s for s in text.split(",") if s.strip()):
            name, sep, val = part.partition("=")
            name = name.strip()
            if not sep or name not in output_names:
                raise SessionError(f"target part {part!r} must be <output>=<value> with an output of "
                                   f"{list(output_names)}.")
            if name in values:
                raise SessionError(f"target names output {name!r} twice; give each output once.")
            try:
                values[name] = float(val)
            except ValueError:
                raise SessionError(f"target value {val!r} for {name!r} is not a number.") from None
            if not np.isfinite(values[name]):
                raise SessionError(f"target value for {name!r} must be finite; got {val!r}.")
        if horizon_steps is None:
            raise SessionError("a constant target has no length; give the horizon (--horizon-steps).")
        row = np.array([values.get(n, 0.0) for n in output_names])
        return np.tile(row, (int(horizon_steps), 1)), np.array([n in values for n in output_names])
    values = _number_list(text)
    if values is not None and not Path(text).is_file():
        if len(values) != len(output_names):
            raise SessionError(f"target {text!r} gives {len(values)} value(s); a constant target as a plain list needs "
                               f"one per output ({len(output_names)}: {list(output_names)}), or use "
                               "<output>=<value> pairs to track only some.")
        if not np.all(np.isfinite(values)):
            raise SessionError(f"target values must be finite; got {text!r}.")
        if horizon_steps is None:
            raise SessionError("a constant target has no length; give the horizon (--horizon-steps).")
        return np.tile(values, (int(horizon_steps), 1)), np.ones(len(output_names), dtype=bool)
    if not Path(text).is_file():
        raise FileNotFoundError(2, "no such target file (nor name=value pairs, nor one number per output)", text)
    return _target_table(Path(text), output_names, horizon_steps)


def _number_list(text: str):
    """The numbers of a comma-separated list such as ``"0.5,0,1.2"``, or None when it is not one."""
    parts = [p.strip() for p in text.split(",")]
    try:
        return np.array([float(p) for p in parts]) if parts and all(parts) else None
    except ValueError:
        return None


def _is_constant_target(spec) -> bool:
    """Whether ``spec`` is a ``name=value,...`` list rather than a file name."""
    return "=" in str(spec) and not Path(str(spec)).is_file()


def _target_table(path, output_names, horizon_steps):
    """The target and tracked outputs of a CSV table (see :func:`parse_target`)."""
    import pandas as pd

    if not path.is_file():
        raise FileNotFoundError(2, "no such target file", str(path))
    try:
        frame = pd.read_csv(path)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise SessionError(f"{path} is not a readable CSV table ({exc}).") from None
    cols, ignored, unknown = {}, [], []
    for col in frame.columns:
        name = _target_column(col, output_names)
        if name is not None:
            if name in cols:
                raise SessionError(f"{path} has two columns for output {name!r}.")
            cols[name] = col
        elif str(col).strip() == "step" or str(col).strip().startswith("time [s]"):
            ignored.append(col)
        else:
            unknown.append(str(col))
    if unknown or not cols:
        raise SessionError(f"{path}: columns {unknown or list(frame.columns)} are no outputs of the predictor "
                           f"{list(output_names)}; name target columns after outputs (optionally 'target:<name> "
                           "[unit]'), plus an optional 'step' or 'time [s]' column.")
    n = frame.shape[0] if horizon_steps is None else int(horizon_steps)
    if frame.shape[0] < n or n < 1:
        raise SessionError(f"{path} holds {frame.shape[0]} target rows; the horizon needs {n}.")
    target = np.zeros((n, len(output_names)))
    for j, name in enumerate(output_names):
        if name in cols:
            v = pd.to_numeric(frame[cols[name]].iloc[:n], errors="coerce").to_numpy(float)
            if not np.all(np.isfinite(v)):
                raise SessionError(f"{path}: column {cols[name]!r} holds empty or non-numeric cells in the first "
                                   f"{n} rows.")
            target[:, j] = v
    return target, np.array([n in cols for n in output_names])
