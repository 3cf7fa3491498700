"""Heavy libraries imported at their first use, so that a command that does not need them starts without them.

``scipy.signal`` takes about 1.4 s to import and pint's unit registry about 1.6 s to build on a 2-core machine,
while most commands (and every refusal of a bad input) use neither. :func:`lazy_module` stands in for a module and
imports it at the first attribute access; Python's import lock makes that safe from several threads at once.
"""

from __future__ import annotations

import importlib
import threading


class LazyModule:
    """A stand-in for the module ``name``: its attributes are the module's, imported at the first access."""

    __slots__ = ("_name",)

    def __init__(self, name: str):
        self._name = name

    def __getattr__(self, attr):
        return getattr(importlib.import_module(self._name), attr)

    def __repr__(self) -> str:
        return f"LazyModule({self._name!r})"


def lazy_module(name: str) -> LazyModule:
    """``scipy.signal`` as ``signal = lazy_module("scipy.signal")``: imported when ``signal.butter`` is first read."""
    return LazyModule(name)


class LazyInstance:
    """A stand-in for the object ``factory()`` returns, made once (under a lock) at the first attribute access."""

    __slots__ = ("_factory", "_lock", "_made")

    def __init__(self, factory):
        self._factory, self._lock, self._made = factory, threading.Lock(), None

    def __getattr__(self, attr):
        made = self._made
        if made is None:
            with self._lock:
                if self._made is None:
                    self._made = self._factory()
                made = self._made
        return getattr(made, attr)
