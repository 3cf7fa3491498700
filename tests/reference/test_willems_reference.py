"""Outside checks of the direct route (sysid/hankel.py, sysid/excitation.py, sysid/datadriven.py).

Each test names the published result it checks. Systems are random, stable (spectral radius 0.8), and checked to be
controllable and observable (minimal) before use; numbers below are either the theorem's statement or tolerances
chosen from float64 rounding (common practice, no source).
"""

import numpy as np
import pytest
from scipy.signal import max_len_seq

from stimsteer.sysid import Session, StateSpaceModel
from stimsteer.sysid.datadriven import HankelPredictor, LsqPredictor
from stimsteer.sysid.excitation import hankel_rank, numerical_rank, pe_order
from stimsteer.sysid.hankel import block_hankel, mosaic_hankel


def _minimal_system(rng, n, m, p):
    A = rng.standard_normal((n, n))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.standard_normal((n, m)), rng.standard_normal((p, n))
    ctrb = np.hstack([np.linalg.matrix_power(A, k) @ B for k in range(n)])
    obsv = np.vstack([C @ np.linalg.matrix_power(A, k) for k in range(n)])
    assert np.linalg.matrix_rank(ctrb) == n and np.linalg.matrix_rank(obsv) == n
    return StateSpaceModel(A=A, B=B, C=C)


def _trajectory(rng, sys, length):
    u = rng.standard_normal((length, sys.n_inputs))
    return u, sys.simulate(u, x0=rng.standard_normal(sys.n_states))


def _in_column_span(H, w):
    g = np.linalg.lstsq(H, w, rcond=None)[0]
    return np.linalg.norm(H @ g - w) / np.linalg.norm(w)


def _markov_toeplitz(h):
    """Block lower-triangular Toeplitz matrix of Markov parameters h[k] (time-major blocks)."""
    N, p, m = h.shape
    T = np.zeros((p * N, m * N))
    for i in range(N):
        for j in range(i + 1):
            T[i * p:(i + 1) * p, j * m:(j + 1) * m] = h[i - j]
    return T


# Willems J.C., Rapisarda P., Markovsky I., De Moor B.L.M. (2005), "A note on persistency of excitation", Systems &
# Control Letters 54:325, Theorem 1 (the fundamental lemma): for a controllable system and an input persistently
# exciting of order L + n, rank [H_L(u); H_L(y)] = m L + n and its columns span every length-L trajectory.
def test_fundamental_lemma_rank_and_span(rng):
    n, m, p, L = 4, 2, 3, 6
    sys = _minimal_system(rng, n, m, p)
    u, y = _trajectory(rng, sys, 200)
    assert pe_order(u, max_order=L + n) == L + n
    H = np.vstack([block_hankel(u, L), block_hankel(y, L)])
    assert numerical_rank(H) == m * L + n
    for _ in range(3):
        u2, y2 = _trajectory(rng, sys, L)
        w = np.concatenate([u2.reshape(-1), y2.reshape(-1)])
        assert _in_column_span(H, w) < 1e-9


# van Waarde H.J., De Persis C., Camlibel M.K., Tesi P. (2020), "Willems' fundamental lemma for state-space systems
# and its extension to multiple datasets", IEEE Control Systems Letters 4:602, Theorem 2: the same rank and span
# hold for the mosaic of several trials when the inputs are *collectively* persistently exciting of order L + n,
# even if no trial is on its own.
def test_fundamental_lemma_from_several_short_trials(rng):
    n, m, p, L = 4, 2, 3, 6
    sys = _minimal_system(rng, n, m, p)
    length, n_trials = L + n + 1, 14  # each trial: 2 columns at depth L + n, far fewer than m (L + n) = 20 rows
    parts = [_trajectory(rng, sys, length) for _ in range(n_trials)]
    u = np.vstack([a for a, _ in parts])
    y = np.vstack([b for _, b in parts])
    segs = [(i * length, (i + 1) * length) for i in range(n_trials)]
    assert all(pe_order(u, [s], max_order=L + n) < L + n for s in segs)
    assert pe_order(u, segs, max_order=L + n) == L + n
    H = np.vstack([mosaic_hankel(u, L, segs), mosaic_hankel(y, L, segs)])
    assert numerical_rank(H) == m * L + n
    u2, y2 = _trajectory(rng, sys, L)
    assert _in_column_span(H, np.concatenate([u2.reshape(-1), y2.reshape(-1)])) < 1e-9


