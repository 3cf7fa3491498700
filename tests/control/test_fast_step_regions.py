"""The fast step's answers on known active sets (stimsteer.control.mpc.fast_step._Regions) and the live runner's
use of the time between samples.

Outside checks: the answer on an active set is the optimum exactly when its rows meet their bounds and its
multipliers have their bounds' signs (Bemporad, Morari, Dua & Pistikopoulos 2002, The explicit linear quadratic
regulator for constrained systems, Automatica 38:3-20); here it is compared with daqp's answer (a dual active-set
method, Arnström, Bemporad & Axehill 2022) on the same QP, and with the cvxpy problem solved by CLARABEL.
"""

import gc
import time

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.mpc.fast_step import FastStep
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.control.realtime import run_live
from stimsteer.sysid import StateSpaceModel

pytest.importorskip("daqp")

LIM = StimLimits(amplitude_min_ua=[-1.0, -0.5], amplitude_max_ua=[1.0, 0.8], slew_max_ua=[0.3, 0.2])
BOX = StimLimits(amplitude_min_ua=[-1.0, -0.5], amplitude_max_ua=[1.0, 0.8])


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(7)
    A = rng.normal(size=(5, 5))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(5, 2)), C=rng.normal(size=(3, 5)), past_steps=3)


def _far(model):
    gain = model.C @ np.linalg.solve(np.eye(5) - model.A, model.B)
    return gain @ np.array([3.0, -2.0])  # beyond the amplitude window: bounds bind on most steps


def _closed_loop(model, step, target, n=150, T=3):
    """Windows of ``T`` samples of a closed loop run with ``step`` (its maps built between samples, as a live
    runner does)."""
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.05, process_noise_std=0.05)
    U = [np.zeros(2)] * T
    Y = [plant.step(u) for u in U]
    out = []
    for k in range(n):
        u, y = np.array(U[-T:]), np.array(Y[-T:])
        tgt = target if (k // 40) % 2 == 0 else -0.3 * target  # the target moves: other active sets
        out.append((u, y, U[-1], tgt))
        U.append(step.plan(u, y, target=tgt, last_input=U[-1]).inputs[0])
        step.idle()
        Y.append(plant.step(U[-1]))
    return out


@pytest.mark.parametrize("limits", [LIM, BOX], ids=["slew", "box"])
def test_answers_on_known_active_sets_equal_the_solvers(model, limits):
    ctrl = ModelPredictiveController(model=model, limits=limits, horizon_steps=8, input_weight=1e-2).fit()
    step, ref = FastStep(ctrl), FastStep(ctrl)
    ref._regions = None  # daqp at every step
    hits = []
    solve = step._regions.solve
    step._regions.solve = lambda *a: hits.append(solve(*a) is not None) or solve(*a)
    windows = _closed_loop(model, step, _far(model))
    assert len(step._regions.maps) >= 3 and sum(hits) >= len(hits) // 2  # sets were found and reused
    for u, y, last, tgt in windows:
        got = step.plan(u, y, target=tgt, last_input=last)
        want = ref.plan(u, y, target=tgt, last_input=last)
        assert not got.fallback and got.status == want.status == "optimal"
        np.testing.assert_allclose(got.inputs, want.inputs, rtol=0, atol=1e-9)
    for u, y, last, tgt in windows[::15]:  # an interior-point solver, another algorithm (to its tolerance)
        cvx = ctrl.plan(u, y, target=tgt, last_input=last, use_fast_path=False)
        np.testing.assert_allclose(step.plan(u, y, target=tgt, last_input=last).inputs[0], cvx.inputs[0],
                                   atol=1e-6)


def test_a_window_longer_than_the_plan_has_its_maps_act_on_q(model):
    # past 12 samples of 5 channels (60 values) against 16 planned inputs: the window is taken to q's part
    # z = Q_w w first and the sets' maps act on [z; 1] (16 columns, not 60); the answers are daqp's on the same QP
    # (the reference solver, as above) and the cvxpy plan's, and the loop reuses known sets as on short windows;
    # the tolerances are those of test_answers_on_known_active_sets_equal_the_solvers above
    long = model.replace(past_steps=12)
    ctrl = ModelPredictiveController(model=long, limits=LIM, horizon_steps=8, input_weight=1e-2).fit()
    step, ref = FastStep(ctrl), FastStep(ctrl)
    ref._regions = None
    assert step._by_q and step._regions.maps[()].K.shape[1] == 16
    hits = []
    solve = step._regions.solve
    step._regions.solve = lambda *a: hits.append(solve(*a) is not None) or solve(*a)
    windows = _closed_loop(long, step, _far(long), T=12)
    assert len(step._regions.maps) >= 3 and sum(hits) >= len(hits) // 2
    for u, y, last, tgt in windows:
        got, want = step.plan(u, y, target=tgt, last_input=last), ref.plan(u, y, target=tgt, last_input=last)
        assert not got.fallback and got.status == want.status == "optimal"
        np.testing.assert_allclose(got.inputs, want.inputs, rtol=0, atol=1e-9)
    for u, y, last, tgt in windows[::25]:
        cvx = ctrl.plan(u, y, target=tgt, last_input=last, use_fast_path=False)
        np.testing.assert_allclose(step.plan(u, y, target=tgt, last_input=last).inputs[0], cvx.inputs[0],
                                   atol=1e-6)


def test_a_map_that_does_not_fit_the_window_is_never_used(model):
    # every kept map forced on every window: a map is used only where its checks hold, so the answer is always the
    # solver's (a map trusted without its checks gives another input on most of these windows)
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=8, input_weight=1e-2).fit()
    step, ref = FastStep(ctrl), FastStep(ctrl)
    ref._regions = None
    windows = _closed_loop(model, step, _far(model))
    maps = [r for r in step._regions.maps.values() if r is not None]
    assert len(maps) >= 3
    wrong = 0
    for u, y, last, tgt in windows[::5]:
        want = ref.plan(u, y, target=tgt, last_input=last).inputs
        for r in maps:
            step._regions.current = r
            np.testing.assert_allclose(step.plan(u, y, target=tgt, last_input=last).inputs, want, atol=1e-9)
            step._regions.current = r
            step._regions._offsets(r)
            first = r.K[:2] @ step._w + r.k[:2]  # the map's first input, its checks ignored
            if np.any(r.act < 2):  # the first input's bounds moved with the slew window: their change counts
                d = np.concatenate([step._hi_buf[:2] - step._row_hi[:2], step._lo_buf[:2] - step._row_lo[:2]])
                first = first + r.Kc[:2] @ d
            wrong += int(np.max(np.abs(first - want[0])) > 1e-6)
    assert wrong > 0


