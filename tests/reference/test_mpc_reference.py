"""Outside checks of the predictive controllers and the charge-density rule (source beside each check)."""

import numpy as np
import pytest
import scipy.linalg as sla
from scipy.optimize import lsq_linear

from stimsteer.control.limits import StimLimits, max_charge_uc, shannon_k
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.sysid import Session, StateSpaceModel


def _system(rng, n=3, m=2, p=2, radius=1.05):
    A = rng.normal(size=(n, n))
    A *= radius / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.normal(size=(n, m)), C=rng.normal(size=(p, n)), past_steps=n)


def _wide(m):
    return StimLimits(amplitude_min_ua=-1e6, amplitude_max_ua=1e6, n_inputs=m)


# Rawlings, Mayne, Diehl (2017), Model Predictive Control: Theory, Computation, and Design, ch. 1 (dynamic
# programming): with the infinite-horizon cost-to-go x'Px (P from the discrete algebraic Riccati equation) as
# terminal cost and no active constraint, the finite-horizon first move equals the LQR law u0 = -K x0,
# K = (R + B'PB)^-1 B'PA, for every horizon. Reference solution: scipy.linalg.solve_discrete_are.
@pytest.mark.parametrize("horizon", [1, 2, 5, 12])
@pytest.mark.parametrize("kind", ["output", "state"])
def test_riccati_terminal_cost_gives_the_lqr_first_move(rng, horizon, kind):
    model = _system(rng)  # open-loop unstable: the check does not rely on stability
    Qy, R = np.diag([1.0, 3.0]), np.diag([0.2, 0.5])
    Qx = model.C.T @ Qy @ model.C if kind == "output" else np.diag([1.0, 2.0, 0.5])
    P = sla.solve_discrete_are(model.A, model.B, Qx, R)
    K = np.linalg.solve(R + model.B.T @ P @ model.B, model.B.T @ P @ model.A)
    ctrl = ModelPredictiveController(model=model, limits=_wide(2), horizon_steps=horizon, output_weight=[1.0, 3.0],
                                     input_weight=[0.2, 0.5], state_weight=[1.0, 2.0, 0.5], target_kind=kind,
                                     terminal_weight="riccati").fit()
    np.testing.assert_allclose(ctrl.riccati_, P, rtol=1e-10)
    u_past, y_past = rng.normal(size=(3, 2)), rng.normal(size=(3, 2))
    x0 = model.estimate_state(u_past, y_past)
    target = np.zeros(2) if kind == "output" else np.zeros(3)
    for fast in (True, False):
        plan = ctrl.plan(u_past, y_past, target=target, use_fast_path=fast)
        assert plan.ok
        np.testing.assert_allclose(plan.inputs[0], -K @ x0, rtol=1e-6, atol=1e-8 * np.abs(K @ x0).max())


def _noise_free(rng, model, n_samples):
    # white uniform input: persistently exciting of every order below n_samples / m (Willems et al. 2005)
    u = rng.uniform(-1, 1, size=(n_samples, model.n_inputs))
    return Session(u=u, y=model.simulate(u), sample_rate_hz=1.0, input_names=model.input_names,
                   output_names=model.output_names)


# Coulson, Lygeros, Dörfler (2019), "Data-Enabled Predictive Control: In the Shallows of the DeePC", ECC, Thm. 5.1:
# with noise-free data, an input persistently exciting of order Tini + N + n, Tini >= the lag and no
# regularisation, DeePC's optimal inputs and cost equal those of MPC with the true model.
def test_deepc_equals_mpc_with_the_true_model_on_noise_free_data(rng):
    from stimsteer.sysid.datadriven import HankelPredictor

    model = _system(rng, radius=0.9)
    N, Tini = 6, 3  # lag of a 3-state, 2-output system is at most 3
    session = _noise_free(rng, model, 300)
    # projection regulariser: on exact data it only removes the part of g outside the data's row space, which
    # changes neither the constraints nor the prediction ("no regularisation" in the theorem's sense)
    pred = HankelPredictor(past_steps=Tini, horizon_steps=N, regularizer="projection", lambdas_g=(1e-8,)).fit(session)
    lim = StimLimits(amplitude_min_ua=[-0.5, -1.0], amplitude_max_ua=[0.5, 1.0], slew_max_ua=[0.3, 0.6])
    ind = ModelPredictiveController(model=model, limits=lim, horizon_steps=N, input_weight=0.1).fit()
    direct = DataPredictiveController(predictor=pred, limits=lim, input_weight=0.1, past_slack_weight=np.inf).fit()
    u_past = rng.uniform(-0.3, 0.3, size=(Tini, 2))
    y_past = model.simulate(u_past, x0=rng.normal(size=3))
    target = rng.normal(size=(N, 2))
    a = ind.plan(u_past, y_past, target=target, use_fast_path=False)
    b = direct.plan(u_past, y_past, target=target, use_fast_path=False)
    assert a.ok and b.ok and a.active_limits["slew"].any()
    np.testing.assert_allclose(b.inputs, a.inputs, atol=1e-5)
    np.testing.assert_allclose(b.predicted_outputs, a.predicted_outputs, atol=1e-5)
    assert b.cost_terms["tracking"] + b.cost_terms["input_energy"] == pytest.approx(a.cost_terms["total"], rel=1e-6)


