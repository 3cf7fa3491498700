"""Online identification (stimsteer.sysid.online): updates as samples and trials arrive equal a batch refit on the
same data to 1e-9 relative, through the batch estimators' public fitted attributes.

Outside checks: least squares through an updated QR factor equals least squares on all rows (Golub & Van Loan 2013,
Matrix Computations, 4th ed., Sec. 6.5.3); normal equations from shifted sums equal the centred ones (Chan, Golub
& LeVeque 1983, "Algorithms for computing the sample variance", Am. Stat. 37:242); the noise-free ARX recovers
the true coefficients (Ljung 1999, System Identification, ch. 4, from memory).
"""

import numpy as np
import pytest

from stimsteer.sysid import RidgeArx, Session
from stimsteer.sysid.datadriven import LsqPredictor
from stimsteer.sysid.exceptions import InvalidParameterError, NotFittedError, SessionError
from stimsteer.sysid.online import OnlineLsqPredictor, OnlineRidgeArx, ScheduledRefit

TRIAL = 200


def _rel(a, b):
    return float(np.abs(np.asarray(a) - np.asarray(b)).max() / np.abs(np.asarray(b)).max())


@pytest.fixture(scope="module")
def recording():
    """Six noisy trials of a 4-state system with a large output offset; one sample missing in the fourth trial."""
    rng = np.random.default_rng(3)
    n, m, p = 4, 2, 3
    A = rng.normal(size=(n, n))
    A *= 0.85 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.normal(size=(n, m)), rng.normal(size=(p, n))
    us, ys = [], []
    for _ in range(6):
        u, x, y = rng.normal(size=(TRIAL, m)), np.zeros(n), np.empty((TRIAL, p))
        for k in range(TRIAL):
            y[k] = C @ x + 0.1 * rng.normal(size=p) + 50.0  # an offset far from zero: centring must lose no digits
            x = A @ x + B @ u[k]
        us.append(u)
        ys.append(y)
    u, y = np.vstack(us), np.vstack(ys)
    y[3 * TRIAL + 33] = np.nan
    edges = np.arange(0, 6 * TRIAL + 1, TRIAL)
    mask = np.all(np.isfinite(y), axis=1)
    session = Session(u=u, y=np.nan_to_num(y), mask=mask, sample_rate_hz=100.0,
                      trials=np.column_stack([edges[:-1], edges[1:]]))
    return u, y, edges, session


def _feed(online, u, y, edges, cuts):
    """Trial by trial, each trial in pieces cut at ``cuts`` (samples arriving in blocks, and one at a time)."""
    for a, b in zip(edges[:-1], edges[1:]):
        bounds = [a] + [a + c for c in cuts] + [b]
        for i, (lo, hi) in enumerate(zip(bounds[:-1], bounds[1:])):
            online.update(u[lo:hi], y[lo:hi], new_trial=(i == 0))
    return online


@pytest.mark.parametrize("intercept", [True, False])
def test_online_ridge_arx_equals_the_batch_refit(recording, intercept):
    u, y, edges, session = recording
    batch = RidgeArx(output_lags=2, input_lags=2, delay_samples=1, alphas=(1e-3,), fit_intercept=intercept).fit(session)
    online = _feed(OnlineRidgeArx.from_fitted(batch), u, y, edges, cuts=(1, 2, 77, 78, 79))
    assert online.n_rows_ == batch.n_rows_
    assert _rel(online.coef_, batch.coef_) < 1e-9
    if intercept:
        assert _rel(online.intercept_, batch.intercept_) < 1e-9


def test_online_ridge_arx_follows_the_batch_fit_after_every_trial(recording):
    u, y, edges, session = recording
    online = OnlineRidgeArx(output_lags=1, input_lags=3, delay_samples=0, alpha=1e-2)
    for t in range(1, 4):
        online.update(u[edges[t - 1]:edges[t]], y[edges[t - 1]:edges[t]])
        part = Session(u=u[:edges[t]], y=y[:edges[t]], sample_rate_hz=100.0,
                       trials=np.column_stack([edges[:t], edges[1:t + 1]]))
        batch = RidgeArx(output_lags=1, input_lags=3, delay_samples=0, alphas=(1e-2,)).fit(part)
        assert _rel(online.coef_, batch.coef_) < 1e-9 and _rel(online.intercept_, batch.intercept_) < 1e-9


def test_online_ridge_arx_recovers_a_noise_free_system_and_realises_it():
    rng = np.random.default_rng(0)
    u = rng.standard_normal((400, 1))
    y = np.zeros((400, 1))
    for k in range(1, 400):
        y[k] = 0.5 * y[k - 1] + 2.0 * u[k - 1] + 0.3 * (1 - 0.5)  # resting output 0.3
    online = OnlineRidgeArx(output_lags=1, input_lags=1, delay_samples=1, alpha=0.0).update(u, y)
    np.testing.assert_allclose(online.coef_, [[0.5, 2.0]], atol=1e-10)
    model = online.state_space_model()
    np.testing.assert_allclose(model.info["output_offset"], [0.3], atol=1e-9)
    np.testing.assert_allclose(model.simulate(np.ones((200, 1)))[-1], [4.0], atol=1e-9)  # DC gain 2 / (1 − 0.5)