def test_a_window_with_nan_on_a_known_set_gives_the_safe_fallback(model):
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=8, input_weight=1e-2).fit()
    step = FastStep(ctrl)
    y = np.zeros((3, 3))
    y[1, 2] = np.nan
    got = step.plan(np.zeros((3, 2)), y, target=[0.1, 0.2, 0.3], last_input=np.array([0.2, -0.1]))
    assert got.fallback and np.all(np.isfinite(got.inputs))
    assert np.all(np.abs(got.inputs[0] - [0.2, -0.1]) <= np.array([0.3, 0.2]) + 1e-12)


def test_a_live_run_builds_maps_between_samples_and_restores_the_collector(model):
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=8, input_weight=1e-2).fit()
    step = FastStep(ctrl)
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.05, sample_rate_hz=100.0)
    assert gc.isenabled()
    run = run_live(step, plant, n_steps=200, target=_far(model), pace="none")
    assert gc.isenabled() and gc.get_freeze_count() == 0
    assert len(step._regions.maps) >= 2
    s = run.summary
    assert s["unchecked_inputs"] == 0 and sum(s["delivered_violations"].values()) == 0
    assert s["service_s"]["p50"] <= s["latency_s"]["p50"] + 1e-12 and s["service_s"]["max"] > 0
    gc.disable()
    try:  # a collector the caller had switched off stays off
        run_live(step, plant, n_steps=20, target=_far(model), pace="none")
        assert not gc.isenabled()
    finally:
        gc.enable()


def test_the_maps_kept_stay_within_their_memory_bound(model, monkeypatch):
    from stimsteer.control.mpc import _step_regions

    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=8, input_weight=1e-2).fit()
    monkeypatch.setattr(_step_regions, "MAX_MAP_BYTES", 1)  # room for the unconstrained set's map alone
    step, ref = FastStep(ctrl), FastStep(ctrl)
    ref._regions = None
    for u, y, last, tgt in _closed_loop(model, step, _far(model), n=60)[::6]:
        np.testing.assert_allclose(step.plan(u, y, target=tgt, last_input=last).inputs,
                                   ref.plan(u, y, target=tgt, last_input=last).inputs, atol=1e-9)
    assert list(step._regions.maps) == [()]


def test_calibration_builds_the_warm_up_sets_map_before_it_times_the_step(model):
    # before the first tick there is no deadline: the map of the active set the warm-up window binds is built then,
    # so the timed plans (and the run's first steps) take it instead of the solver
    from stimsteer.control.realtime import _calibrate

    step = FastStep(ModelPredictiveController(model=model, limits=BOX, horizon_steps=8, input_weight=1e-2).fit())
    calls, solve = [], step._qp.solve_finite
    step._qp.solve_finite = lambda *a: calls.append(1) or solve(*a)
    best = _calibrate(step, np.zeros((3, 2)), _far(model), None, 5, None, time.perf_counter)
    assert len(calls) == 1 and best["n"] == 5  # the untimed first plan alone went to the solver
    assert len(step._regions.maps) == 2 and step.idle_cost_s == np.inf  # bounds bind: a new set, its map built


