"""Subspace identification on open benchmark data.

Data: DaISy, De Moor B.L.R. (ed.), KU Leuven — Database for the Identification of Systems; the files are the
read-only copies in ../shared/data/daisy beside the repository (two columns: input, output).
- dryer.dat: a laboratory air heater ("hair dryer"): input the heater voltage, output the outlet air
  temperature, 1000 samples, sampled at 0.08 s (from memory); the heater acts with a delay of a few samples
  (from memory), so the past/future blocks of 10 samples below cover it with room to spare.
- ballbeam.dat: a ball-and-beam set-up: input the beam angle, output the ball position, 1000 samples at 0.1 s.
  The ball on a beam is open-loop unstable (from memory: roughly a double integrator), so the data were recorded
  with a stabilising feedback loop in place.
"""

import warnings

import numpy as np
import pytest

from stimsteer.sysid import Session
from stimsteer.sysid.subspace import SubspaceId

from stimsteer.sysid.metrics import vaf

from .open_data import data_folder, require


# shared/ lies beside the repository (on a workstation and in CI alike), or where STIMSTEER_OPEN_DATA says
DAISY = data_folder() / "daisy"
WEIGHTINGS = ["n4sid", "moesp", "cva"]
PAST = FUTURE = 10  # samples: several times the air heater's delay of a few samples (from memory)


def _load(name, sample_rate_hz):
    path = require(DAISY / name)  # skips naming the folder, or fails when CI is set
    data = np.loadtxt(path)
    u, y = data[:, :1], data[:, 1:2]
    # the mean is taken from the first 500 samples only: nothing of the validation half reaches the fit
    u, y = u - u[:500].mean(axis=0), y - y[:500].mean(axis=0)
    train = Session(u=u[:500], y=y[:500], sample_rate_hz=sample_rate_hz)
    return train, u, y


@pytest.mark.parametrize("weighting", WEIGHTINGS)
def test_dryer_free_run_vaf_on_the_second_half_is_at_least_98_percent(weighting):
    # DaISy, De Moor B.L.R. (ed.), KU Leuven: dryer.dat. Issue target: order chosen automatically from the first
    # 500 samples, free-run VAF >= 98 % on the last 500. Measured in development: 99.3 % for all three weightings
    # (order 3 chosen for each with these blocks).
    train, u, y = _load("dryer.dat", sample_rate_hz=12.5)
    est = SubspaceId(past_steps=PAST, future_steps=FUTURE, weighting=weighting).fit(train)
    assert est.is_stable_
    assert 1 <= est.order_ <= 10
    assert est.order_table_["selected"].sum() == 1
    md = est.model_
    # initial state of the validation half estimated from the last PAST samples of the first half
    x0 = md.estimate_state(u[500 - PAST:500], y[500 - PAST:500])
    y_sim = md.simulate(u[500:], x0=x0)
    assert float(vaf(y[500:], y_sim)[0]) >= 98.0


def _kstep_vaf(md, u, y, horizon):
    """VAF of the ``horizon``-step-ahead prediction over the second half, each from the PAST samples before it."""
    truth, pred = [], []
    for t in range(500 + PAST, len(y) - horizon + 1):
        pred.append(md.predict(u[t - PAST:t], y[t - PAST:t], u[t:t + horizon])[-1])
        truth.append(y[t + horizon - 1])
    return float(vaf(np.array(truth), np.array(pred))[0])


@pytest.mark.parametrize("weighting", WEIGHTINGS)
def test_ballbeam_closed_loop_data_reaches_the_measured_floor(weighting):
    # DaISy, De Moor B.L.R. (ed.), KU Leuven: ballbeam.dat. Closed-loop data (from memory: the plant is open-loop
    # unstable and was run inside a stabilising loop). Subspace methods assume the past inputs are uncorrelated
    # with the future noise; under feedback they are not, so the estimates are biased and no accuracy target is
    # promised. What the method reaches (measured in development, first half fit, second half scored):
    #   - the identified model is unstable (spectral radius 1.03-1.04), as the plant is, so a free-run simulation
    #     over 500 samples diverges and is not scored;
    #   - orders 2 (N4SID), 4 (MOESP), 5 (CVA); 1-step-ahead VAF 99.9 %, 10-step-ahead (1 s) VAF 97.4 % (N4SID),
    #     99.1 % (MOESP, CVA).
    # Asserted: only the floor 95 % for the 10-step-ahead VAF (below the lowest measured value, 97.4 %) and 99 % for
    # one step (lowest measured 99.94 %), and that instability, when found, is reported with a warning.
    train, u, y = _load("ballbeam.dat", sample_rate_hz=10.0)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        est = SubspaceId(past_steps=PAST, future_steps=FUTURE, weighting=weighting).fit(train)
    reported = [w for w in caught if "unstable" in str(w.message) and "spectral radius" in str(w.message)]
    assert bool(reported) == (not est.is_stable_)
    assert est.is_stable_ == est.model_.is_stable
    md = est.model_
    assert _kstep_vaf(md, u, y, horizon=1) >= 99.0
    assert _kstep_vaf(md, u, y, horizon=10) >= 95.0


def test_missing_data_fail_when_ci_is_set_and_skip_naming_the_folder_otherwise(monkeypatch, tmp_path):
    monkeypatch.setitem(globals(), "DAISY", tmp_path / "daisy")
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match="expected at .*daisy/dryer.dat.*CI is set"):
        _load("dryer.dat", sample_rate_hz=12.5)
    monkeypatch.delenv("CI")
    with pytest.raises(pytest.skip.Exception, match="expected at .*daisy/dryer.dat"):
        _load("dryer.dat", sample_rate_hz=12.5)


def test_the_data_folder_can_be_given_by_the_environment(monkeypatch, tmp_path):
    # issue 18: a fresh clone elsewhere points the tests at a copy of the data
    monkeypatch.setenv("STIMSTEER_OPEN_DATA", str(tmp_path))
    assert data_folder() == tmp_path
    monkeypatch.delenv("CI", raising=False)
    with pytest.raises(pytest.skip.Exception, match=rf"open data file x.dat not found: expected at {tmp_path}/x.dat.*"
                                                   "STIMSTEER_OPEN_DATA"):
        require(tmp_path / "x.dat")
