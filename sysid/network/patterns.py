"""Output patterns read as network states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..exceptions import SessionError
from .systems import _as_model, _frozen, _output_offset

__all__ = ["pattern_to_state", "PatternState"]


# ---------------------------------------------------------------------------------------------------- patterns
@dataclass(frozen=True)
class PatternState:
    """The state that best explains a recorded activity pattern through ``C``.

    Attributes
    ----------
    pattern : ndarray, shape (n_outputs,)
        The activity pattern given (one value per recorded channel, output units).
    x : ndarray, shape (n_states,)
        Minimum-norm least-squares solution of ``C x = pattern``.
    residual : float
        ``||C x - pattern||``: zero when the pattern is reachable by some state exactly.
    rank : int
        Numerical rank of ``C``.
    null_space_dim : int
        ``n_states - rank``: the dimension of the set of states that give the same pattern.
    unique : bool
        ``null_space_dim == 0``. When False, ``x`` is the smallest of many states with that pattern; a transition
        to it is one choice among many.
    output_offset : ndarray, shape (n_outputs,)
        Resting output subtracted from the pattern first (the model's ``info["output_offset"]``, e.g. of a ridge
        ARX fit with intercept, whose model describes deviations from rest; zero otherwise).
    """

    pattern: np.ndarray
    x: np.ndarray
    residual: float
    rank: int
    null_space_dim: int
    unique: bool
    output_offset: np.ndarray


def pattern_to_state(system, pattern) -> PatternState:
    """Map an activity pattern (one value per recorded channel) to a state by least squares through ``C``.

    Parameters
    ----------
    system : StateSpaceModel or tuple of matrices
    pattern : array_like, shape (n_outputs,)
        Recorded output values (output units) at a moment without stimulation, so the feed-through ``D u`` is zero.
        A model that carries ``info["output_offset"]`` describes deviations from that resting output; the offset
        is subtracted first.

    Returns
    -------
    PatternState

    Raises
    ------
    SessionError
        When the pattern has the wrong length or holds NaN / inf.

    Notes
    -----
    ``x = C⁺ (pattern − offset)`` (:func:`numpy.linalg.lstsq`, singular values below
    ``max(p, n) * eps * sigma_max`` dropped); the solution is unique only when ``C`` has full column rank.
    """
    model = _as_model(system)
    y = np.asarray(pattern, dtype=np.float64).reshape(-1)
    if y.shape != (model.n_outputs,) or not np.all(np.isfinite(y)):
        raise SessionError(
            f"an activity pattern needs one finite value per recorded channel ({model.n_outputs}: "
            f"{', '.join(model.output_names)}); got shape {np.shape(pattern)}. Give the pattern in output units."
        )
    offset = _output_offset(model)
    C = np.array(model.C)
    x, _, rank, _ = np.linalg.lstsq(C, y - offset, rcond=None)
    residual = float(np.linalg.norm(C @ x - (y - offset)))
    null = model.n_states - int(rank)
    return PatternState(pattern=_frozen(y), x=_frozen(x), residual=residual, rank=int(rank), null_space_dim=null,
                        unique=null == 0, output_offset=_frozen(offset))