def test_a_sets_map_is_built_a_pivot_at_a_time_between_samples(model):
    # a map is built in pieces a live loop fits between samples: one pivot of the elimination per piece (each a
    # rank-one update), then the extraction in two -- never the whole build at once; the map then answers as the
    # solver
    ctrl = ModelPredictiveController(model=model, limits=BOX, horizon_steps=8, input_weight=1e-2).fit()
    step, ref = FastStep(ctrl), FastStep(ctrl)
    ref._regions = None
    u, y = np.zeros((3, 2)), np.zeros((3, 3))
    assert step.idle_cost_s == np.inf and not step.idle()  # nothing to build yet
    want = step.plan(u, y, target=_far(model))  # the solver: its active set is new
    active = int(np.count_nonzero(step._qp.lam))
    assert active >= 4 and np.isfinite(step.idle_cost_s)
    pieces = 0
    while step.idle():
        pieces += 1
        assert pieces == active + 2 or step._regions.has_work  # the map is ready only after the last piece
    assert pieces == active + 2 and step.idle_cost_s == np.inf
    calls, solve = [], step._qp.solve_finite
    step._qp.solve_finite = lambda *a: calls.append(1) or solve(*a)
    got = step.plan(u, y, target=_far(model))
    assert not calls  # the map answered
    np.testing.assert_allclose(got.inputs, want.inputs, atol=1e-9)
    np.testing.assert_allclose(got.inputs, ref.plan(u, y, target=_far(model)).inputs, atol=1e-9)


def test_a_loop_moving_back_and_forth_between_known_sets_does_not_call_the_solver(model):
    # two windows whose optima lie on different active sets, in turn (as under a gate that reduces every other
    # input): once both maps exist, each step is answered by one of the recent sets, not by the solver
    ctrl = ModelPredictiveController(model=model, limits=BOX, horizon_steps=8, input_weight=1e-2).fit()
    step, ref = FastStep(ctrl), FastStep(ctrl)
    ref._regions = None
    wins = [(np.zeros((3, 2)), np.zeros((3, 3)), _far(model)), (np.zeros((3, 2)), np.zeros((3, 3)), -_far(model))]
    for u, y, tgt in wins:
        step.plan(u, y, target=tgt)
        while step.idle():
            pass
    calls, solve = [], step._qp.solve_finite
    step._qp.solve_finite = lambda *a: calls.append(1) or solve(*a)
    for k in range(10):
        u, y, tgt = wins[k % 2]
        np.testing.assert_allclose(step.plan(u, y, target=tgt).inputs, ref.plan(u, y, target=tgt).inputs,
                                   atol=1e-9)
    assert not calls and len(step._regions.maps) == 3


def test_a_loop_whose_steps_all_overrun_still_builds_the_running_sets_map(model):
    # every plan ends after its deadline (simulated time), so the loop never waits for a tick; each overrun step then
    # offers the controller one piece of its pending work (a map of a set the solver found), which a loop that only
    # builds while it waits would never do
    from stimsteer.control.realtime import run_live

    class Slow:  # the fast step, each plan 15 ms of simulated time in a 10 ms period
        def __init__(self, inner, vt):
            self._c, self._vt, self.calls = inner, vt, 0

        def __getattr__(self, name):
            return getattr(self._c, name)

        def plan(self, *a, **kw):
            self.calls += 1
            self._vt.t += 0.015 if self.calls > 2 else 1e-4  # the untimed and the timed calibration plans: fast
            return self._c.plan(*a, **kw)

    class VT:
        t = 0.0

        def __call__(self):
            self.t += 1e-6
            return self.t

        def sleep(self, s):
            self.t += s

    vt = VT()
    step = FastStep(ModelPredictiveController(model=model, limits=BOX, horizon_steps=8, input_weight=1e-2).fit())
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.05, sample_rate_hz=100.0)
    pieces, idle = [], step.idle
    step.idle = lambda: pieces.append(1) or idle()
    run = run_live(Slow(step, vt), plant, n_steps=120, target=_far(model), pace="wall", clock=vt, sleep=vt.sleep,
                   calibration_steps=1)
    s = run.summary
    assert s["counts"]["overrun"] > 20 and s["started_behind"] > 100 and s["unchecked_inputs"] == 0
    assert len(pieces) >= s["counts"]["overrun"]  # one per overrun at least (and the calibration's)
