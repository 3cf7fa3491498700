"""DeePC with the projection regulariser planned on its reduced form (stimsteer.control.mpc._deepc_elimination).

The reduced form is the same problem as the g-space one. Checked against:

- the problem as Coulson, Lygeros, Dörfler (2019), "Data-Enabled Predictive Control: In the Shallows of the DeePC"
  write it, over the Hankel weights ``g``, solved by cvxpy's conic solver (the cvxpy path of a controller on the
  null-space route, which builds that problem as written);
- the null-space elimination the controller used before (the route small problems keep), map by map and plan by plan.

Tolerances are the author's margins over rounding (both routes are exact in exact arithmetic; the data's factor
``D1`` has a 2-norm condition number of 124 here, numpy's ``cond``, measured once); the cvxpy comparisons take the
solver's own tolerance (CLARABEL's defaults, about 1e-8 relative, from memory; inputs to 2e-4).
"""

import numpy as np
import pytest

from stimsteer.control.limits import StimLimits
from stimsteer.control.mpc import DataPredictiveController
from stimsteer.control.mpc import _deepc_elimination as elimination
from stimsteer.sysid import Session, StateSpaceModel
from stimsteer.sysid.datadriven import HankelPredictor


@pytest.fixture(scope="module")
def fitted():
    rng = np.random.default_rng(20261205)
    A = rng.normal(size=(3, 3))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    model = StateSpaceModel(A=A, B=rng.normal(size=(3, 2)), C=rng.normal(size=(2, 3)), past_steps=3)
    u = rng.uniform(-1, 1, size=(600, 2))
    y = model.simulate(u) + 0.05 * rng.normal(size=(600, 2))  # noisy: the data's factor D1 is invertible
    session = Session(u=u, y=y, sample_rate_hz=100.0, input_names=model.input_names, output_names=model.output_names)
    pred = HankelPredictor(past_steps=3, horizon_steps=5).fit(session)
    u_past = rng.uniform(0.0, 0.3, size=(3, 2))
    return model, pred, u_past, model.simulate(u_past, x0=rng.normal(size=3)), session


def _limits(**kw):
    base = dict(amplitude_min_ua=[-1.0, 0.0], amplitude_max_ua=[1.0, 2.0], slew_max_ua=[0.4, 0.6])
    base.update(kw)
    return StimLimits(**base)


def _controller(pred, lim, reduced, monkeypatch, **kw):
    with monkeypatch.context() as mp:
        mp.setattr(elimination, "REDUCED_MIN_COLUMNS", 0 if reduced else 10**9)
        ctrl = DataPredictiveController(predictor=pred, limits=lim, input_weight=0.3, **kw).fit()
    assert (ctrl._reduced is not None) == reduced
    return ctrl


def _close(a, b, rel=1e-8):
    a, b = np.asarray(a), np.asarray(b)
    np.testing.assert_allclose(a, b, rtol=0, atol=rel * max(np.abs(b).max(), 1e-300))


@pytest.mark.parametrize("past_weight, horizon", [(None, None), (np.inf, None), (None, 3)])
def test_the_input_only_qp_is_the_null_space_routes(fitted, monkeypatch, past_weight, horizon):
    _, pred, u, y, _ = fitted
    kw = dict(past_slack_weight=past_weight, horizon_steps=horizon)
    new = _controller(pred, _limits(), True, monkeypatch, **kw)
    old = _controller(pred, _limits(), False, monkeypatch, **kw)
    assert new._hessian is None  # no r × r Hessian of g was formed
    for key in ("P", "Q_r", "Q_f") + (("Q_y",) if past_weight is None else ()):
        _close(new._elim[key], old._elim[key])
    # the form with output bounds, on no bounded row, is the input-only QP (a second derivation of the same maps)
    _close(2.0 * new._reduced.bounded_form(np.zeros(0, np.intp))["H"], old._elim["P"])
    a, b = new.plan(u, y, target=[1.0, 0.5]), old.plan(u, y, target=[1.0, 0.5])
    assert a.ok and b.ok
    _close(a.inputs, b.inputs)
    _close(a.predicted_outputs, b.predicted_outputs)
    for key, value in b.cost_terms.items():  # g itself (its regulariser, the past outputs' slack) agrees
        assert a.cost_terms[key] == pytest.approx(value, rel=1e-8, abs=1e-12)


