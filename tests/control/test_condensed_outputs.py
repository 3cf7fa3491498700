"""The output controller's maps without the states' (``condensed_outputs``) against ``condensed_prediction``."""

import numpy as np

from stimsteer.control.mpc import condensed as cd
from stimsteer.sysid.statespace import StateSpaceModel


def _model(rng, n=7, m=2, p=3):
    A = rng.standard_normal((n, n))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)),
                           D=rng.standard_normal((p, m)))


def test_small_models_get_condensed_predictions_numbers_bit_for_bit(rng):
    model, N = _model(rng), 9
    Gy, Phi_y, Gx, _Phi_x = cd.condensed_prediction(model, N)
    gy, phi_y, gx_last = cd.condensed_outputs(model, N)
    np.testing.assert_array_equal(gy, Gy)
    np.testing.assert_array_equal(phi_y, Phi_y)
    np.testing.assert_array_equal(gx_last, Gx[(N - 1) * model.n_states:])


def test_the_row_recursion_gives_the_same_maps_to_rounding(rng, monkeypatch):
    model, N = _model(rng), 12
    Gy, Phi_y, Gx, _Phi_x = cd.condensed_prediction(model, N)
    monkeypatch.setattr(cd, "ROW_RECURSION_STATES", 1)
    gy, phi_y, gx_last = cd.condensed_outputs(model, N)
    np.testing.assert_array_equal(gy, Gy)
    # C A^k by another association of the same products: rounding, the author's margins
    np.testing.assert_allclose(phi_y, Phi_y, rtol=1e-12, atol=1e-13 * np.abs(Phi_y).max())
    # and the definition, written out: block k of Phi_y is C A^k
    np.testing.assert_allclose(phi_y[-model.n_outputs:], model.C @ np.linalg.matrix_power(model.A, N - 1),
                               rtol=1e-12, atol=1e-13 * np.abs(Phi_y).max())
    np.testing.assert_array_equal(gx_last, Gx[(N - 1) * model.n_states:])


def test_an_output_controller_builds_no_state_maps_and_plans_as_before(rng, monkeypatch):
    # with a terminal cost (the last block row of Gx and A^N are read) and without; the state maps of
    # condensed_prediction are never built for an output target, and the plans equal those from its maps
    from stimsteer.control.limits import StimLimits
    from stimsteer.control.mpc import model as mm

    model = StateSpaceModel(A=np.diag([0.8, 0.5, -0.3]) + 0.1, B=rng.standard_normal((3, 2)),
                            C=rng.standard_normal((2, 3)), past_steps=3)
    limits = StimLimits(amplitude_min_ua=[-1.0, 0.0], amplitude_max_ua=[1.0, 2.0], slew_max_ua=[0.4, 0.6])
    u = rng.uniform(0.0, 0.3, size=(3, 2))
    y = model.simulate(u, x0=rng.standard_normal(3))
    for terminal in (None, "riccati"):
        def plan():
            ctrl = mm.ModelPredictiveController(model=model, limits=limits, horizon_steps=6, terminal_weight=terminal)
            return ctrl.fit().plan(u, y, target=[0.3, -0.2]).inputs
        new = plan()
        with monkeypatch.context() as mp:  # the controller as it was: every map from condensed_prediction
            mp.setattr(mm, "condensed_outputs", lambda mdl, N: (lambda g: (g[0], g[1], g[2][(N - 1) * 3:]))(
                cd.condensed_prediction(mdl, N)))
            old = plan()
        np.testing.assert_array_equal(new, old)
        with monkeypatch.context() as mp:
            mp.setattr(mm, "condensed_prediction", lambda *a: (_ for _ in ()).throw(AssertionError("state maps")))
            plan()
