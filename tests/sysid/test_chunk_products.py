"""The lag products of one chunk, taken a block of rows at a time (``_lagged._BLOCK_ROWS``), equal the products of
the lagged design that the chunk stands for (reference: the design materialised and multiplied by NumPy's
``matmul``; the definition ``X[δ] = Σ_t Z_t Z_{t-δ}ᵀ``, Ljung 1999, "System identification", 2nd ed., sec. 7.3)."""

import numpy as np
import pytest

from stimsteer.sysid import _lagged
from stimsteer.sysid._lagged import _chunk_products


# sizes around _lagged._BLOCK_ROWS = 4096 (one row, one block less one, exactly one, one more) and several blocks
@pytest.mark.parametrize("n", [1, 4095, 4096, 4097, 10_000])
def test_blocked_lag_products_equal_the_materialised_design(n):
    rng = np.random.default_rng(n)
    L, c = 3, 5  # chosen for speed: a few lags and channels exercise every lag product
    B = rng.standard_normal((L + n, c))
    S, X = _chunk_products(B, L)
    rows = B[L:]
    # tolerances: the blocks change only the order of the sums' additions, whose rounding is a few n · eps relative
    # (Higham 2002, "Accuracy and stability of numerical algorithms", 2nd ed., sec. 4.2); 1e-12 · n covers it;
    # rtol 1e-11 for the lag products: the author's margin (measured: at most 1.1e-13 relative, 5.5e-16 · n absolute
    # over these sizes; the sums S agree exactly)
    np.testing.assert_allclose(S, rows.sum(axis=0), rtol=1e-12, atol=1e-12 * n)
    for delta in range(L + 1):
        reference = rows.T @ B[L - delta: L - delta + n]
        np.testing.assert_allclose(X[delta], reference, rtol=1e-11, atol=1e-12 * n)


def test_a_chunk_within_one_block_is_multiplied_as_before_bit_for_bit(monkeypatch):
    rng = np.random.default_rng(7)
    B = rng.standard_normal((4 + 3000, 6))  # 3000 rows < _BLOCK_ROWS = 4096: one block; 4 lags, 6 channels for speed
    _S, X = _chunk_products(B, 4)
    monkeypatch.setattr(_lagged, "_BLOCK_ROWS", 10**9)  # larger than any chunk: no blocking (the former route)
    _S0, X0 = _chunk_products(B, 4)
    np.testing.assert_array_equal(X, X0)


def test_an_empty_chunk_has_zero_sums():
    S, X = _chunk_products(np.ones((3, 2)), 3)  # 3 lags and 3 samples: the lead-in only, no row of the chunk
    assert not S.any() and not X.any()
