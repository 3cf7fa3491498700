"""What a closed loop computes once and reuses: a data controller's per-plan products (free response, weighted
error, predicted outputs), the runner's count of the limits at work, the bench's training statistics. Each reused
value must be the one computed afresh, whatever was planned before and however the caller reuses its buffers.

Reference: a fresh controller planning from copies of the same arrays (common practice, no source)."""

import numpy as np
import pytest

from stimsteer.control.evaluation.closed_loop import _output_stats, _training_part
from stimsteer.control.limits import StimLimits
from stimsteer.control.loop import _limit_use
from stimsteer.control.mpc import DataPredictiveController
from stimsteer.sysid import Session, StateSpaceModel


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(8)
    model = StateSpaceModel(A=[[0.8, 0.1], [0.0, 0.6]], B=[[1.0, 0.0], [0.3, 1.0]], C=[[1.0, 0.0], [0.5, 1.0]],
                            past_steps=2)
    u = rng.uniform(0.0, 1.0, size=(600, 2))
    y = model.simulate(u) + 0.01 * rng.standard_normal((600, 2)) + [3.0, -1.0]
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=[[0, 200], [200, 400], [400, 600]],
                   input_names=model.input_names, output_names=model.output_names)


def _controllers(session):
    from stimsteer.sysid.datadriven import HankelPredictor, LsqPredictor

    # the soft output bound is reached by some plans: DeePC then checks its outputs and solves in g where broken
    lim = StimLimits(amplitude_min_ua=[0.0, 0.0], amplitude_max_ua=[1.0, 1.0], slew_max_ua=[0.3, 0.3],
                     output_max=[8.0, np.inf])
    preds = [LsqPredictor(past_steps=3, horizon_steps=5).fit(session),
             HankelPredictor(past_steps=3, horizon_steps=5, lambdas_g=(1e-3,)).fit(session)]
    return lambda i: DataPredictiveController(predictor=preds[i], limits=lim, input_weight=1e-2).fit()


@pytest.mark.parametrize("which", [0, 1], ids=["spc", "deepc"])
def test_a_plan_after_other_plans_and_on_a_reused_buffer_equals_a_fresh_one(session, which):
    make = _controllers(session)
    ctrl = make(which)
    answers, kept = [], []  # DeePC: each plan's g, and whether its input-only answer kept the output bound
    if which:
        solve, check = ctrl._solve_fast, ctrl._outputs_kept
        ctrl._solve_fast = _recording(solve, answers)
        ctrl._outputs_kept = _recording(check, kept)
    rng = np.random.default_rng(which)
    U, Y = np.empty((6, 2)), np.empty((6, 2))  # the caller's buffers, refilled before every plan
    for k in range(10):
        U[:] = session.u[100 + 7 * k:106 + 7 * k]
        Y[:] = session.y[100 + 7 * k:106 + 7 * k] + rng.uniform(-0.05, 0.05, (6, 2))
        target = np.array([5.5 + 0.4 * k, 1.0])
        ctrl.reset()  # no warm start from the plans before (it moves answers within rounding); the memos stay
        got = ctrl.plan(U, Y, target=target, last_input=U[-1])
        want = make(which).plan(U.copy(), Y.copy(), target=target.copy(), last_input=U[-1].copy())
        assert np.array_equal(got.inputs, want.inputs)
        assert np.array_equal(got.predicted_outputs, want.predicted_outputs)
        assert got.cost_terms == want.cost_terms
        if which:  # the predicted outputs are those of the plan's own g (not of the input-only answer before it)
            assert np.array_equal(got.predicted_outputs.reshape(-1), ctrl._Yf @ answers[-1][1])
    assert not which or (True in kept and False in kept)  # both DeePC paths were taken


def _recording(fn, into):
    def wrapped(*args, **kwargs):
        out = fn(*args, **kwargs)
        into.append(out)
        return out
    return wrapped


def test_limit_use_counts_plans_by_their_first_input():
    def act(first, later, budget):
        row = np.array(first, bool)
        a = {key: np.vstack([row, np.array(later, bool)]) for key in ("amplitude_min", "amplitude_max",
                                                                      "charge_density", "slew")}
        a["amplitude_min"] = np.zeros((2, 2), bool)
        return {**a, "energy_budget": budget}

    active = [act([0, 1], [1, 1], True), act([0, 0], [1, 1], False), act([1, 1], [0, 0], np.True_)]
    assert _limit_use(active) == {"amplitude_min": 0, "amplitude_max": 2, "charge_density": 2, "slew": 2,
                                  "energy_budget": 2}


def test_training_statistics_are_those_of_the_trials_and_kept_per_session(session):
    full, mean, std = _training_part(session, (0, 2))
    direct = session.select_trials((0, 2))
    assert np.array_equal(full.y, direct.y)
    assert all(np.array_equal(a, b) for a, b in zip((mean, std), _output_stats(direct)))
    assert _training_part(session, [0, 2])[1] is mean  # the same trials again: kept
    assert not np.array_equal(_training_part(session, (1,))[1], mean)
    other = session.replace(y=session.y + 1.0)  # another session: its own statistics
    assert np.allclose(_training_part(other, (0, 2))[1], mean + 1.0)


def test_deepc_cost_terms_read_late_are_those_of_the_plan_and_not_computed_before(session, monkeypatch):
    """DeePC's cost terms are computed at their first read: after the caller refilled its buffers, changed its
    target array and planned again, they must still be the terms of that plan (its arrays copied)."""
    from stimsteer.control.mpc import data as data_module

    calls, real = [], data_module._data_terms
    monkeypatch.setattr(data_module, "_data_terms", lambda *a: calls.append(1) or real(*a))
    make = _controllers(session)
    ctrl = make(1)
    rng = np.random.default_rng(5)
    U, Y, target = np.empty((6, 2)), np.empty((6, 2)), np.empty(2)  # the caller's buffers, refilled every plan
    late, now = [], []
    for k in range(6):
        U[:] = session.u[150 + 9 * k:156 + 9 * k]
        Y[:] = session.y[150 + 9 * k:156 + 9 * k] + rng.uniform(-0.05, 0.05, (6, 2))
        target[:] = [5.5 + 0.5 * k, 1.0]
        ctrl.reset()
        late.append(ctrl.plan(U, Y, target=target, last_input=U[-1]))
        now.append(make(1).plan(U.copy(), Y.copy(), target=target.copy(), last_input=U[-1].copy()).cost_terms)
    assert len(calls) == len(now)  # only the fresh plans' terms were read, so only they were computed
    assert [p.cost_terms for p in late] == now
    assert all("past_consistency" in t or "regularizer" in t for t in now)  # the terms of g were there to compare
