"""Input recruitment (Hammerstein): the monotone map is recovered, planned through with mapped limits, decoded.

Outside check: a noise-free Hammerstein system whose static map is piecewise linear on the knots the fit uses is
recovered exactly by the over-parametrised two-step method (Bai E.-W. 1998, "An optimal two-stage identification
algorithm for Hammerstein-Wiener nonlinear systems", Automatica 34:333): the regression is exact and its
coefficient blocks have rank one.
"""

import numpy as np
import pytest

from stimsteer.control import StimLimits, controller_for
from stimsteer.sysid import InvalidParameterError, Session, SessionError, load_predictor, save_predictor
from stimsteer.sysid.hammerstein import HammersteinArx, Recruitment

KNOTS = np.linspace(-3.0, 3.0, 7)


def _session(recruit, seed=2, noise=0.0):
    rng = np.random.default_rng(seed)
    u = np.repeat(rng.uniform(-3, 3, size=(240, 1)), 5, axis=0)
    u[0], u[5] = -3.0, 3.0  # the knots span exactly [-3, 3]
    v = np.interp(u[:, 0], KNOTS, recruit)
    y = np.zeros((1200, 2))
    for k in range(1, 1200):
        y[k, 0] = 0.8 * y[k - 1, 0] + 0.5 * v[k]
        y[k, 1] = 0.5 * y[k - 1, 1] + 0.3 * y[k - 1, 0] - 0.2 * v[k]
    y = y + noise * rng.standard_normal(y.shape)
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=[(k * 150, (k + 1) * 150) for k in range(8)],
                   input_names=["site"], output_names=["a", "b"], input_units=["uA"])


SATURATING = np.clip(KNOTS, -1.0, 1.0)


@pytest.fixture(scope="module")
def fitted():
    session = _session(SATURATING)
    return HammersteinArx(past_steps=1, alpha=0.0).fit(session), session


def test_a_piecewise_linear_recruitment_is_recovered_exactly(fitted):
    est, session = fitted
    scale = (KNOTS[-1] - KNOTS[0]) / (SATURATING[-1] - SATURATING[0])  # the fit's unit mean slope
    np.testing.assert_allclose(est.recruitment_.knots[0], KNOTS, atol=1e-12)
    np.testing.assert_allclose(est.recruitment_.values[0], scale * SATURATING, atol=1e-7)
    assert est.monotone_ and not est.selection_notes_
    up, yp, uf = session.u[150:152], session.y[150:152], session.u[152:200]
    np.testing.assert_allclose(est.predict(up, yp, uf), session.y[152:200], atol=1e-6)


def test_the_inverse_recruitment_decodes_amplitudes():
    rec = Recruitment(KNOTS[None], 3.0 * SATURATING[None], (True,), ("site",))
    u = np.array([[-0.7], [0.0], [0.4], [1.0]])
    np.testing.assert_allclose(rec.inverse(rec.forward(u)), u, atol=1e-9)
    # a saturated value decodes to the smallest amplitude that reaches it (no stimulation is wasted)
    assert rec.inverse(np.array([[3.0]]))[0, 0] == pytest.approx(1.0, abs=1e-9)


def test_a_plan_through_the_recruitment_stays_inside_the_declared_window(fitted):
    est, session = fitted
    lim = StimLimits(amplitude_min_ua=-2.0, amplitude_max_ua=0.6, n_inputs=1, input_names=("site",))
    ctrl = controller_for(est, lim, horizon_steps=12, output_weight=np.array([1.0, 0.0]))
    up, yp = est.rest_window()
    plan = ctrl.plan(up, yp, target=np.array([5.0, 0.0]))  # beyond reach: the plan sits on the upper bound
    assert not any(lim.violations(plan.inputs).values()) and not plan.fallback
    assert np.max(plan.inputs) == pytest.approx(0.6, abs=1e-6)
    np.testing.assert_allclose(plan.predicted_outputs, est.predict(up, yp, plan.inputs), atol=1e-12)
    reachable = ctrl.plan(up, yp, target=np.array([0.6, 0.0]))
    assert abs(reachable.predicted_outputs[-1, 0] - 0.6) < 0.05


def test_a_non_monotone_recruitment_is_reported_and_not_planned_through():
    bumpy = np.array([-1.0, -2.0, -1.0, 0.0, 1.0, 2.0, 1.0])  # rises, falls back: not monotone
    est = HammersteinArx(past_steps=1, alpha=0.0).fit(_session(bumpy))
    assert not est.monotone_ and any("not monotone" in n for n in est.selection_notes_)
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=1, input_names=("site",))
    with pytest.raises(InvalidParameterError, match="not monotone"):
        controller_for(est, lim, horizon_steps=5)