# Same theorem, SPC form (Favoreel, De Moor, Van Overschee 1999, "SPC: Subspace Predictive Control"): on exact data
# the unregularised least-squares predictor is the true multi-step predictor, so SPC equals MPC with the true model.
def test_spc_equals_mpc_with_the_true_model_on_noise_free_data(rng):
    from stimsteer.sysid.datadriven import LsqPredictor

    model = _system(rng, radius=0.9)
    N, Tini = 5, 3
    pred = LsqPredictor(past_steps=Tini, horizon_steps=N, alphas=(1e-12,)).fit(_noise_free(rng, model, 300))
    lim = StimLimits(amplitude_min_ua=[-0.5, -1.0], amplitude_max_ua=[0.5, 1.0])
    ind = ModelPredictiveController(model=model, limits=lim, horizon_steps=N, input_weight=0.1).fit()
    spc = DataPredictiveController(predictor=pred, limits=lim, input_weight=0.1).fit()
    u_past = rng.uniform(-0.3, 0.3, size=(Tini, 2))
    y_past = model.simulate(u_past, x0=rng.normal(size=3))
    target = 3.0 * rng.normal(size=(N, 2))
    a, b = ind.plan(u_past, y_past, target=target), spc.plan(u_past, y_past, target=target)
    assert a.ok and b.ok
    np.testing.assert_allclose(b.inputs, a.inputs, atol=1e-5)
    assert b.cost_terms["total"] == pytest.approx(a.cost_terms["total"], rel=1e-6)


# scipy.optimize.lsq_linear (bounded-variable least squares, Branch, Coleman, Li 1999 / Stark, Parker 1995): a
# one-step plan with box limits is min ||Wy^½(D u + C x0 − r)||² + ||R^½ u||² s.t. lo <= u <= hi.
@pytest.mark.parametrize("fast", [True, False])
def test_one_step_box_plan_equals_bounded_least_squares(rng, fast):
    model = StateSpaceModel(A=rng.normal(size=(3, 3)) * 0.3, B=rng.normal(size=(3, 3)), C=rng.normal(size=(4, 3)),
                            D=rng.normal(size=(4, 3)), past_steps=3)
    lo, hi = np.array([-1.0, 0.0, -2.0]), np.array([1.0, 3.0, 0.5])
    lim = StimLimits(amplitude_min_ua=lo, amplitude_max_ua=hi)
    wy, ru = np.array([1.0, 2.0, 0.5, 1.5]), 0.05
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=1, output_weight=wy,
                                     input_weight=ru).fit()
    u_past, y_past = rng.normal(size=(3, 3)), rng.normal(size=(3, 4))
    x0 = model.estimate_state(u_past, y_past)
    r = 3.0 * rng.normal(size=4)
    A_ls = np.vstack([np.sqrt(wy)[:, None] * model.D, np.sqrt(ru) * np.eye(3)])
    b_ls = np.concatenate([np.sqrt(wy) * (r - model.C @ x0), np.zeros(3)])
    ref = lsq_linear(A_ls, b_ls, bounds=(lo, hi), tol=1e-12)
    plan = ctrl.plan(u_past, y_past, target=r, use_fast_path=fast)
    assert np.any(np.isclose(ref.x, lo) | np.isclose(ref.x, hi))  # some box bound is active
    np.testing.assert_allclose(plan.inputs[0], ref.x, atol=1e-7)
    assert plan.cost_terms["total"] == pytest.approx(2 * ref.cost, rel=1e-8)  # lsq_linear's cost is ½||·||²


# Shannon R.V. (1992), "A model of safe levels for electrical stimulation", IEEE TBME 39(4):424-426:
# k = log10(D) + log10(Q), D = Q / A.
def test_shannon_k_for_30_uc_per_cm2_on_a_0_06_cm2_contact():
    # D = 30 µC/cm² on A = 0.06 cm² means Q = 1.8 µC: k = log10(30) + log10(1.8) = 1.732 (derived from Shannon 1992)
    assert shannon_k(30 * 0.06, 0.06) == pytest.approx(1.732, abs=5e-4)


def test_largest_charge_at_the_damage_threshold_on_a_0_06_cm2_contact():
    # k = 1.85 (Shannon 1992's damage threshold), A = 0.06 cm²: Q = sqrt(10**1.85 · 0.06) = 2.061 µC/phase
    # (derived from Shannon 1992)
    assert max_charge_uc(1.85, 0.06) == pytest.approx(2.061, abs=5e-4)
