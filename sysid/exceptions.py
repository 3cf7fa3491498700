"""The errors and warnings stimsteer raises.

Every error derives from :class:`StimsteerError`, so a caller (and the command line) can catch the toolkit's own
failures apart from programming errors. The same condition raises the same class everywhere.
"""

__all__ = [
    "StimsteerError",
    "SessionError",
    "InvalidParameterError",
    "FileFormatError",
    "OutputError",
    "NotFittedError",
    "UnstableModelError",
    "ExcitationError",
    "LimitsError",
    "InfeasiblePlanError",
    "SolverError",
    "StimsteerWarning",
    "ExcitationWarning",
    "ConditioningWarning",
]


class StimsteerError(Exception):
    """Base class of every error raised on purpose by stimsteer."""


class SessionError(StimsteerError, ValueError):
    """A session, or an argument about one, is malformed (shapes, values, trials, names, units)."""


class InvalidParameterError(StimsteerError, ValueError):
    """A setting (a constructor argument, an option, a weight) has a value that cannot be used."""


class FileFormatError(StimsteerError, ValueError):
    """A file cannot be read as what it was asked to be (not a session, a model from another layout, ...)."""


class OutputError(StimsteerError, OSError):
    """An output cannot be claimed or written: it exists, another run is writing it, or the file system refuses."""


class NotFittedError(StimsteerError, RuntimeError):
    """An estimator or controller was used before ``fit`` was called."""


class UnstableModelError(StimsteerError, ValueError):
    """A model is unstable where a stable one is required."""


class ExcitationError(StimsteerError, ValueError):
    """The recorded inputs do not excite the dynamics enough for the requested identification."""


class LimitsError(StimsteerError, ValueError):
    """Declared stimulation limits are inconsistent, impossible or malformed."""


class InfeasiblePlanError(StimsteerError, RuntimeError):
    """A stimulation plan cannot satisfy the declared hard limits."""


class SolverError(StimsteerError, RuntimeError):
    """A numerical solver failed to return an optimal answer."""


class StimsteerWarning(UserWarning):
    """Base class of stimsteer's warnings."""


class ExcitationWarning(StimsteerWarning):
    """The inputs are exciting, but less than a method needs; results will be unreliable."""


class ConditioningWarning(StimsteerWarning):
    """A linear system solved during fitting is ill-conditioned; estimates may be inaccurate."""