def test_limits_that_do_not_map_through_a_recruitment_are_refused(fitted):
    est, _ = fitted
    lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, slew_max_ua=0.2, n_inputs=1)
    with pytest.raises(InvalidParameterError, match="slew limit or an energy budget"):
        controller_for(est, lim, horizon_steps=5)


def test_bad_settings_and_flat_sites_are_refused(fitted):
    _, session = fitted
    with pytest.raises(InvalidParameterError, match="n_knots must be a whole number >= 3"):
        HammersteinArx(n_knots=2).fit(session)
    flat = session.replace(u=np.ones_like(session.u))
    with pytest.raises(SessionError, match="never vary"):
        HammersteinArx().fit(flat)


def test_a_saved_hammerstein_model_predicts_the_same(fitted, tmp_path):
    est, session = fitted
    save_predictor(est, tmp_path / "h.h5", provenance={})
    back, _ = load_predictor(tmp_path / "h.h5")
    up, yp, uf = session.u[:3], session.y[:3], session.u[3:30]
    np.testing.assert_array_equal(back.predict(up, yp, uf), est.predict(up, yp, uf))
    assert back.monotone_ and list(back.selection_table_.columns) == ["site", "amplitude", "fitted", "used"]


@pytest.mark.slow
def test_the_recruitment_route_takes_part_in_the_benchmark_when_named():
    from stimsteer.control import BenchSettings, MethodSpec, run_bench

    session = _session(SATURATING, noise=0.01)
    settings = BenchSettings.quick(methods=(MethodSpec("indirect", "hammerstein"), MethodSpec("direct", "lsq")),
                                   past_steps=2, horizon_steps=5, train_trials=(), noise_scales=(), control=None)
    fits = run_bench(session, settings, n_workers=1, progress=False).tables()["fits"]
    assert set(fits["method"]) == {"hammerstein", "lsq"} and (fits["status"] == "ok").all()


@pytest.mark.parametrize("past", [1, 4])
def test_a_large_design_streams_the_same_regression(monkeypatch, past):
    # the over-parametrised ridge regression by RidgeArx's streamed normal equations (designs above _DESIGN_MAX
    # entries) against the design solved directly (LAPACK's gelsd on the augmented design): the same problem
    import stimsteer.sysid.hammerstein as hammerstein

    one = _session(SATURATING, noise=0.05)
    rng = np.random.default_rng(7)  # a second site, so that the sites' and knots' order is checked too
    u2 = np.repeat(rng.uniform(0.0, 2.0, size=(240, 1)), 5, axis=0)
    y = one.y + np.column_stack([np.convolve(u2[:, 0] ** 2, [0.0, 0.3, 0.1])[:1200], np.zeros(1200)])
    session = one.replace(u=np.hstack([one.u, u2]), y=y, input_names=("site", "other"), input_units=("uA", "uA"))
    est = HammersteinArx(past_steps=past, alpha=1e-4)
    L, K, segs, knots = est._check(session)
    direct, direct_fit = est._overparametrised(session, segs, knots, L), est.fit(session).raw_values_
    monkeypatch.setattr(hammerstein, "_DESIGN_MAX", 0)
    streamed = est._overparametrised(session, segs, knots, L)
    # tolerance: the author's margin over the normal equations' rounding (their condition numbers here, RidgeArx's
    # condition_number_: 2.4e4 at past 1, 8.5e4 at past 4, measured once)
    np.testing.assert_allclose(streamed, direct, rtol=0, atol=1e-9 * np.abs(direct).max())
    np.testing.assert_allclose(est.fit(session).raw_values_, direct_fit, rtol=0, atol=1e-9)


def test_the_streamed_regression_recovers_a_piecewise_linear_recruitment(monkeypatch):
    # as the exact-recovery test above (Bai 1998) through the streamed route: noise-free data, a strength small
    # enough to leave the knot values within the tolerance (the author's margin)
    import stimsteer.sysid.hammerstein as hammerstein

    monkeypatch.setattr(hammerstein, "_DESIGN_MAX", 0)
    est = HammersteinArx(past_steps=1, alpha=1e-8).fit(_session(SATURATING))
    scale = (KNOTS[-1] - KNOTS[0]) / (SATURATING[-1] - SATURATING[0])
    np.testing.assert_allclose(est.recruitment_.values[0], scale * SATURATING, atol=1e-6)
    assert est.monotone_
