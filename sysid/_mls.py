"""Maximum-length sequences without importing ``scipy.signal``.

:func:`stimsteer.sysid.max_length_sequence` draws its bits from :func:`scipy.signal.max_len_seq`, whose import
(with ``scipy.stats``, which it pulls in) takes 1-1.5 s of CPU on a 2-core machine; a schedule of a few tens of
thousands of bits takes 20-40 ms to shift out in Python. :func:`max_length_sequence` here gives the same values
bit for bit (same feedback taps, same register, same use of ``seed``; checked against SciPy in
``tests/sysid/test_mls.py``) for the commands that need nothing else of ``scipy.signal`` (``stimsteer schedule``).
"""

from __future__ import annotations

import numpy as np

from .exceptions import InvalidParameterError

__all__ = ["max_length_sequence", "seeded_register", "MLS_TAPS"]

#: The feedback taps of :func:`scipy.signal.max_len_seq` (its ``_mls_taps``: the first option listed for each
#: register length by New Wave Instruments, "Linear Feedback Shift Registers", 2010).
MLS_TAPS = {2: (1,), 3: (2,), 4: (3,), 5: (3,), 6: (5,), 7: (6,), 8: (7, 6, 1), 9: (5,), 10: (7,), 11: (9,),
            12: (11, 10, 4), 13: (12, 11, 8), 14: (13, 12, 2), 15: (14,), 16: (15, 13, 4), 17: (14,), 18: (11,),
            19: (18, 17, 14), 20: (17,), 21: (19,), 22: (21,), 23: (18,), 24: (23, 22, 17), 25: (22,),
            26: (25, 24, 20), 27: (26, 25, 22), 28: (25,), 29: (27,), 30: (29, 28, 7), 31: (28,), 32: (31, 30, 10)}


def _register_bits(nbits: int, state: np.ndarray, length: int) -> np.ndarray:
    """The bits ``x[0], ..., x[length - 1]`` of ``x[i + nbits] = x[i] ^ x[i + t1] ^ ...`` (taps ``t``), from
    ``x[:nbits] = state``: SciPy's circular register read as one sequence (its position ``i mod nbits`` holds
    ``x[i]`` when bit ``i`` is shifted out)."""
    x = [int(b) for b in state] + [0] * length
    taps = MLS_TAPS[nbits]
    if len(taps) == 1:
        (t,) = taps
        for i in range(length):
            x[i + nbits] = x[i] ^ x[i + t]
    else:  # every other entry of the table has three taps
        t1, t2, t3 = taps
        for i in range(length):
            x[i + nbits] = x[i] ^ x[i + t1] ^ x[i + t2] ^ x[i + t3]
    return np.array(x[:length], dtype=np.float64)


def seeded_register(nbits: int, seed) -> np.ndarray | None:
    """The initial register ``seed`` picks (random bits, one set at random if all came out zero); None for no seed
    (the all-ones register). Both ``max_length_sequence`` functions use this one rule."""
    if seed is None:
        return None
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    state = rng.integers(0, 2, size=nbits)
    if not state.any():
        state[rng.integers(nbits)] = 1
    return state


def max_length_sequence(nbits: int, *, seed=None, length: int | None = None) -> np.ndarray:
    """:func:`stimsteer.sysid.max_length_sequence` (same arguments, same values) without ``scipy.signal``.

    Returns
    -------
    ndarray, shape (length,)
        ``2 b - 1`` for the register's bits ``b``; ``length`` defaults to one period ``2**nbits - 1``.
        ``tests/sysid/test_mls.py`` checks them against SciPy's.
    """
    nbits = int(nbits)
    if nbits not in MLS_TAPS:
        raise InvalidParameterError(f"nbits must be between {min(MLS_TAPS)} and {max(MLS_TAPS)}; got {nbits}.")
    state = seeded_register(nbits, seed)
    state = np.ones(nbits, dtype=np.int8) if state is None else state
    length = 2 ** nbits - 1 if length is None else int(length)
    if length < 0:
        raise InvalidParameterError(f"length must be 0 or more; got {length}.")
    return 2.0 * _register_bits(nbits, state, length) - 1.0
