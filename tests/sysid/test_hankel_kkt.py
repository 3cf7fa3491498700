"""The Hankel predictor's prediction map from one KKT solve per output row (the transposed system) equals the map
from one solve per window coordinate.

The reference is the per-coordinate solve this replaces (an internal equivalence, not an outside source); that
solving Kᵀ X = Bᵀ gives the rows of B K⁻¹ is linear algebra (common practice, no source)."""

from __future__ import annotations

import numpy as np
import pytest

from stimsteer.sysid.datadriven import hankel_predictor as hp


@pytest.mark.parametrize("projection", [True, False])
def test_transposed_kkt_solve_gives_the_same_prediction_map(projection):
    rng = np.random.default_rng(0)
    m, p, past, horizon, cols = 2, 3, 4, 5, 120
    H = rng.standard_normal(((m + p) * (past + horizon), cols))
    blocks = hp.HankelBlocks.from_matrix(H, m, p, past, horizon, False)
    M = hp._projection_complement(blocks.D, cols) if projection else None
    n_b = blocks.D.shape[0]
    ref = blocks.Yf @ hp._kkt_map(blocks, M, 0.3, 2.0, np.eye(n_b))
    got = hp._kkt_predictor(blocks, M, 0.3, 2.0)
    assert got.shape == ref.shape == (p * horizon, n_b)
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-11 * np.abs(ref).max())
