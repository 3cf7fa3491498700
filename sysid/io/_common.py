"""What the session file layouts share: our layout's name and version, JSON metadata, and turning read fields into a
validated :class:`~stimsteer.sysid.session.Session`.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..exceptions import FileFormatError, SessionError
from ..session import Session

__all__ = ["LAYOUT_NAME", "LAYOUT_VERSION"]


LAYOUT_NAME = "stimsteer-session"
LAYOUT_VERSION = 1


def _attr_str(value) -> str:
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.size == 1:
        return _attr_str(value.reshape(-1)[0])
    return str(value)


def _metadata_json(metadata) -> str:
    def default(obj):
        if isinstance(obj, np.generic):
            return obj.item()
        if isinstance(obj, np.ndarray):
            return obj.tolist()
        if isinstance(obj, (tuple, set)):
            return list(obj)
        raise TypeError
    try:
        return json.dumps(dict(metadata), default=default, sort_keys=True)
    except (TypeError, ValueError) as exc:
        raise SessionError(
            f"session metadata cannot be stored as JSON ({exc}); keep it to strings, numbers, lists and dicts."
        ) from None


def _as_session(path: Path, **fields) -> Session:
    try:
        return Session(**fields)
    except SessionError as exc:
        raise FileFormatError(f"{path} does not hold a valid session: {exc}") from None
