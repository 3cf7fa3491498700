"""A lag realisation's predictor ``A − K C`` applied as a shift (``sysid/_shift.py``): the dense products' numbers."""

import numpy as np

from stimsteer.sysid import _shift
from stimsteer.sysid.arx_statespace import arx_to_state_space


def _arx(rng, na=4, nb=3, d=1, p=3, m=2):
    return arx_to_state_space(0.2 * rng.standard_normal((na, p, p)), rng.standard_normal((nb, p, m)), d)


def test_an_arx_realisations_predictor_is_a_nilpotent_shift(rng):
    # Ljung 1999 (System Identification, section 4.3): the observer form's A − K C shifts the stacked samples
    model = _arx(rng)
    step = _shift.PredictorStep(model.A - model.K @ model.C)
    assert step.src is not None
    powers = []
    for _ in range(model.past_steps):
        powers.append(step.power())
        step.advance()
    dense = np.eye(model.n_states)
    for t, got in enumerate(powers):  # Ak^t by dense products
        np.testing.assert_array_equal(got, dense)
        dense = (model.A - model.K @ model.C) @ dense
    assert step.power() is None and not dense.any()  # nilpotent of index past_steps = max(na, nu)


def test_other_matrices_are_not_shifts(rng):
    assert _shift.shift_rows(rng.standard_normal((4, 4))) is None
    assert _shift.shift_rows(np.array([[0.0, 1.0], [0.0, 1.0]])) is None  # two rows copy the same state
    assert _shift.shift_rows(np.array([[0.0, 2.0], [0.0, 0.0]])) is None  # not a copy
    np.testing.assert_array_equal(_shift.shift_rows(np.array([[0.0, 0.0], [1.0, 0.0]])), [-1, 0])


def test_the_state_estimate_and_its_map_equal_the_dense_products_bit_for_bit(rng, monkeypatch):
    model = _arx(rng)
    T = model.past_steps + 2
    u, y = rng.standard_normal((T, 2)), rng.standard_normal((T, 3))
    fast, fast_map = model.estimate_state(u, y), model.state_map(T)
    assert model.__dict__["_shift_rows"] is not None  # found once, kept on the model
    monkeypatch.setattr(_shift, "shift_rows", lambda Ak: None)  # every Ak dense, the least-squares fit as before
    dense = model.replace()  # a new model: nothing kept from the first
    np.testing.assert_array_equal(fast, dense.estimate_state(u, y))
    np.testing.assert_array_equal(fast_map, dense.state_map(T))
    assert dense.__dict__["_shift_rows"] is None
    # the state after the window is the stacked samples (the realisation's docstring): y_{T-1..T-na}, u_{T-1..}
    np.testing.assert_array_equal(fast[:3], y[-1])
    np.testing.assert_array_equal(fast[3:6], y[-2])
