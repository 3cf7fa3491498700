"""The rolling budget's window energies and blend, computed with less Python per call, give the same bits as the
plain formulas they replaced (closed loops under a binding budget amplify any last-digit change; tests/golden.py).

Outside check: the definitions themselves, written out here (common practice, no source): window energy =
past + Σ over the window's plan steps of Σ_i u_ki² + the ramp steps' Σ_i max(|u_N−1,i| − t·slew_i, 0)².
"""

import numpy as np
import pytest

from stimsteer.control.mpc._budget import _RollingBudget, blend_all


def _plain(b, u, hist):
    ramp = np.zeros(0)
    if b.n_tail:
        t = np.arange(1, b.n_tail + 1)[:, None]
        r = np.maximum(np.abs(u[-1][b.fin])[None, :] - t * b.slew[b.fin][None, :], 0.0)
        ramp = np.sum(r**2, axis=1)
    return b.Mh @ hist + b.Mp @ np.sum(u**2, axis=1) + b.Mr @ ramp


def _plain_blend(b, hist, u, safe):
    cap, past = b.budget * (1.0 - 1e-10), b.Mh @ hist
    if np.max(b.energies(u, hist, past)) <= cap:
        return u
    lo, hi = 0.0, 1.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if mid == lo or mid == hi:
            break
        if np.max(_plain(b, mid * u + (1.0 - mid) * safe, hist)) <= cap:
            lo = mid
        else:
            hi = mid
    return lo * u + (1.0 - lo) * safe


@pytest.mark.parametrize("window, slew", [(20, [15.0, 15.0, 15.0]), (26, [15.0, np.inf, 4.0]), (8, None)])
def test_energies_and_blend_are_the_plain_formulas_bit_for_bit(window, slew):
    b = _RollingBudget(20000.0, window, 20, None if slew is None else np.array(slew))
    rng = np.random.default_rng(3)
    for _ in range(40):
        u, hist = rng.uniform(0.0, 50.0, size=(20, 3)), rng.uniform(0.0, 900.0, size=window - 1)
        want = _plain(b, u, hist)
        assert np.array_equal(b.energies(u, hist), want)
        assert np.array_equal(b.energies(u, hist, b.Mh @ hist), want)
        assert b.excess(u, hist) == float(np.max(want) - b.budget)
        assert np.array_equal(blend_all([b], [hist], u, np.zeros((20, 3))), _plain_blend(b, hist, u, np.zeros((20, 3))))
