"""DeePC that takes trials in as they arrive (stimsteer.control.mpc.online_deepc, stimsteer.sysid.online_hankel).

Outside check: after each trial, the plans equal those of a DeePC controller (Coulson, Lygeros & Dörfler 2019, "Data-
Enabled Predictive Control: In the Shallows of the DeePC", ECC) built from scratch on a HankelPredictor fitted on all
the trials so far with the same single strength, to 1e-6, on both the cvxpy path and the fast path; the compressed
data differ from the batch blocks by a rotation of their columns, which the l2 and projection regularisers do not
see (least squares through an updated QR factor: Golub & Van Loan 2013, Matrix Computations, 4th ed., Sec. 6.5.3).
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import DataPredictiveController
from stimsteer.control.mpc.online_deepc import OnlineDeePC
from stimsteer.sysid import Session
from stimsteer.sysid.datadriven import HankelPredictor
from stimsteer.sysid.exceptions import InvalidParameterError, NotFittedError
from stimsteer.sysid.online_hankel import OnlineHankelPredictor

TRIAL, T, N = 150, 3, 5
LIM = StimLimits(amplitude_min_ua=[-1.0, -0.5], amplitude_max_ua=[1.0, 0.8], slew_max_ua=[0.4, 0.3])
# tight interior-point tolerances: the reference must be closer to the optimum than the 1e-6 compared
TIGHT = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12}


@pytest.fixture(scope="module")
def trials():
    rng = np.random.default_rng(7)
    n, m, p = 3, 2, 2
    A = rng.normal(size=(n, n))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.normal(size=(n, m)), rng.normal(size=(p, n)) * np.array([[1.0], [5.0]])  # outputs of unequal scale
    out = []
    for _ in range(3):
        u, x, y = rng.uniform(-1, 1, size=(TRIAL, m)), np.zeros(n), np.empty((TRIAL, p))
        for k in range(TRIAL):
            y[k] = C @ x + 0.05 * rng.normal(size=p)
            x = A @ x + B @ u[k]
        out.append((u, y))
    return out


def _session(trials):
    u, y = np.vstack([t[0] for t in trials]), np.vstack([t[1] for t in trials])
    edges = np.arange(len(trials) + 1) * TRIAL
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=np.column_stack([edges[:-1], edges[1:]]))


@pytest.mark.parametrize("reg", ["projection", "l2"])
def test_online_deepc_plans_as_deepc_rebuilt_from_scratch_after_each_trial(trials, reg):
    lam, lam_y = 1e-2, 1e2
    online = OnlineDeePC(data=OnlineHankelPredictor(past_steps=T, horizon_steps=N, lambda_g=lam, regularizer=reg,
                                                    lambda_y=lam_y),
                         limits=LIM, input_weight=1e-2, solver_options=TIGHT)
    rng = np.random.default_rng(1)
    for i, (u, y) in enumerate(trials):
        online.update(u, y)
        batch = HankelPredictor(past_steps=T, horizon_steps=N, lambdas_g=(lam,), regularizer=reg,
                                lambda_y=lam_y).fit(_session(trials[:i + 1]))
        ref = DataPredictiveController(predictor=batch, limits=LIM, input_weight=1e-2, solver_options=TIGHT).fit()
        assert online.n_rebuilds_ == i  # rebuilt once per trial, on first use
        for _ in range(3):
            up, yp = rng.uniform(-0.5, 0.5, size=(T, 2)), rng.normal(size=(T, 2))
            target = rng.normal(size=2) * 3
            for fast in (False, True):
                a = online.plan(up, yp, target=target, use_fast_path=fast)
                b = ref.plan(up, yp, target=target, use_fast_path=fast)
                assert a.ok and b.ok
                np.testing.assert_allclose(a.inputs, b.inputs, rtol=0, atol=1e-6)
                np.testing.assert_allclose(a.predicted_outputs, b.predicted_outputs, rtol=0, atol=1e-5)
        assert online.n_rebuilds_ == i + 1
        fb = np.array([[0.3, -0.2]] * N)  # the predictor itself, as a fallback plan uses it
        np.testing.assert_allclose(online.data.predict(up, yp, fb), batch.predict(up, yp, fb), rtol=0, atol=1e-8)


def test_online_deepc_refuses_what_it_cannot_reproduce_and_needs_data():
    with pytest.raises(InvalidParameterError, match="'projection' or 'l2'"):
        OnlineHankelPredictor(past_steps=T, horizon_steps=N, lambda_g=1e-2, regularizer="l1")
    with pytest.raises(InvalidParameterError, match="OnlineHankelPredictor"):
        OnlineDeePC(data=HankelPredictor(past_steps=T, horizon_steps=N), limits=LIM)
    online = OnlineDeePC(data=OnlineHankelPredictor(past_steps=T, horizon_steps=N, lambda_g=1e-2), limits=LIM)
    with pytest.raises(NotFittedError, match="no data yet"):
        online.plan(np.zeros((T, 2)), np.zeros((T, 2)), target=[0.0, 0.0])
