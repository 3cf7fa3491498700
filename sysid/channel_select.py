"""Choosing channels by name or glob pattern: what :meth:`stimsteer.sysid.Session.select` and the commands'
``--inputs``, ``--outputs`` and ``--drop`` share."""

from __future__ import annotations

import fnmatch
from typing import Sequence

from .exceptions import SessionError

__all__ = ["match_channels", "selected_indices"]


def _patterns(value) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str):
        return [v.strip() for v in value.split(",") if v.strip()]
    return [str(v).strip() for v in value if str(v).strip()]


def match_channels(patterns, names: Sequence[str], *, kind: str, known: Sequence[str] | None = None) -> list[int]:
    """Indices of ``names`` matched by any of ``patterns`` (exact names or glob patterns, ``*``, ``?``, ``[..]``), in
    channel order.

    Raises
    ------
    SessionError
        A pattern matches no channel; the message names the known channels (``known``, default ``names``).
    """
    names = list(names)
    hit: set = set()
    for pat in _patterns(patterns):
        found = [i for i, n in enumerate(names) if n == pat or fnmatch.fnmatchcase(n, pat)]
        if not found:
            shown = list(known if known is not None else names)
            raise SessionError(f"no {kind} named {pat!r}; the session's {kind}s are: "
                               f"{', '.join(shown) if shown else '(none)'}. Check the spelling (names are "
                               "case-sensitive; * and ? are wildcards).")
        hit.update(found)
    return sorted(hit)


def selected_indices(input_names, output_names, *, inputs=None, outputs=None, drop=None):
    """Input and output indices kept by a selection: ``inputs``/``outputs`` keep (default all), ``drop`` leaves out
    any channel it matches, of either kind.

    Raises
    ------
    SessionError
        A pattern matches nothing; no output would be left.
    """
    ins = list(range(len(input_names))) if inputs is None else match_channels(inputs, input_names, kind="input")
    outs = list(range(len(output_names))) if outputs is None else match_channels(outputs, output_names,
                                                                                  kind="output")
    for pat in _patterns(drop):
        match_channels([pat], list(input_names) + list(output_names), kind="channel")  # refuses a stray name
        ins = [i for i in ins if not fnmatch.fnmatchcase(input_names[i], pat)]
        outs = [j for j in outs if not fnmatch.fnmatchcase(output_names[j], pat)]
    if not outs:
        raise SessionError(f"the selection leaves no output channel (outputs: {', '.join(output_names)}); keep at "
                           "least one.")
    return ins, outs
