"""A ridge ARX's shift-register realisation balanced on its companion form (``sysid/network/_lag_forms.py``)."""

import numpy as np
import pytest
import scipy.signal as ss

from stimsteer.sysid.arx_statespace import arx_to_state_space
from stimsteer.sysid.network import _lag_forms, systems
from stimsteer.sysid.network.systems import minimal_realisation
from stimsteer.sysid.statespace import StateSpaceModel


def _arx(rng, p, m, na, nb, delay, radius=0.9):
    ar = rng.standard_normal((na, p, p)) * 0.3
    model = arx_to_state_space(ar, rng.standard_normal((nb, p, m)), delay)
    rho = np.max(np.abs(np.linalg.eigvals(np.asarray(model.A))))
    scale = np.array([(radius / rho) ** (i + 1) for i in range(na)])[:, None, None]  # poles times radius / rho
    return arx_to_state_space(ar * scale, rng.standard_normal((nb, p, m)), delay)


@pytest.mark.parametrize("p, m, na, nb, delay", [(3, 2, 5, 4, 1), (2, 3, 4, 3, 0), (4, 1, 3, 2, 1)])
def test_the_companion_form_has_the_models_markov_parameters(rng, p, m, na, nb, delay):
    # reference: scipy.signal.dimpulse (reference library) of the shift-register realisation itself; the companion
    # form's Markov parameters C A^k B must be those (the algebra in the module docstring), on p·max(na, nu) states
    model = _arx(rng, p, m, na, nb, delay)
    nu = delay + nb - 1
    form = _lag_forms.companion_of(model.A, model.B, model.C, model.D)
    assert form is not None
    Ao, Bo, Co = form
    assert Ao.shape == (p * max(na, nu),) * 2 and p * max(na, nu) < model.n_states
    steps = 40
    companion = StateSpaceModel(A=Ao, B=Bo, C=Co, D=model.D)
    for j in range(m):
        _t, (h,) = ss.dimpulse((np.asarray(model.A), np.asarray(model.B)[:, [j]], np.asarray(model.C),
                                np.asarray(model.D)[:, [j]], 1.0), n=steps)
        np.testing.assert_allclose(companion.impulse_response(steps)[:, :, j], h, rtol=1e-12, atol=1e-13)


def test_only_the_exact_pattern_is_taken(rng):
    # any entry off the shift-register pattern, or a form that would not be smaller, keeps the model as it is
    model = _arx(rng, 3, 2, 4, 3, 1)
    A, B, C, D = (np.array(x) for x in (model.A, model.B, model.C, model.D))
    assert _lag_forms.companion_of(A, B, C, D) is not None
    for where in ((4, 0), (3 * 4 + 2, 5), (-1, -1)):
        bent = A.copy()
        bent[where] += 0.5
        assert _lag_forms.companion_of(bent, B, C, D) is None
    moved = B.copy()
    moved[5, 0] = 1.0
    assert _lag_forms.companion_of(A, moved, C, D) is None
    long_inputs = _arx(rng, 2, 3, 2, 6, 1)  # nu = 6 > na: 2·6 = 12 states against 2·2 + 3·6 = 22 -> smaller
    assert _lag_forms.companion_of(long_inputs.A, long_inputs.B, long_inputs.C, long_inputs.D) is not None
    wide = _arx(rng, 3, 1, 1, 4, 1)  # nu = 4 > na = 1: 3·4 = 12 states against 3 + 4 = 7: not smaller
    assert _lag_forms.companion_of(wide.A, wide.B, wide.C, wide.D) is None
    assert _lag_forms.companion_of(rng.standard_normal((6, 6)), B[:6], C[:, :6], D) is None


@pytest.mark.parametrize("horizon", [None, 30])
def test_the_minimal_realisation_is_the_same_from_either_form(rng, monkeypatch, horizon):
    # the Hankel singular values belong to the Markov parameters, not to the realisation (Glover 1984, "All optimal
    # Hankel-norm approximations of linear multivariable systems", section 4): balanced on the companion form or on
    # the lags, the same values (the extra states' 0), the same order, and reduced models with the same impulse
    # responses (the author's margins: rounding of two routes through Gramians, square roots and an SVD)
    model = _arx(rng, 3, 2, 6, 4, 1)
    got, s = minimal_realisation(model, horizon_steps=horizon)
    monkeypatch.setattr(systems, "companion_of", lambda *a: None)
    ref, s_ref = minimal_realisation(model, horizon_steps=horizon)
    assert s.shape == s_ref.shape == (model.n_states,)
    assert np.count_nonzero(s) == 18 and np.all(s[18:] == 0)  # 3 · 6 companion states
    # every value the companion form has (measured: equal to 4e-14 of the largest); the lag route's other 8 are
    # rounding of its Gramians' square roots (7.8e-9 of the largest), the companion form's exact zeros
    np.testing.assert_allclose(s[:18], s_ref[:18], rtol=1e-9, atol=1e-12 * s_ref[0])
    assert np.all(s_ref[18:] < 1e-6 * s_ref[0])
    assert got.n_states == ref.n_states
    assert got.info["minimal_realisation"]["of_states"] == model.n_states
    np.testing.assert_allclose(got.impulse_response(60), ref.impulse_response(60), rtol=1e-8, atol=1e-10)


def test_the_poles_of_a_lag_realisation_are_its_output_blocks_and_zeros(rng):
    # reference: numpy.linalg.eigvals of the whole matrix (reference library); the lagged inputs are a nilpotent
    # block of a block-triangular A, so their eigenvalues are exact zeros and the rest those of the output lags
    from stimsteer.sysid._shift import eigenvalues, non_nilpotent_states

    model = _arx(rng, 3, 2, 5, 4, 1)
    A = np.asarray(model.A)
    rest = non_nilpotent_states(A)
    np.testing.assert_array_equal(rest, np.arange(15))  # the 3 · 5 output lags
    got, ref = eigenvalues(A), np.linalg.eigvals(A)
    assert got.shape == ref.shape and np.count_nonzero(got == 0) >= 6
    for g in got:  # each eigenvalue found among the reference's (conjugate pairs and zeros included; the author's
        # margin: LAPACK's eigenvalues of a 23-state matrix of radius 0.9 agree far below it)
        assert np.min(np.abs(ref - g)) <= 1e-9
    for r in ref:
        assert np.min(np.abs(got - r)) <= 1e-9
    np.testing.assert_allclose(model.spectral_radius, np.max(np.abs(ref)), rtol=1e-12)
    assert non_nilpotent_states(rng.standard_normal((5, 5))) is None  # no zero row: nothing to split off
    shift = np.eye(4, k=-1)  # all nilpotent: every eigenvalue 0
    np.testing.assert_array_equal(eigenvalues(shift), np.zeros(4))
