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
    assert _shift.PredictorStep.of(model).Ak is None  # then applied without forming A − K C again
    monkeypatch.setattr(_shift, "shift_rows", lambda Ak: None)  # every Ak dense, the least-squares fit as before
    dense = model.replace()  # a new model: nothing kept from the first
    np.testing.assert_array_equal(fast, dense.estimate_state(u, y))
    np.testing.assert_array_equal(fast_map, dense.state_map(T))
    assert dense.__dict__["_shift_rows"] is None
    # the state after the window is the stacked samples (the realisation's docstring): y_{T-1..T-na}, u_{T-1..}
    np.testing.assert_array_equal(fast[:3], y[-1])
    np.testing.assert_array_equal(fast[3:6], y[-2])


def test_the_shift_by_runs_of_rows_is_the_dense_product_into_a_given_array(rng):
    # reference: the dense product Ak @ X (NumPy); rows in runs of consecutive sources, zero rows between runs and
    # a run that starts again after a jump, X as a vector and as a matrix, into a fresh array and into a given one
    src = np.array([-1, 0, 1, 2, -1, -1, 5, 6, 3, -1])
    Ak = np.zeros((src.size, src.size))
    Ak[np.flatnonzero(src >= 0), src[src >= 0]] = 1.0
    np.testing.assert_array_equal(_shift.shift_rows(Ak), src)
    assert _shift._runs(src) == [(0, 1, -1), (1, 4, 0), (4, 6, -1), (6, 8, 5), (8, 9, 3), (9, 10, -1)]
    assert _shift._runs(np.array([], dtype=int)) == [] and _shift._runs(np.array([-1, -1])) == [(0, 2, -1)]
    step = _shift.PredictorStep(Ak)
    for X in (rng.standard_normal(src.size), rng.standard_normal((src.size, 7))):
        np.testing.assert_array_equal(step(X), Ak @ X)
        out = np.full_like(X, np.nan)  # every entry written, the zero rows too
        assert step(X, out=out) is out
        np.testing.assert_array_equal(out, Ak @ X)
    dense = _shift.PredictorStep(rng.standard_normal((4, 4)))  # not a shift: a product, into out as well
    X, out = rng.standard_normal((4, 3)), np.empty((4, 3))
    np.testing.assert_array_equal(dense(X, out=out), dense.Ak @ X)


def test_the_state_map_is_the_state_estimate_of_every_unit_window(rng):
    # the map's definition (its docstring): column k is estimate_state of the k-th unit window [vec u; vec y], each
    # estimated on its own by the least-squares fit (a lag realisation at and below its lag count, where the start
    # of the window still counts, and a model whose predictor is not a shift). Measured: 0, 1.9e-16 and 7.2e-16
    # relative at most (the map's least squares solved for all columns at once, the function's for one)
    from stimsteer.sysid.statespace import StateSpaceModel

    lagged = _arx(rng)
    A = np.diag([0.7, 0.4, -0.2])
    other = StateSpaceModel(A=A, B=rng.standard_normal((3, 2)), C=rng.standard_normal((3, 3)), D=rng.standard_normal((3, 2)),
                            K=0.1 * rng.standard_normal((3, 3)))
    for model, T in ((lagged, lagged.past_steps), (lagged, lagged.past_steps - 2), (other, 4)):
        m, p = model.n_inputs, model.n_outputs
        E = model.state_map(T)
        basis = np.eye(T * (m + p))
        for k in range(basis.shape[0]):
            u, y = basis[k, :T * m].reshape(T, m), basis[k, T * m:].reshape(T, p)
            np.testing.assert_allclose(E[:, k], model.estimate_state(u, y), rtol=1e-10, atol=1e-12)
