"""stimsteer.sysid: from recorded stimulation sessions to predictors (the identification layer)."""

from .exceptions import (
    ConditioningWarning,
    ExcitationError,
    ExcitationWarning,
    FileFormatError,
    InfeasiblePlanError,
    LimitsError,
    NotFittedError,
    SessionError,
    SolverError,
    StimsteerError,
    StimsteerWarning,
    UnstableModelError,
)
from .session import Session, TrialSplit, TrialWindow
from .statespace import StateSpaceModel, kalman_gain

__all__ = [
    "ConditioningWarning",
    "ExcitationError",
    "ExcitationWarning",
    "FileFormatError",
    "InfeasiblePlanError",
    "LimitsError",
    "NotFittedError",
    "Session",
    "SessionError",
    "SolverError",
    "StateSpaceModel",
    "StimsteerError",
    "StimsteerWarning",
    "TrialSplit",
    "TrialWindow",
    "UnstableModelError",
    "kalman_gain",
]
