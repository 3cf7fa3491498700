"""The lifted predictor recovers a nonlinear system exactly when its dictionary holds the true nonlinearity.

Outside check (Korda M., Mezić I. 2018, "Linear predictors for nonlinear dynamical systems: Koopman operator meets
model predictive control", Automatica 93:149, section 3): a system whose dynamics are linear in a finite set of
observables that the dictionary contains is predicted exactly by the lifted linear predictor. The system here is
the classic finite Koopman-invariant example (Brunton et al. 2016, "Koopman invariant subspaces and finite linear
representations of nonlinear dynamical systems for control", PLoS ONE 11:e0150171) with the input entering the
linear part: ``x1' = a x1``, ``x2' = λ x2 + c x1² + b u``; the observables ``x1, x2, x1²`` evolve linearly, and
the quadratic dictionary ("poly2") holds ``x1²``.
"""

import numpy as np
import pytest

from stimsteer.control import StimLimits, controller_for
from stimsteer.sysid import Session
from stimsteer.sysid.lifted import LiftedPredictor
from stimsteer.sysid.protocols import InputAffineForm

A_, LAM, C_, B_ = 0.9, 0.7, 0.5, 1.0


def _simulate(u, x0):
    x = np.zeros((len(u), 2))
    x[0] = x0
    for k in range(1, len(u)):
        x[k, 0] = A_ * x[k - 1, 0]
        x[k, 1] = LAM * x[k - 1, 1] + C_ * x[k - 1, 0] ** 2 + B_ * u[k, 0]
    return x


@pytest.fixture(scope="module")
def system():
    rng = np.random.default_rng(4)
    trials = [(k * 150, (k + 1) * 150) for k in range(6)]
    u = rng.normal(size=(900, 1))
    y = np.vstack([_simulate(u[a:b], rng.normal(scale=2.0, size=2)) for a, b in trials])
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=trials), rng


def test_a_dictionary_holding_the_nonlinearity_recovers_the_system_exactly(system):
    session, rng = system
    est = LiftedPredictor(past_steps=1, dictionary="poly2", alphas=(0.0,)).fit(session)
    u = rng.normal(size=(60, 1))
    x = _simulate(u, np.array([1.7, -0.4]))  # a start and inputs the fit never saw
    pred = est.predict(u[:1], x[:1], u[1:])
    np.testing.assert_allclose(pred, x[1:], atol=1e-8)


def test_a_linear_dictionary_cannot_recover_it(system):
    # the control of the check above: without x1² the same fit has a visible error
    session, rng = system
    est = LiftedPredictor(past_steps=1, n_features=0, alphas=(0.0,)).fit(session)
    u = rng.normal(size=(60, 1))
    x = _simulate(u, np.array([1.7, -0.4]))
    assert np.max(np.abs(est.predict(u[:1], x[:1], u[1:]) - x[1:])) > 1e-2


def test_the_prediction_is_affine_in_the_inputs_with_the_declared_map(system):
    session, rng = system
    est = LiftedPredictor(past_steps=2, feature_grid=(20,), bandwidths=(1.0,), alphas=(1e-6,)).fit(session)
    assert isinstance(est, InputAffineForm) and not est.has_linear_maps
    up, yp = session.u[:2], session.y[:2]
    uf = rng.normal(size=(12, 1))
    free = est.predict(up, yp, np.zeros_like(uf)).reshape(-1)
    np.testing.assert_allclose(free + est.input_map(12) @ uf.reshape(-1), est.predict(up, yp, uf).reshape(-1),
                               atol=1e-10)


def test_the_lifted_plan_is_the_convex_plan_of_its_prediction_within_limits(system):
    session, _ = system
    est = LiftedPredictor(past_steps=1, dictionary="poly2", alphas=(0.0,)).fit(session)
    lim = StimLimits(amplitude_min_ua=-0.5, amplitude_max_ua=0.8, slew_max_ua=0.3, n_inputs=1)
    ctrl = controller_for(est, lim, horizon_steps=15, output_weight=np.array([0.0, 1.0]))
    up, yp = session.u[:1], np.array([[1.0, 0.2]])
    plan = ctrl.plan(up, yp, target=np.array([0.0, 1.5]))
    assert plan.ok and not any(lim.violations(plan.inputs, plan.last_input).values())
    np.testing.assert_allclose(plan.predicted_outputs, est.predict(up, yp, plan.inputs), atol=1e-8)
    # the exact model: the planned inputs drive the true system where the plan says
    x = _simulate(np.vstack([up, plan.inputs]), yp[0])
    np.testing.assert_allclose(x[1:], plan.predicted_outputs, atol=1e-7)