@pytest.mark.parametrize("bound, budget", [(0.3, None), (0.3, 0.5), (50.0, 0.5), (None, None)])
def test_plans_with_output_bounds_equal_the_g_space_qps_and_cvxpys(fitted, monkeypatch, bound, budget):
    _, pred, u, y, _ = fitted
    bounds = {} if bound is None else dict(output_max=[bound, np.inf], output_min=[-np.inf, -0.2])
    lim = _limits(energy_budget_ua2=budget, **bounds)
    new = _controller(pred, lim, True, monkeypatch)
    old = _controller(pred, lim, False, monkeypatch)
    target = [1.0, 0.5]
    a, b = new.plan(u, y, target=target), old.plan(u, y, target=target)
    assert a.ok and b.ok and a.solver == b.solver
    _close(a.inputs, b.inputs, 1e-7)
    _close(a.predicted_outputs, b.predicted_outputs, 1e-7)
    assert a.cost_terms["total"] == pytest.approx(b.cost_terms["total"], rel=1e-8)
    if bound is not None and bound < 1:
        assert a.active_limits["output_bounds"].any()
    assert bool(np.any(a.active_limits["energy_budget"])) == (budget is not None)  # the budget binds: the budget SQP
    c = old.plan(u, y, target=target, use_fast_path=False)  # Coulson et al.'s problem in g, by cvxpy
    d = new.plan(u, y, target=target, use_fast_path=False)  # the reduced problem, by cvxpy
    assert c.ok and d.ok and "cvxpy" in c.solver and "cvxpy" in d.solver and new.problem_.is_dpp()
    r = pred.data_blocks().Up.shape[1]  # no variable of the Hankel columns' size in the reduced problem
    assert max(v.size for v in new.problem_.variables()) < r == max(v.size for v in old.problem_.variables())
    for plan in (a, d):
        np.testing.assert_allclose(plan.inputs, c.inputs, atol=2e-4)
        assert plan.cost_terms["total"] == pytest.approx(c.cost_terms["total"], rel=1e-6)
        np.testing.assert_allclose(plan.predicted_outputs, c.predicted_outputs, atol=2e-4)
        for key in ("past_consistency", "regularizer"):  # g recovered from the reduced answer
            assert plan.cost_terms[key] == pytest.approx(c.cost_terms[key], rel=1e-4, abs=1e-8)


def test_the_reported_weights_give_the_predicted_outputs(fitted, monkeypatch):
    _, pred, u, y, _ = fitted
    ctrl = _controller(pred, _limits(output_max=[0.3, np.inf]), True, monkeypatch)
    seen = []
    solve = ctrl._reduced.solve_bounded
    monkeypatch.setattr(ctrl._reduced, "solve_bounded", lambda *a, **k: seen.append(solve(*a, **k)) or seen[-1])
    plan = ctrl.plan(u, y, target=[1.0, 0.5])
    assert plan.ok and len(seen) == 1  # the bound breaks the input-only answer: the [u; ξ] QP answered
    u_plan, g = seen[0][:2]
    _close(ctrl._Yf @ g, plan.predicted_outputs.reshape(-1))
    _close(ctrl._Uf @ g, u_plan)  # g meets DeePC's equalities: its future inputs are the plan's
    _close(ctrl._Up @ g, u.reshape(-1))


def test_the_route_is_taken_for_the_projection_regulariser_only(fitted, monkeypatch):
    _, pred, _, _, session = fitted
    r = pred.data_blocks().Up.shape[1]
    for threshold, expected in ((r, True), (r + 1, False)):  # from REDUCED_MIN_COLUMNS columns on
        monkeypatch.setattr(elimination, "REDUCED_MIN_COLUMNS", threshold)
        assert (DataPredictiveController(predictor=pred, limits=_limits()).fit()._reduced is not None) == expected
    monkeypatch.setattr(elimination, "REDUCED_MIN_COLUMNS", 0)
    ridge = HankelPredictor(past_steps=3, horizon_steps=5, regularizer="l2").fit(session)
    ctrl = DataPredictiveController(predictor=ridge, limits=_limits()).fit()
    assert ctrl._reduced is None and ctrl._elim is not None  # the null-space route
