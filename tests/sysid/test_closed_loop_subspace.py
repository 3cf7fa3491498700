"""Closed-loop subspace identification (stimsteer.sysid.subspace.closed_loop, PBSID on a VARX model).

Outside checks, all simulated and seeded:
- Under output feedback with noise, ordinary (open-loop) subspace identification is biased, while predictor-based
  subspace identification is consistent (Chiuso 2007, Automatica 43:1034, Sec. 1 and Thm. 4.1; Ljung & McKelvey
  1996, Signal Processing 52:209): the PBSID poles and impulse response are close to the true ones, the N4SID ones
  are not, and the PBSID error shrinks as the data grow (consistency).
- On open-loop noise-free data the true system is recovered (any consistent method must: Van Overschee & De Moor
  1996, Subspace Identification for Linear Systems, Thm. 2, from memory).
"""

import warnings

import numpy as np
import pytest

from stimsteer.sysid import Session, SubspaceId
from stimsteer.sysid.exceptions import InvalidParameterError, SessionError, StimsteerWarning
from stimsteer.sysid.registry import METHODS
from stimsteer.sysid.subspace import ClosedLoopSubspaceId

A_TRUE = np.array([[1.5, -0.7], [1.0, 0.0]])
B_TRUE, C_TRUE, K_TRUE = np.array([[1.0], [0.0]]), np.array([[1.0, 0.5]]), np.array([0.5, 0.3])


def _closed_loop(seed, n, n_trials=1):
    """Innovation-form plant under the output feedback u = r − 0.6 y (r white, small next to the noise)."""
    from scipy.signal import dlsim

    rng = np.random.default_rng(seed)
    e, r = rng.standard_normal(n), 0.3 * rng.standard_normal(n)
    # the loop closed by hand: x+ = (A − 0.6 B C) x + B r + (K − 0.6 B) e,  y = C x + e,  u = r − 0.6 y
    B, K = B_TRUE[:, 0], K_TRUE
    sys = (A_TRUE - 0.6 * np.outer(B, C_TRUE[0]), np.column_stack([B, K - 0.6 * B]), C_TRUE, np.array([[0.0, 1.0]]))
    y = dlsim(sys + (1.0,), np.column_stack([r, e]))[1].reshape(n, 1)
    u = (r - 0.6 * y[:, 0]).reshape(n, 1)
    edges = np.linspace(0, n, n_trials + 1).astype(int)
    return Session(u=u, y=y, sample_rate_hz=1.0, metadata={"recorded_under_feedback": True},
                   trials=np.column_stack([edges[:-1], edges[1:]]))


def _impulse(A, B, C, n=15):
    out, x = [], B.copy()
    for _ in range(n):
        out.append(float((C @ x).ravel()[0]))
        x = A @ x
    return np.array(out)


def _errors(model):
    true_poles = np.sort_complex(np.linalg.eigvals(A_TRUE))
    poles = np.sort_complex(model.poles)
    h_true = _impulse(A_TRUE, B_TRUE, C_TRUE)
    h = _impulse(model.A, model.B, model.C)
    return float(np.max(np.abs(poles - true_poles))), float(np.linalg.norm(h - h_true) / np.linalg.norm(h_true))


@pytest.fixture(scope="module")
def fits():
    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StimsteerWarning)
        for seed in range(3):
            s = _closed_loop(seed, 20000)
            out.append((_errors(SubspaceId(past_steps=10, future_steps=10, order=2).fit(s).model_),
                        _errors(ClosedLoopSubspaceId(past_steps=15, future_steps=10, order=2).fit(s).model_)))
    return out


def test_under_feedback_ordinary_subspace_is_biased_and_pbsid_is_close(fits):
    for (pole_n4sid, h_n4sid), (pole_pbsid, h_pbsid) in fits:
        assert pole_n4sid > 0.2 and h_n4sid > 0.3  # the open-loop method converges to a wrong system
        assert pole_pbsid < 0.05 and h_pbsid < 0.2  # what is left is variance: it shrinks with data (below)
        assert pole_pbsid < 0.25 * pole_n4sid and h_pbsid < 0.25 * h_n4sid


@pytest.mark.slow
def test_pbsid_error_shrinks_with_more_data():
    errs = {}
    for n in (2000, 40000):
        errs[n] = np.mean([_errors(ClosedLoopSubspaceId(past_steps=15, future_steps=10, order=2)
                                   .fit(_closed_loop(10 + s, n)).model_)[1] for s in range(3)])
    assert errs[40000] < 0.6 * errs[2000]


def test_noise_free_open_loop_data_give_the_true_system():
    rng = np.random.default_rng(0)
    u = rng.standard_normal((3000, 1))
    x, y = np.zeros(2), np.zeros((3000, 1))
    for k in range(3000):
        y[k] = C_TRUE @ x
        x = A_TRUE @ x + B_TRUE[:, 0] * u[k, 0]
    est = ClosedLoopSubspaceId(past_steps=8, future_steps=4).fit(Session(u=u, y=y, sample_rate_hz=1.0))
    assert est.order_ == 2
    pole_err, h_err = _errors(est.model_)
    assert pole_err < 1e-4 and h_err < 1e-4


@pytest.mark.slow
def test_registered_and_chosen_for_sessions_recorded_under_feedback():
    from stimsteer.sysid.routes import fit_route

    assert ("indirect", "pbsid") in METHODS
    s = _closed_loop(0, 4000, n_trials=4)
    with pytest.warns(StimsteerWarning, match="recorded under feedback"):
        res = fit_route(s, route="indirect", method="subspace", settings={"past_steps": 12, "future_steps": 6,
                                                                           "order": 2})
    assert isinstance(res.predictor, ClosedLoopSubspaceId) and res.provenance["method"] == "pbsid"
    with pytest.warns(StimsteerWarning, match="not settings of the closed-loop method"):
        res = fit_route(s, route="indirect", method="subspace", settings={"weighting": "cva", "order": 2})
    assert type(res.predictor) is SubspaceId


def test_storage_round_trip(tmp_path):
    from stimsteer.sysid.storage import load_predictor, save_predictor

    est = ClosedLoopSubspaceId(past_steps=10, future_steps=5, order=2).fit(_closed_loop(1, 3000))
    save_predictor(est, tmp_path / "m.h5", provenance={})
    back, _ = load_predictor(tmp_path / "m.h5")
    assert type(back) is ClosedLoopSubspaceId
    np.testing.assert_allclose(back.model_.A, est.model_.A)
    up, yp = np.zeros((10, 1)), np.ones((10, 1))
    np.testing.assert_allclose(back.predict(up, yp, np.ones((5, 1))), est.predict(up, yp, np.ones((5, 1))))


def test_bad_settings_are_refused():
    s = _closed_loop(0, 500)
    with pytest.raises(InvalidParameterError, match="feedthrough must be False"):
        ClosedLoopSubspaceId(feedthrough=True).fit(s)
    with pytest.raises(InvalidParameterError, match="future_steps"):
        ClosedLoopSubspaceId(past_steps=3, future_steps=5).fit(s)
    with pytest.raises(SessionError, match="valid runs of at least"):
        ClosedLoopSubspaceId(past_steps=600, future_steps=5).fit(s)