# Favoreel W., De Moor B., Gevers M. (1999), "SPC: Subspace predictive control", Proc. 14th IFAC World Congress:
# on noise-free data the least-squares predictor's future-input block is the block-Toeplitz matrix of Markov
# parameters and the predictions are exact (the past window determines the state when Tini >= the lag).
@pytest.mark.parametrize("n, m, p, past", [(3, 2, 1, 3), (4, 2, 3, 2)])
def test_spc_predictor_recovers_the_markov_parameters(n, m, p, past, rng):
    sys = _minimal_system(rng, n, m, p)
    N = 8
    parts = [_trajectory(rng, sys, 300) for _ in range(2)]
    s = Session(u=np.vstack([a for a, _ in parts]), y=np.vstack([b for _, b in parts]), sample_rate_hz=1.0,
                trials=[(0, 300), (300, 600)])
    lsq = LsqPredictor(past_steps=past, horizon_steps=N, alphas=[1e-14], n_states=n).fit(s)
    T = _markov_toeplitz(sys.impulse_response(N))
    assert np.abs(lsq.Kf_ - T).max() <= 1e-10 * np.abs(T).max()
    u2, y2 = _trajectory(rng, sys, past + N)
    pred = lsq.predict(u2[:past], y2[:past], u2[past:])
    assert np.linalg.norm(pred - y2[past:]) <= 1e-10 * np.linalg.norm(y2[past:])


# Dörfler F., Coulson J., Markovsky I. (2023), "Bridging direct and indirect data-driven control formulations via
# regularizations and relaxations", IEEE Transactions on Automatic Control 68:883: with the projection regulariser
# weighted to its limit, the regularised Hankel predictor coincides with the least-squares (SPC) one. (Here the
# data are noisy, so [Up; Yp; Uf] has full row rank and g = D⁺ b is feasible with zero slack and zero penalty.)
@pytest.mark.parametrize("lambda_g", [1e4, 1e6])
def test_projection_regulariser_at_its_limit_equals_least_squares(lambda_g, rng):
    sys = _minimal_system(rng, 4, 2, 3)
    past, N = 4, 8
    parts = [_trajectory(rng, sys, 300) for _ in range(3)]
    u = np.vstack([a for a, _ in parts])
    y = np.vstack([b for _, b in parts]) + 0.1 * rng.standard_normal((900, 3))
    s = Session(u=u, y=y, sample_rate_hz=1.0, trials=[(0, 300), (300, 600), (600, 900)])
    lsq = LsqPredictor(past_steps=past, horizon_steps=N, alphas=[1e-13]).fit(s)
    hank = HankelPredictor(past_steps=past, horizon_steps=N, regularizer="projection", lambdas_g=[lambda_g],
                           lambda_y=1e3).fit(s)
    for _ in range(3):
        u2, y2 = _trajectory(rng, sys, past + N)
        y2 = y2 + 0.1 * rng.standard_normal(y2.shape)
        a = lsq.predict(u2[:past], y2[:past], u2[past:])
        b = hank.predict(u2[:past], y2[:past], u2[past:])
        assert np.linalg.norm(a - b) <= 1e-7 * np.linalg.norm(a)


# Fact of the trade (common practice, no source; it follows from the definition): a signal of period P has at most
# P distinct Hankel rows, so rank H_L(u) <= P for every depth L, and fixed-rate stimulation is not exciting enough
# once L + n > P.
@pytest.mark.parametrize("period", [3, 7])
def test_periodic_pulse_train_has_hankel_rank_at_most_its_period(period):
    u = np.zeros(20 * period)
    u[::period] = 1.0
    for L in (period + 1, 2 * period, 3 * period):
        assert hankel_rank(u, L) <= period
    assert pe_order(u, max_order=4 * period) == period


# Maximum-length sequences (scipy.signal.max_len_seq): the circular autocorrelation of a ±1 sequence of period
# P = 2^k − 1 is P at lag 0 and −1 elsewhere, so its P cyclic shifts are independent (Golomb S.W. (1967), Shift
# Register Sequences, Holden-Day); the sequence is exciting of order P exactly (and no more, being P-periodic).
@pytest.mark.parametrize("nbits", [4, 5])
def test_maximum_length_sequence_is_exciting_up_to_its_period(nbits):
    seq = 2.0 * max_len_seq(nbits)[0] - 1.0
    P = 2 ** nbits - 1
    assert seq.size == P
    u = np.tile(seq, 3)
    assert pe_order(u, max_order=2 * P) == P
    assert hankel_rank(u, P) == P and hankel_rank(u, P + 1) == P
