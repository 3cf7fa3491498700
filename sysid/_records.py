"""Provenance helpers shared by model files, plans and benchmark results: one rule each.

* :func:`jsonable` — settings and results as JSON-safe values. NaN becomes ``None`` and ±inf the strings
  ``"inf"``/``"-inf"``, so every JSON file stimsteer writes is standard JSON (``allow_nan=False``).
* :func:`versions` — the Python and package versions a result was computed with.
* :func:`session_record` — what identifies a session (content hash, shape, rate, channels).
* :func:`window_stride` — the stride that keeps at most ``max_windows`` scoring windows.
"""

from __future__ import annotations

import dataclasses
import math
import platform
from collections.abc import Mapping
from importlib import metadata as _metadata

import numpy as np

__all__ = ["jsonable", "versions", "session_record", "window_stride", "CORE_PACKAGES"]

#: The packages whose versions every result records.
CORE_PACKAGES = ("stimsteer", "numpy", "scipy", "scikit-learn", "pandas", "h5py", "cvxpy", "osqp", "clarabel",
                 "matplotlib")


def jsonable(value):
    """``value`` with arrays, tuples, numpy scalars, dataclasses and non-finite floats made JSON-safe."""
    if isinstance(value, Mapping):
        return {str(k): jsonable(v) for k, v in value.items()}
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return jsonable(dataclasses.asdict(value))
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, (list, tuple, set, frozenset)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else ("inf" if value > 0 else "-inf")
    return value


def versions(extra: tuple = ()) -> dict:
    """``{"python": ..., package: version or "not installed"}`` for :data:`CORE_PACKAGES` and ``extra``.

    Each package's version is read from its installed metadata once per process (15 ms for the core packages, and
    the demo's steps and a benchmark's tasks ask again and again); the caller gets a dict of its own."""
    out = {"python": platform.python_version()}
    for dist in (*CORE_PACKAGES, *extra):
        found = _VERSIONS.get(dist)
        if found is None:
            try:
                found = _metadata.version(dist)
            except _metadata.PackageNotFoundError:
                found = "not installed"
            _VERSIONS[dist] = found
        out[dist] = found
    return out


_VERSIONS: dict = {}  # package -> version, as read the first time in this process


def session_record(source) -> dict:
    """What identifies a session or a lazily opened session file in a result's provenance."""
    meta = getattr(source, "metadata", None) or {}
    return {
        "content_hash": source.content_hash(),
        "n_samples": int(source.n_samples), "n_trials": int(np.asarray(source.trials).shape[0]),
        "sample_rate_hz": float(source.sample_rate_hz),
        "input_names": list(source.input_names), "input_units": list(source.input_units),
        "output_names": list(source.output_names), "output_units": list(source.output_units),
        "simulated_flag": bool(meta.get("simulated", False)),
        # the declared stimulation mapping (stimsteer.sysid.stimulation), so a model says what its inputs mean
        **({"stimulation": meta["stimulation"]} if isinstance(meta.get("stimulation"), dict) else {}),
    }


def window_stride(source, past_steps: int, horizon_steps: int, max_windows: int) -> int:
    """Smallest stride that keeps at most ``max_windows`` windows of ``past + horizon`` samples in ``source``."""
    L = int(past_steps) + int(horizon_steps)
    n = sum(max(0, e - s - L + 1) for s, e in source.segments(min_length=L))
    return max(1, -(-n // int(max_windows)))