def test_online_lsq_predictor_equals_the_batch_refit(recording):
    u, y, edges, session = recording
    batch = LsqPredictor(past_steps=3, horizon_steps=5, alphas=(1e-4,)).fit(session)
    online = _feed(OnlineLsqPredictor.from_fitted(batch), u, y, edges, cuts=(1, 3, 50, 51, 52))  # runs < window
    assert online.n_columns_ == batch.n_columns_
    np.testing.assert_allclose(online.channel_scale_, batch.channel_scale_, rtol=1e-12)
    assert _rel(np.hstack([online.Kp_, online.Kf_]), np.hstack([batch.Kp_, batch.Kf_])) < 1e-9


def test_online_lsq_predictor_after_each_trial_and_with_a_tiny_strength(recording):
    u, y, edges, _ = recording
    online = OnlineLsqPredictor(past_steps=2, horizon_steps=4, alpha=1e-10)
    for t in (1, 2):
        online.update(u[edges[t - 1]:edges[t]], y[edges[t - 1]:edges[t]])
        part = Session(u=u[:edges[t]], y=y[:edges[t]], sample_rate_hz=100.0,
                       trials=np.column_stack([edges[:t], edges[1:t + 1]]))
        batch = LsqPredictor(past_steps=2, horizon_steps=4, alphas=(1e-10,)).fit(part)
        assert _rel(np.hstack([online.Kp_, online.Kf_]), np.hstack([batch.Kp_, batch.Kf_])) < 1e-9


def test_the_block_qr_factor_equals_the_hankel_predictors_compressed_blocks(recording):
    from stimsteer.sysid.datadriven import HankelPredictor

    u, y, edges, session = recording
    batch = HankelPredictor(past_steps=3, horizon_steps=4, lambdas_g=(1e-3,)).fit(session)
    b = batch.data_blocks()
    D = np.vstack([b.Up, b.Yp, b.Uf, b.Yf])
    F = _feed(OnlineLsqPredictor(past_steps=3, horizon_steps=4, alpha=1e-3), u, y, edges, cuts=(5,)).hankel_factor()
    assert _rel(F @ F.T, D @ D.T) < 1e-9  # the same compressed Hankel matrix, up to a rotation of its columns


def test_scheduled_refit_refits_on_all_trials_on_its_schedule(recording):
    u, y, edges, _ = recording
    from stimsteer.sysid.subspace import SubspaceId

    sched = ScheduledRefit(SubspaceId(order=4, past_steps=6, future_steps=6, centre_outputs=True), every_trials=2, sample_rate_hz=100.0)
    refits = [sched.add_trial(u[a:b], y[a:b]) for a, b in zip(edges[:3], edges[1:4])]
    assert refits == [False, True, False] and sched.n_refits_ == 1
    batch = SubspaceId(order=4, past_steps=6, future_steps=6, centre_outputs=True).fit(Session(u=u[:2 * TRIAL], y=y[:2 * TRIAL], sample_rate_hz=100.0,
                                               trials=[[0, TRIAL], [TRIAL, 2 * TRIAL]]))
    np.testing.assert_allclose(sched.estimator_.state_space_model().impulse_response(8),
                               batch.state_space_model().impulse_response(8), rtol=1e-9, atol=1e-12)


def test_bad_updates_and_settings_are_refused():
    online = OnlineRidgeArx(output_lags=1, input_lags=1, delay_samples=0, alpha=0.1)
    with pytest.raises(NotFittedError, match="no regression rows"):
        online.coef_
    online.update(np.zeros((5, 2)), np.ones((5, 1)))
    with pytest.raises(SessionError, match="2 inputs and 1 outputs"):
        online.update(np.zeros((5, 3)), np.ones((5, 1)))
    with pytest.raises(SessionError, match="as many rows"):
        online.update(np.zeros((5, 2)), np.ones((4, 1)))
    with pytest.raises(InvalidParameterError, match="alpha"):
        OnlineLsqPredictor(past_steps=2, horizon_steps=2, alpha=-1)
    with pytest.raises(InvalidParameterError, match="input_lags"):
        OnlineRidgeArx(output_lags=1, input_lags=0, delay_samples=0, alpha=0.1)
    with pytest.raises(NotFittedError, match="no Hankel windows"):
        OnlineLsqPredictor(past_steps=2, horizon_steps=2, alpha=0.1).Kp_


@pytest.mark.parametrize("rows_so_far", [0, 5, 12])
def test_a_block_of_rows_updates_the_factor_as_a_qr_of_everything(rows_so_far, monkeypatch):
    """``RᵀR`` after an update equals ``XᵀX`` of all rows so far, the factor is upper triangular, and a square factor
    goes through LAPACK's triangular-pentagonal QR (reference: numpy's QR of the stacked rows; Golub & Van Loan 2013,
    Matrix Computations, 4th ed., section 6.5.4, updating a QR factorisation by a block of rows)."""
    from stimsteer.sysid import online

    rng = np.random.default_rng(3)
    old, new = rng.normal(size=(rows_so_far, 12)), rng.normal(size=(40, 12))
    R0 = None if rows_so_far == 0 else np.linalg.qr(old, mode="r")[:12]
    calls = []
    real = online.tpqrt_inplace
    monkeypatch.setattr(online, "tpqrt_inplace", lambda *a, **k: calls.append(1) or real(*a, **k))
    R = online._factor_update(R0, new.copy(order="F"))
    everything = np.vstack([old, new])
    expect = np.linalg.qr(everything, mode="r")
    assert np.array_equal(R, np.triu(R))
    np.testing.assert_allclose(R.T @ R, everything.T @ everything, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(np.abs(R), np.abs(expect), rtol=1e-10, atol=1e-12)  # equal up to the rows' signs
    assert len(calls) == (1 if rows_so_far >= 12 else 0)
