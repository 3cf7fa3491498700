"""The dense warm-started QP path and the fast step (stimsteer.control.mpc.fastqp._DenseQP, fast_step.FastStep).

Outside checks: the plans equal the cvxpy problem solved by CLARABEL (an interior-point solver, a different
algorithm) to 1e-6 on windows where amplitude and slew limits bind; the state estimate's precomputed map equals
``StateSpaceModel.estimate_state`` (it is a least-squares solution, linear in the data: common practice, no
source); every delivered input respects the hard limits counted from the definitions.
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.mpc.condensed import _LinearStateMap
from stimsteer.control.mpc.fast_step import FastStep
from stimsteer.control.plants import LinearNetworkPlant
from stimsteer.control.realtime import run_live
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.exceptions import InvalidParameterError, SessionError

pytest.importorskip("daqp")

LIM = StimLimits(amplitude_min_ua=[-1.0, -0.5], amplitude_max_ua=[1.0, 0.8], slew_max_ua=[0.3, 0.2])


@pytest.fixture(scope="module")
def setup():
    rng = np.random.default_rng(5)
    n, m, p = 5, 2, 3
    A = rng.normal(size=(n, n))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.normal(size=(n, m)), C=rng.normal(size=(p, n)), past_steps=3)
    ctrl = ModelPredictiveController(model=model, limits=LIM, horizon_steps=10, input_weight=1e-2,
                                     output_offset=[1.0, 2.0, 3.0]).fit()
    return model, ctrl, rng.normal(size=p) * 5


def _plant(model):
    return LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.05, sample_rate_hz=100.0)


def test_fast_step_equals_the_cvxpy_plan_where_limits_bind(setup):
    model, ctrl, target = setup
    step = FastStep(ctrl)
    rng = np.random.default_rng(0)
    bound = 0
    last = np.zeros(2)
    for _ in range(30):
        u = rng.uniform(-0.5, 0.5, size=(3, 2))
        y = rng.normal(size=(3, 3))
        ref = ctrl.plan(u, y, target=target, last_input=last, use_fast_path=False)
        got = step.plan(u, y, target=target, last_input=last)
        assert ref.ok and not got.fallback
        np.testing.assert_allclose(got.inputs[0], ref.inputs[0], atol=1e-6)
        bound += int(np.any(ref.active_limits["slew"][0]) or np.any(ref.active_limits["amplitude_max"][0])
                     or np.any(ref.active_limits["amplitude_min"][0]))
        last = ref.inputs[0]
    assert bound >= 10  # a good share of the steps have a binding limit


def test_the_dense_fast_path_of_plan_equals_cvxpy_and_names_its_solver(setup):
    model, ctrl, target = setup
    u, y = np.zeros((3, 2)), np.ones((3, 3))
    a = ctrl.plan(u, y, target=target, use_fast_path=True)
    b = ctrl.plan(u, y, target=target, use_fast_path=False)
    assert a.solver == "DAQP (dense, warm)" and "cvxpy" in b.solver
    np.testing.assert_allclose(a.inputs, b.inputs, atol=1e-6)


def test_the_state_map_equals_estimate_state(setup):
    model, _, _ = setup
    rng = np.random.default_rng(1)
    sm = _LinearStateMap(model, 3, calls_before=0)
    for _ in range(3):
        u, y = rng.normal(size=(3, 2)), rng.normal(size=(3, 3))
        np.testing.assert_allclose(sm(u, y), model.estimate_state(u, y), atol=1e-10)


def test_a_live_run_with_the_fast_step_delivers_only_safe_inputs(setup):
    model, ctrl, target = setup
    run = run_live(FastStep(ctrl), _plant(model), n_steps=200, target=target, pace="none", seed=3)
    s = run.summary
    assert s["unchecked_inputs"] == 0 and not any(s["delivered_violations"].values())
    u = run.session.u
    d = np.abs(np.diff(np.vstack([np.zeros(2), u]), axis=0))
    assert np.all(d <= np.array([0.3, 0.2]) + 1e-12)  # slew, from the definitions
    assert np.all(u <= np.array([1.0, 0.8]) + 1e-12) and np.all(u >= np.array([-1.0, -0.5]) - 1e-12)


def test_a_failed_solve_gives_the_safe_fallback(setup, monkeypatch):
    model, ctrl, target = setup
    step = FastStep(ctrl)
    monkeypatch.setattr(step._qp, "solve_finite", lambda q, lo, hi: (None, "failed", "injected failure"))
    res = step.plan(np.zeros((3, 2)), np.zeros((3, 3)), target=target, last_input=np.array([0.9, 0.6]))
    assert res.fallback and res.status == "injected failure"
    np.testing.assert_allclose(res.inputs[0], [0.6, 0.4])  # towards zero at the slew limit


def test_controllers_the_fast_step_cannot_reproduce_are_refused(setup):
    model, ctrl, target = setup
    budget = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=2, energy_budget_ua2=5.0)
    with pytest.raises(InvalidParameterError, match="energy budget"):
        FastStep(ModelPredictiveController(model=model, limits=budget, horizon_steps=5).fit())
    with pytest.raises(InvalidParameterError, match="state"):
        FastStep(ModelPredictiveController(model=model, limits=LIM, horizon_steps=5, target_kind="state").fit())
    with pytest.raises(InvalidParameterError, match="terminal weight"):
        FastStep(ModelPredictiveController(model=model, limits=LIM, horizon_steps=5, terminal_weight="riccati").fit())
    with pytest.raises(SessionError, match="constant output target"):
        FastStep(ctrl).plan(np.zeros((3, 2)), np.zeros((3, 3)), target=np.zeros((10, 3)))


# ------------------------------------------------------------------------------------------------ the direct route
def _direct_controller(kind, centre=False, slack=None, reduced=False):
    from stimsteer.control.mpc import _deepc_elimination
    from stimsteer.sysid import HankelPredictor, LsqPredictor, Session

    rng = np.random.default_rng(11)
    n, m, p = 4, 2, 3
    A = rng.normal(size=(n, n))
    A *= 0.85 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.normal(size=(n, m)), C=rng.normal(size=(p, n)))
    u = rng.uniform(-1, 1, size=(400, m))
    y = model.simulate(u) + 0.01 * rng.normal(size=(400, p)) + (np.array([4.0, -2.0, 1.0]) if centre else 0.0)
    session = Session(u=u, y=y, sample_rate_hz=100.0)
    pred = (LsqPredictor(past_steps=4, horizon_steps=8, alphas=(1e-6,), centre_outputs=centre) if kind == "spc" else
            HankelPredictor(past_steps=4, horizon_steps=8, lambdas_g=(1e-3,), centre_outputs=centre))
    # tight interior-point tolerances: the reference must be closer to the optimum than the 1e-6 compared
    tight = {"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12}
    with pytest.MonkeyPatch.context() as mp:  # DeePC's reduced form (projection regulariser) at any size
        mp.setattr(_deepc_elimination, "REDUCED_MIN_COLUMNS", 0 if reduced else 10**9)
        ctrl = DataPredictiveController(predictor=pred.fit(session), limits=LIM, horizon_steps=6, input_weight=1e-2,
                                        past_slack_weight=slack, solver_options=tight).fit()
    assert ctrl.method_ == kind and (ctrl._reduced is not None) == reduced
    return ctrl, y


@pytest.mark.parametrize("kind,centre,slack,reduced", [
    ("spc", False, None, False), ("spc", True, None, False), ("deepc", False, None, False),
    ("deepc", True, None, False), ("deepc", False, np.inf, False), ("deepc", False, None, True),
    ("deepc", True, None, True), ("deepc", False, np.inf, True)])
def test_the_direct_fast_step_equals_the_cvxpy_plan_where_limits_bind(kind, centre, slack, reduced):
    # outside check: the cvxpy problem solved by CLARABEL (interior point), a different algorithm
    ctrl, y_data = _direct_controller(kind, centre, slack, reduced)
    if kind == "deepc" and slack is not None and ctrl._elim is None:
        pytest.skip("hard past outputs on these data give dependent equalities")
    step = FastStep(ctrl)
    rng = np.random.default_rng(2)
    base = y_data.mean(0)
    target = base + np.array([3.0, -2.0, 1.5])
    bound, last = 0, np.zeros(2)
    for i in range(25):
        u = rng.uniform(-0.5, 0.5, size=(5, 2))
        y = base + rng.normal(size=(5, 3))
        tgt = target if i % 2 else base - np.array([1.0, 0.5, 2.0])
        ref = ctrl.plan(u, y, target=tgt, last_input=last, use_fast_path=False)
        got = step.plan(u, y, target=tgt, last_input=last)
        assert ref.ok and not got.fallback
        np.testing.assert_allclose(got.inputs[0], ref.inputs[0], atol=1e-6)
        bound += int(np.any(ref.active_limits["slew"][0]) or np.any(ref.active_limits["amplitude_max"][0])
                     or np.any(ref.active_limits["amplitude_min"][0]))
        last = ref.inputs[0]
    assert bound >= 8  # a good share of the steps have a binding limit


def test_direct_controllers_the_fast_step_cannot_reproduce_are_refused():
    from stimsteer.sysid import HankelPredictor, Session

    rng = np.random.default_rng(3)
    u = rng.uniform(-1, 1, size=(200, 2))
    y = np.column_stack([np.convolve(u[:, 0], [0.5, 0.3], "same"), u[:, 1] * 0.2, u.sum(1)])
    pred = HankelPredictor(past_steps=3, horizon_steps=5, lambdas_g=(1e-3,), regularizer="l1")
    ctrl = DataPredictiveController(predictor=pred.fit(Session(u=u, y=y, sample_rate_hz=100.0)), limits=LIM).fit()
    with pytest.raises(InvalidParameterError, match="does not reduce to the inputs"):
        FastStep(ctrl)
    bounded = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=2, output_max=[1.0, np.inf, np.inf])
    ctrl, _ = _direct_controller("spc")
    with pytest.raises(InvalidParameterError, match="output bounds"):
        FastStep(DataPredictiveController(predictor=ctrl.predictor_, limits=bounded).fit())


def test_a_live_run_with_the_direct_fast_step_delivers_only_safe_inputs():
    ctrl, _ = _direct_controller("deepc")
    plant_model = StateSpaceModel(A=[[0.8]], B=[[0.5, 0.2]], C=[[1.0], [0.5], [-0.3]])
    plant = LinearNetworkPlant(plant_model.A, plant_model.B, plant_model.C, measurement_noise_std=0.05,
                               sample_rate_hz=100.0)
    run = run_live(FastStep(ctrl), plant, n_steps=100, target=np.array([1.0, 0.5, -0.3]), pace="none", seed=3)
    s = run.summary
    assert s["unchecked_inputs"] == 0 and not any(s["delivered_violations"].values())
    d = np.abs(np.diff(np.vstack([np.zeros(2), run.session.u]), axis=0))
    assert np.all(d <= np.array([0.3, 0.2]) + 1e-12)  # slew, from the definitions


# ------------------------------------------------------------------------------------------------ the box solver
def _random_qp(rng, n):
    G = rng.normal(size=(2 * n, n))
    return G.T @ G / n + 1e-2 * np.eye(n)


@pytest.mark.parametrize("n,scale", [(12, 0.3), (12, 30.0), (60, 3.0), (200, 50.0)])
def test_the_box_solver_meets_the_kkt_conditions_and_equals_daqp(n, scale):
    # outside check: the KKT conditions of a bound-constrained convex QP, counted from their definition (common
    # practice, no source), and the dual active-set solver daqp (Arnström et al. 2022), a different algorithm
    from stimsteer.control.mpc.fastqp import _BoxQP, _DenseQP

    rng = np.random.default_rng(n)
    H = _random_qp(rng, n)
    lo, hi = -np.ones(n), np.full(n, 0.5)
    lo[::7] = -1e30  # some variables without a lower bound
    box, ref = _BoxQP(H, n), _DenseQP(H, None, n)
    q = rng.normal(size=n) * scale
    n_active = []
    for _ in range(15):  # a drifting linear term, as in a loop: the warm start carries over
        q = q + rng.normal(size=n) * scale * 0.2
        z, status, _ = box.solve_finite(q, lo, hi)
        zr, _, _ = ref.solve_finite(q, lo, hi)
        assert status == "optimal"
        g = H @ z + q
        at_lo, at_hi = np.isclose(z, lo, atol=1e-12), np.isclose(z, hi, atol=1e-12)
        free = ~(at_lo | at_hi)
        assert np.all(z >= lo) and np.all(z <= hi)
        assert np.all(np.abs(g[free]) <= 1e-8 * max(1.0, np.abs(q).max()))
        assert np.all(g[at_lo] >= -1e-8) and np.all(g[at_hi] <= 1e-8)
        np.testing.assert_allclose(z, zr, atol=1e-8)
        n_active.append(int((~free).sum()))
    assert box.n_fallback_ == 0
    if scale >= 30:
        assert max(n_active) > n // 2  # both of the solver's branches are exercised across the cases
    if scale <= 0.3:
        assert min(n_active) < n // 2


def test_the_box_solver_falls_back_to_daqp_when_it_does_not_settle():
    from stimsteer.control.mpc.fastqp import _BoxQP, _DenseQP

    rng = np.random.default_rng(4)
    H = _random_qp(rng, 30)
    box = _BoxQP(H, 30)
    box.max_iter = 0
    q, lo, hi = rng.normal(size=30) * 20, -np.ones(30), np.ones(30)
    z, status, _ = box.solve_finite(q, lo, hi)
    assert box.n_fallback_ == 1 and status == "optimal"
    np.testing.assert_allclose(z, _DenseQP(H, None, 30).solve_finite(q, lo, hi)[0], atol=1e-12)


def test_a_long_bounds_only_fast_step_uses_the_box_solver_and_equals_the_cvxpy_plan(setup):
    from stimsteer.control.mpc.fastqp import _BoxQP

    model, _, target = setup
    box = StimLimits(amplitude_min_ua=[-1.0, -0.5], amplitude_max_ua=[1.0, 0.8])
    ctrl = ModelPredictiveController(model=model, limits=box, horizon_steps=90, input_weight=1e-2,
                                     solver_options={"tol_gap_abs": 1e-12, "tol_gap_rel": 1e-12, "tol_feas": 1e-12},
                                     output_offset=[1.0, 2.0, 3.0]).fit()
    step = FastStep(ctrl)
    assert isinstance(step._qp, _BoxQP)
    rng = np.random.default_rng(6)
    bound = 0
    for i in range(8):
        u, y = rng.uniform(-0.5, 0.5, size=(3, 2)), rng.normal(size=(3, 3))
        tgt = target * (3.0 if i % 2 else 0.2)
        ref = ctrl.plan(u, y, target=tgt, use_fast_path=False)
        got = step.plan(u, y, target=tgt)
        assert ref.ok and not got.fallback
        np.testing.assert_allclose(got.inputs[0], ref.inputs[0], atol=1e-6)
        bound += int(np.any(ref.active_limits["amplitude_max"][0]) or np.any(ref.active_limits["amplitude_min"][0]))
    assert bound >= 3 and step._qp.n_fallback_ == 0


def test_a_long_plan_without_input_weight_keeps_the_dense_dual_solver(setup):
    # no input weight and no direct feedthrough: the last inputs move no output, so H is singular (no Cholesky)
    from stimsteer.control.mpc.fastqp import _DenseQP

    model, _, _ = setup
    box = StimLimits(amplitude_min_ua=[-1.0, -0.5], amplitude_max_ua=[1.0, 0.8])
    ctrl = ModelPredictiveController(model=model, limits=box, horizon_steps=90, input_weight=0.0).fit()
    assert isinstance(FastStep(ctrl)._qp, _DenseQP)
