"""Automatic ridge ARX on open measured data against a hand-written least-squares ARX whose order is searched.

Data: DaISy, De Moor B.L.R. (ed.), KU Leuven — Database for the Identification of Systems; dryer.dat (a laboratory
air heater: heater voltage in, outlet air temperature out, 1000 samples at 0.08 s, from memory), the read-only copy
in ../shared/data/daisy beside the repository, cut into 10 trials of 100 samples: trials 0-6 train, 7-9 are held out.
Order selection by validation on data not used for the fit: Ljung L. (1999), System Identification: Theory for the
User, 2nd ed., ch. 16. The reference searches its orders by simulation (free-run) error on trials 5-6 of the
training split, fits on all training trials with numpy's least squares, and simulates the held-out trials.
"""

import itertools

import numpy as np
import pytest

from stimsteer.sysid import Session
from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.metrics import freerun_scores

from .test_daisy import _load  # noqa: F401  (the shared loader's skip/fail rule for a missing file)
from .test_daisy import DAISY


def _session():
    path = DAISY / "dryer.dat"
    if not path.exists():
        _load("dryer.dat", 12.5)  # skips, or fails under CI, with the reason
    d = np.loadtxt(path)
    return Session(u=d[:, :1], y=d[:, 1:2], sample_rate_hz=12.5, trials=[(i * 100, (i + 1) * 100) for i in range(10)])


def _rows(s, trials, na, nb, d):
    X, Y = [], []
    L = max(na, d + nb - 1)
    for t in trials:
        a, b = s.trials[t]
        u, y = s.u[a:b, 0], s.y[a:b, 0]
        for k in range(L, b - a):
            X.append(np.r_[y[k - na:k][::-1], u[k - d - nb + 1:k - d + 1][::-1], 1.0])
            Y.append(y[k])
    return np.array(X), np.array(Y)


def _free_run_vaf(theta, s, trials, na, nb, d):
    errors, measured = [], []
    L = max(na, d + nb - 1)
    for t in trials:
        a, b = s.trials[t]
        u, y = s.u[a:b, 0], s.y[a:b, 0]
        sim = y.copy()
        for k in range(L, b - a):
            sim[k] = np.r_[sim[k - na:k][::-1], u[k - d - nb + 1:k - d + 1][::-1], 1.0] @ theta
        errors.append(y[L:] - sim[L:])
        measured.append(y[L:])
    e, m = np.concatenate(errors), np.concatenate(measured)
    return 100.0 * (1.0 - e.var() / m.var())


@pytest.mark.slow
def test_automatic_ridge_arx_is_within_one_point_of_a_searched_least_squares_arx():
    s = _session()
    grid = list(itertools.product(range(1, 9), range(1, 9), range(0, 4)))
    scores = []
    for na, nb, d in grid:
        theta = np.linalg.lstsq(*_rows(s, range(5), na, nb, d), rcond=None)[0]
        scores.append(_free_run_vaf(theta, s, [5, 6], na, nb, d))
    na, nb, d = grid[int(np.argmax(scores))]
    theta = np.linalg.lstsq(*_rows(s, range(7), na, nb, d), rcond=None)[0]
    reference = _free_run_vaf(theta, s, [7, 8, 9], na, nb, d)
    auto = RidgeArx().fit(s.select_trials(range(7)))
    ours = float(freerun_scores(auto, s.select_trials([7, 8, 9])).freerun["vaf"].mean())
    # measured in development: reference 99.10 % (orders 1, 8, delay 2), automatic 99.23 % (4, 8, delay 2); the
    # former defaults (2, 2, delay 1) gave 88.99 %
    assert reference > 95.0
    assert ours >= reference - 1.0
    assert auto.delay_samples_ == d == 2  # both find the heater's transport delay
