"""The method registry: which estimator class each ``(route, method)`` names, built from its settings.

Registering a method is one line, here or in a user's own code before calling the API or ``stimsteer``::

    METHODS[("direct", "mine")] = MethodEntry("my_package.my_module:MyPredictor")

``stimsteer fit --method`` takes its choices from :data:`METHODS`, model files record the class's ``storage_kind``
(:mod:`stimsteer.sysid.storage` finds registered classes here), and the benchmark fits any registered method.
"""

from __future__ import annotations

import importlib
import inspect

import numpy as np

from .exceptions import InvalidParameterError

__all__ = ["METHODS", "MethodEntry"]


class MethodEntry:
    """Factory for ``"module:Class"`` (or a class): imports on first use and builds ``Class(**settings)``.

    ``aliases`` map route-level setting names to the class's own, e.g. ``{"past_steps": ("output_lags",
    "input_lags")}`` for ridge ARX; an explicit class setting wins over an alias. ``streaming`` says the class's
    ``fit`` takes a lazily opened session file (also read from a ``supports_streaming`` class attribute).
    """

    def __init__(self, target, aliases: dict | None = None, *, streaming: bool = False):
        self.target = target
        self.aliases = dict(aliases or {})
        self._streaming = bool(streaming)

    @property
    def streaming(self) -> bool:
        """Whether the estimator's ``fit`` reads a lazily opened session file chunk by chunk."""
        return self._streaming or bool(getattr(self.cls(), "supports_streaming", False))

    def cls(self):
        """The estimator class (imported on first use when given as ``"module:Class"``)."""
        if isinstance(self.target, type):
            return self.target
        module, _, name = self.target.partition(":")
        return getattr(importlib.import_module(module), name)

    def parameters(self) -> tuple:
        """Keyword names the estimator's constructor accepts, plus the aliases."""
        sig = inspect.signature(self.cls().__init__)
        own = [p for p in sig.parameters if p != "self"]
        return tuple(own) + tuple(a for a in self.aliases if a not in own)

    def __call__(self, settings: dict | None):
        cls = self.cls()
        given = dict(settings or {})
        for alias, names in self.aliases.items():
            if alias in given:
                value = given.pop(alias)
                if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
                    raise InvalidParameterError(f"{alias} must be a whole number of samples >= 1 (on the command line: "
                                                f"--{alias.replace('_', '-')} N); got {value!r}.")
                for n in names:
                    given.setdefault(n, value)
        allowed = set(self.parameters())
        unknown = sorted(set(given) - allowed)
        if unknown:
            raise InvalidParameterError(
                f"unknown setting(s) {unknown} for {cls.__name__}; allowed: {sorted(allowed)}. Check the spelling."
            )
        required = [name for name, par in inspect.signature(cls.__init__).parameters.items()
                    if name != "self" and par.default is inspect.Parameter.empty
                    and par.kind in (par.KEYWORD_ONLY, par.POSITIONAL_OR_KEYWORD)]
        missing = [name for name in required if name not in given]
        if missing:
            options = " and ".join(f"--{name.replace('_', '-')} N" for name in missing)
            raise InvalidParameterError(
                f"{cls.__name__} needs {', '.join(missing)} (on the command line: {options}); give "
                f"{'them' if len(missing) > 1 else 'it'} in samples."
            )
        return cls(**given)

    def __repr__(self):
        return f"MethodEntry({self.target!r})"


METHODS = {
    ("indirect", "arx"): MethodEntry("stimsteer.sysid.arx:RidgeArx", {"past_steps": ("output_lags", "input_lags")}),
    ("indirect", "subspace"): MethodEntry("stimsteer.sysid.subspace.estimator:SubspaceId", streaming=True),
    ("indirect", "pbsid"): MethodEntry("stimsteer.sysid.subspace.closed_loop:ClosedLoopSubspaceId", streaming=True),
    ("direct", "lsq"): MethodEntry("stimsteer.sysid.datadriven.lsq:LsqPredictor", streaming=True),
    ("direct", "hankel"): MethodEntry("stimsteer.sysid.datadriven.hankel_predictor:HankelPredictor", streaming=True),
    ("indirect", "lifted"): MethodEntry("stimsteer.sysid.lifted:LiftedPredictor"),
    ("indirect", "hammerstein"): MethodEntry("stimsteer.sysid.hammerstein:HammersteinArx"),
    ("indirect", "recursive"): MethodEntry("stimsteer.sysid.recursive:RecursiveRidgeArx",
                                           {"past_steps": ("output_lags", "input_lags")}),
    ("indirect", "bootstrap"): MethodEntry("stimsteer.sysid.ensemble:BootstrapEnsemble"),
}
