"""The minimal realisation behind `stimsteer network`'s Kalman test, and the mode time scales (issue 18), checked
against the theory of minimal realisations and balanced truncation."""

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid.network.controllability import controllability
from stimsteer.sysid.network.responses import mode_times
from stimsteer.sysid.network.systems import minimal_realisation
from stimsteer.sysid.statespace import StateSpaceModel


def _padded(rng, poles=(0.8, -0.5, 0.3)):
    """A minimal 3-state system with 2 uncontrollable and 2 unobservable states added, mixed by a random basis."""
    A3 = np.diag(poles)
    B3, C3 = rng.standard_normal((3, 2)), rng.standard_normal((2, 3))
    A = sla.block_diag(A3, np.diag([0.6, 0.4]), np.diag([0.7, -0.2]))
    A[5:, :3] = rng.standard_normal((2, 3))  # unobservable states driven by the minimal part
    B = np.vstack([B3, np.zeros((2, 2)), rng.standard_normal((2, 2))])  # states 3, 4: no input reaches them
    C = np.hstack([C3, rng.standard_normal((2, 2)), np.zeros((2, 2))])  # states 5, 6: no channel sees them
    T = rng.standard_normal((7, 7)) + 3 * np.eye(7)
    Ti = np.linalg.inv(T)
    return StateSpaceModel(A=Ti @ A @ T, B=Ti @ B, C=C @ T, sample_rate_hz=100.0), 3


def test_the_minimal_realisation_has_the_order_of_the_markov_hankel_matrix_and_the_same_impulse_response(rng):
    # Ho & Kalman 1966 ("Effective construction of linear state-variable models from input/output functions"): the
    # order of a minimal realisation is the rank of the block Hankel matrix of the Markov parameters, and every
    # minimal realisation reproduces them exactly; Kalman 1963: a minimal realisation is controllable and observable
    model, n_min = _padded(rng)
    h = model.impulse_response(30)  # h[0] = D, h[k] = C A^(k-1) B
    H = np.block([[h[i + j + 1] for j in range(6)] for i in range(6)])
    s = np.linalg.svd(H, compute_uv=False)
    assert int(np.sum(s > 1e-9 * s[0])) == n_min
    reduced, hsv = minimal_realisation(model)
    assert reduced.n_states == n_min and hsv.size == 7
    np.testing.assert_allclose(reduced.impulse_response(30), h, atol=1e-10)
    assert controllability(reduced).is_controllable and controllability(reduced).rank == n_min
    assert not controllability(model).is_controllable  # the padded one is not: an artefact of its construction


def test_an_unstable_model_keeps_every_state_it_reaches_and_sees(rng):
    # Kalman 1963: reachability and observability are ranks of [B, AB, ...] and [C; CA; ...], which a scalar factor
    # on A only rescales block by block, so A / c has the model's minimal order; balanced over a finite horizon, the
    # growth of the mode at 2.0 (2^28 in the Gramians over 2·7 steps) put the mode at 0.5 below the relative
    # tolerance (2 of 3 states kept before this fix)
    model, n_min = _padded(rng, poles=(2.0, 1.2, 0.5))
    h = model.impulse_response(30)
    H = np.block([[h[i + j + 1] / 2.0 ** (i + j) for j in range(6)] for i in range(6)])  # of A / 2: the same rank
    s = np.linalg.svd(H, compute_uv=False)
    assert int(np.sum(s > 1e-9 * s[0])) == n_min
    reduced, hsv = minimal_realisation(model)
    rec = reduced.info["minimal_realisation"]
    assert reduced.n_states == n_min and hsv.size == 7 and rec["scaled_by"] == pytest.approx(4.0)
    np.testing.assert_allclose(reduced.impulse_response(30), h, rtol=1e-9, atol=1e-12)  # the author's margins
    assert controllability(reduced, horizon_steps=20).is_controllable


def test_balanced_truncation_stays_within_twice_the_removed_hankel_singular_values(rng):
    # Enns 1984, Glover 1984: ||G - G_r||_inf <= 2 sum of the removed Hankel singular values; each Markov parameter
    # is a Fourier coefficient of G, so its spectral norm is bounded by the same figure
    A = np.diag([0.95, 0.9, 0.5, 0.2, -0.3, 0.1])
    model = StateSpaceModel(A=A, B=rng.standard_normal((6, 2)), C=rng.standard_normal((3, 6)))
    _, hsv = minimal_realisation(model)
    rtol = 0.5 * (hsv[2] + hsv[3]) / hsv[0]  # keep three states
    reduced, _ = minimal_realisation(model, rtol=rtol)
    bound = reduced.info["minimal_realisation"]["impulse_error_bound"]
    assert reduced.n_states == 3 and bound == pytest.approx(2 * hsv[3:].sum())
    err = model.impulse_response(200) - reduced.impulse_response(200)
    assert max(np.linalg.norm(e, 2) for e in err) <= bound


def test_mode_time_constants_and_settling_length():
    # a mode λ decays as |λ|^k: time constant -1 / (rate ln|λ|), 1 % after ln 0.01 / ln|λ| samples (common practice)
    model = StateSpaceModel(A=np.diag([0.99, 0.5]), B=np.eye(2), C=np.eye(2), sample_rate_hz=200.0)
    t = mode_times(model)
    assert t.time_constants_s[0] == pytest.approx(-1 / (200 * np.log(0.99)))
    assert t.settle_steps == int(np.ceil(np.log(0.01) / np.log(0.99))) + 1 and not t.capped
    assert t.slow_lines() == [f"warning: slow (near-unstable) mode |λ| = 0.990000: time constant "
                              f"{-1 / (200 * np.log(0.99)):.4g} s"]
    capped = mode_times(model, cap_steps=100)
    assert capped.settle_steps == 100 and capped.capped
