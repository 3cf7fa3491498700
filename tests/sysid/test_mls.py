"""The maximum-length sequences of sysid/_mls.py equal scipy.signal's (what stimsteer.sysid.max_length_sequence
returns) bit for bit, so a schedule made without importing scipy.signal keeps its values."""

import numpy as np
import pytest

from stimsteer.sysid import InvalidParameterError
from stimsteer.sysid._mls import MLS_TAPS, max_length_sequence
from stimsteer.sysid.signals import max_length_sequence as scipy_max_length_sequence


def test_taps_are_scipys():
    from scipy.signal._max_len_seq import _mls_taps

    assert {n: tuple(t) for n, t in _mls_taps.items()} == MLS_TAPS


@pytest.mark.parametrize("nbits", sorted(MLS_TAPS))
def test_every_register_length_gives_scipys_values_for_seeded_and_default_registers(nbits):
    for seed in (None, 0, 7, "generator"):
        for length in (0, 1, nbits, 3 * nbits + 2, 700):
            ours, theirs = (np.random.default_rng(3) if seed == "generator" else seed for _ in range(2))
            np.testing.assert_array_equal(max_length_sequence(nbits, seed=ours, length=length),
                                          scipy_max_length_sequence(nbits, seed=theirs, length=length))


def test_one_period_by_default_and_the_generator_is_advanced_as_scipys_wrapper_does():
    np.testing.assert_array_equal(max_length_sequence(9), scipy_max_length_sequence(9))
    r1, r2 = np.random.default_rng(11), np.random.default_rng(11)
    max_length_sequence(12, seed=r1, length=50), scipy_max_length_sequence(12, seed=r2, length=50)
    assert r1.integers(1 << 30) == r2.integers(1 << 30)


def test_bad_register_length_or_length_is_refused():
    with pytest.raises(InvalidParameterError, match="nbits must be between 2 and 32; got 1"):
        max_length_sequence(1)
    with pytest.raises(InvalidParameterError, match="length must be 0 or more; got -1"):
        max_length_sequence(5, length=-1)
