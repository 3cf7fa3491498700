"""Tests of stimsteer.sysid.datadriven: the least-squares (SPC) and regularised Hankel predictors.

Answers known by construction: noise-free data from a simulated linear system (the fundamental lemma makes every
consistent ``g`` predict the true outputs; checks with their published sources are in
tests/reference/test_willems_reference.py), and the exactness of the row-space compression, which is compared with
the uncompressed problem solved on the raw Hankel columns.
"""

import warnings

import numpy as np
import pytest

from stimsteer.sysid import (
    ConditioningWarning,
    ExcitationError,
    ExcitationWarning,
    InvalidParameterError,
    NotFittedError,
    Session,
    SessionError,
    StateSpaceModel,
)
from stimsteer.sysid.datadriven import HankelBlocks, HankelPredictor, LsqPredictor
from stimsteer.sysid.hankel import block_hankel


def _system(rng, n=3, m=2, p=2):
    A = rng.standard_normal((n, n))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.standard_normal((n, m)), C=rng.standard_normal((p, n)))


def _session(rng, sys, n_trials=4, length=150, noise=0.0):
    parts = []
    for _ in range(n_trials):
        u = rng.standard_normal((length, sys.n_inputs))
        y = sys.simulate(u, x0=rng.standard_normal(sys.n_states))
        parts.append((u, y + noise * rng.standard_normal(y.shape)))
    u = np.vstack([a for a, _ in parts])
    y = np.vstack([b for _, b in parts])
    trials = [(i * length, (i + 1) * length) for i in range(n_trials)]
    return Session(u=u, y=y, sample_rate_hz=200.0, trials=trials)


def _fresh_window(rng, sys, past, horizon):
    u = rng.standard_normal((past + horizon, sys.n_inputs))
    y = sys.simulate(u, x0=rng.standard_normal(sys.n_states))
    return u[:past], y[:past], u[past:], y[past:]


def _rel(a, b):
    return np.linalg.norm(a - b) / np.linalg.norm(b)


ESTIMATORS = [
    lambda: LsqPredictor(past_steps=3, horizon_steps=5),
    lambda: HankelPredictor(past_steps=3, horizon_steps=5, regularizer="projection"),
    lambda: HankelPredictor(past_steps=3, horizon_steps=5, regularizer="l2", compress=False),
]


# ------------------------------------------------------------------------------------------------ contract
@pytest.mark.parametrize("make", ESTIMATORS)
def test_estimator_contract(make, rng):
    est = make()
    params = est.get_params()
    clone = type(est)(**params)
    assert clone.get_params() == params
    assert repr(est).startswith(type(est).__name__ + "(")
    with pytest.raises(NotFittedError, match="not fitted yet; call .*fit"):
        est.predict(np.zeros((3, 2)), np.zeros((3, 2)), np.zeros((5, 2)))
    with pytest.raises(NotFittedError, match="not fitted yet"):
        est.to_state()
    sys = _system(rng)
    s = _session(rng, sys, noise=0.05)
    u_before, y_before = s.u.copy(), s.y.copy()
    assert est.fit(s) is est
    np.testing.assert_array_equal(s.u, u_before)
    np.testing.assert_array_equal(s.y, y_before)
    up, yp, uf, _ = _fresh_window(rng, sys, 3, 5)
    args = (up.copy(), yp.copy(), uf.copy())
    first = est.predict(*args)
    np.testing.assert_array_equal(args[0], up)
    assert first.shape == (5, 2)
    again = clone.fit(s).predict(*args)
    np.testing.assert_array_equal(first, again)
    assert est.past_steps_ == 3 and est.max_horizon_steps_ == 5 and est.n_inputs_ == 2 and est.n_outputs_ == 2


def test_constructor_only_stores_even_invalid_values():
    est = HankelPredictor(past_steps=-1, horizon_steps="x", regularizer="nope", lambdas_g=[-1.0], lambda_y=0)
    assert est.get_params()["regularizer"] == "nope" and est.lambdas_g == [-1.0]


@pytest.mark.parametrize("make", ESTIMATORS)
def test_state_round_trip_predicts_the_same(make, rng):
    sys = _system(rng)
    est = make().fit(_session(rng, sys, noise=0.05))
    back = type(est).from_state(est.to_state())
    up, yp, uf, _ = _fresh_window(rng, sys, 3, 5)
    np.testing.assert_array_equal(back.predict(up, yp, uf), est.predict(up, yp, uf))
    assert back.get_params() == {**est.get_params(), **{k: back.get_params()[k] for k in ("lambdas_g", "alphas")
                                                        if k in est.get_params()}}
    assert back.cv_folds_ == est.cv_folds_ and list(back.cv_table_.columns) == list(est.cv_table_.columns)


def test_save_and_load_through_the_storage_module(rng, tmp_path):
    from stimsteer.sysid.storage import load_predictor, save_predictor

    sys = _system(rng)
    s = _session(rng, sys, noise=0.05)
    up, yp, uf, _ = _fresh_window(rng, sys, 3, 5)
    for est in (LsqPredictor(past_steps=3, horizon_steps=5),
                HankelPredictor(past_steps=3, horizon_steps=5, regularizer="l2")):
        est.fit(s)
        path = tmp_path / f"{est.storage_kind}.h5"
        save_predictor(est, path, provenance={"note": "test"})
        back, prov = load_predictor(path)
        assert type(back) is type(est) and prov["note"] == "test"
        np.testing.assert_allclose(back.predict(up, yp, uf), est.predict(up, yp, uf), rtol=0, atol=1e-12)


# ------------------------------------------------------------------------------------------------ exactness
def test_noise_free_predictions_equal_the_true_outputs(rng):
    sys = _system(rng)
    s = _session(rng, sys)
    up, yp, uf, yf = _fresh_window(rng, sys, 3, 6)
    lsq = LsqPredictor(past_steps=3, horizon_steps=6, alphas=[1e-14], n_states=3).fit(s)
    assert _rel(lsq.predict(up, yp, uf), yf) < 1e-9
    for reg in ("l2", "projection"):
        h = HankelPredictor(past_steps=3, horizon_steps=6, regularizer=reg, lambdas_g=[1e-6], lambda_y=1e6,
                            n_states=3).fit(s)
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            assert _rel(h.predict(up, yp, uf), yf) < 1e-7


def test_an_ill_conditioned_solve_warns(rng):
    sys = _system(rng)
    # noise-free data: the factor has rank m·L + n < its columns, so λ_g alone fixes the null directions
    h = HankelPredictor(past_steps=3, horizon_steps=6, regularizer="l2", lambdas_g=[1e-20],
                        lambda_y=1.0).fit(_session(rng, sys))
    up, yp, uf, yf = _fresh_window(rng, sys, 3, 6)
    with pytest.warns(ConditioningWarning, match="KKT system .* is ill-conditioned at lambda_g"):
        h.predict(up, yp, uf)


@pytest.mark.parametrize("reg", ["l2", "projection"])
@pytest.mark.parametrize("lam", [1e-4, 1e-1, 10.0])
def test_compressed_and_full_problems_give_the_same_prediction(reg, lam, rng):
    sys = _system(rng)
    s = _session(rng, sys, noise=0.1)
    kw = dict(past_steps=4, horizon_steps=6, regularizer=reg, lambdas_g=[lam], lambda_y=10.0)
    comp = HankelPredictor(**kw).fit(s)
    full = HankelPredictor(**kw, compress=False).fit(s)
    n_rows = (2 + 2) * 10
    assert comp.blocks_.compressed and comp.blocks_.Up.shape == (8, n_rows)
    assert not full.blocks_.compressed and full.blocks_.Up.shape == (8, full.n_columns_) == (8, 4 * (150 - 9))
    assert comp.reg_matrix_.shape == (n_rows, n_rows) and full.reg_matrix_.shape == (full.n_columns_,) * 2
    assert comp.lambda_g_ == pytest.approx(full.lambda_g_, rel=1e-12)
    for _ in range(3):
        up, yp, uf, _ = _fresh_window(rng, sys, 4, 6)
        yc, yf_ = comp.predict(up, yp, uf), full.predict(up, yp, uf)
        assert _rel(yc, yf_) < 1e-9


def test_full_blocks_are_the_raw_hankel_rows_and_the_regulariser_is_a_projector(rng):
    sys = _system(rng)
    s = _session(rng, sys, n_trials=2, length=60, noise=0.1)
    h = HankelPredictor(past_steps=2, horizon_steps=3, regularizer="projection", lambdas_g=[1.0],
                        compress=False).fit(s)
    Hu = np.hstack([block_hankel(s.u[a:b], 5) for a, b in s.trials])
    Hy = np.hstack([block_hankel(s.y[a:b], 5) for a, b in s.trials])
    db = h.data_blocks()  # in the channels' units (blocks_ hold the rows of unit-RMS channels)
    for got, want in ((db.Up, Hu[:4]), (db.Uf, Hu[4:]), (db.Yp, Hy[:4]), (db.Yf, Hy[4:])):
        np.testing.assert_allclose(got, want, rtol=1e-13, atol=1e-13)
    np.testing.assert_allclose(h.blocks_.Yf * np.tile(h.channel_scale_[s.n_inputs:], 3)[:, None], Hy[4:], rtol=1e-13)
    M = h.reg_matrix_
    np.testing.assert_allclose(M @ M, M, atol=1e-12)
    np.testing.assert_allclose(M @ h.blocks_.D.T, 0, atol=1e-10)  # I − Π annihilates the row space of D
    c = HankelPredictor(past_steps=2, horizon_steps=3, regularizer="projection", lambdas_g=[1.0]).fit(s)
    np.testing.assert_allclose(c.reg_matrix_ @ c.reg_matrix_, c.reg_matrix_, atol=1e-12)


def test_compressed_size_does_not_grow_with_the_samples(rng):
    sys = _system(rng)
    small = HankelPredictor(past_steps=3, horizon_steps=4, lambdas_g=[0.1]).fit(_session(rng, sys, 2, 100, 0.1))
    large = HankelPredictor(past_steps=3, horizon_steps=4, lambdas_g=[0.1]).fit(_session(rng, sys, 6, 400, 0.1))
    assert large.n_columns_ > 10 * small.n_columns_
    for name in ("Up", "Yp", "Uf", "Yf"):
        assert getattr(large.blocks_, name).shape == getattr(small.blocks_, name).shape
    assert large.reg_matrix_.shape == small.reg_matrix_.shape == (28, 28)


def test_shorter_horizon_uses_the_first_blocks(rng):
    sys = _system(rng)
    s = _session(rng, sys, noise=0.05)
    up, yp, uf, _ = _fresh_window(rng, sys, 3, 5)
    padded = np.vstack([uf[:2], np.zeros((3, 2))])
    for est in (LsqPredictor(past_steps=3, horizon_steps=5), HankelPredictor(past_steps=3, horizon_steps=5)):
        est.fit(s)
        short = est.predict(up, yp, uf[:2])
        assert short.shape == (2, 2)
        np.testing.assert_allclose(short, est.predict(up, yp, padded)[:2], rtol=0, atol=1e-12)
    lsq = LsqPredictor(past_steps=3, horizon_steps=5).fit(s)
    b = np.concatenate([up.reshape(-1), yp.reshape(-1)])
    np.testing.assert_allclose(lsq.predict(up, yp, uf[:2]).reshape(-1),
                               lsq.Kp_[:4] @ b + lsq.Kf_[:4, :4] @ uf[:2].reshape(-1), atol=1e-12)


def test_a_longer_past_window_uses_its_last_samples(rng):
    sys = _system(rng)
    lsq = LsqPredictor(past_steps=3, horizon_steps=4).fit(_session(rng, sys, noise=0.05))
    up, yp, uf, _ = _fresh_window(rng, sys, 7, 4)
    np.testing.assert_array_equal(lsq.predict(up, yp, uf), lsq.predict(up[-3:], yp[-3:], uf))


# ------------------------------------------------------------------------------------------------ selection
def test_fold_errors_equal_explicit_held_out_predictions(rng):
    sys = _system(rng)
    s = _session(rng, sys, n_trials=6, length=120, noise=0.2)
    alphas = [1e-6, 1e-2, 1.0]
    lsq = LsqPredictor(past_steps=3, horizon_steps=4, alphas=alphas, n_splits=3, seed=7).fit(s)
    folds = np.asarray(lsq.cv_folds_)
    assert lsq.cv_scheme_ == "trials" and sorted(set(folds)) == [0, 1, 2]
    std = s.y.std(axis=0)
    w = np.tile(1.0 / std, 4)
    su, sy = lsq.channel_scale_[:s.n_inputs], lsq.channel_scale_[s.n_inputs:]

    def blocks(trials):  # Hankel rows of the unit-RMS channels the predictor is fitted on
        Hu = np.hstack([block_hankel(s.u[lo:hi] / su, 7) for lo, hi in s.trials[trials]])
        Hy = np.hstack([block_hankel(s.y[lo:hi] / sy, 7) for lo, hi in s.trials[trials]])
        return np.vstack([Hu[:6], Hy[:6], Hu[6:]]), Hy[6:]

    for f in range(3):
        val, train = np.flatnonzero(folds == f), np.flatnonzero(folds != f)
        D, Yf = blocks(train)
        scale = (np.sum(D ** 2) + np.sum(Yf ** 2)) / (D.shape[0] + Yf.shape[0])  # relative strengths (docstring)
        Dv, Yv = blocks(val)
        for i, a in enumerate(alphas):
            # ridge in closed form (Hoerl & Kennard 1970): Θ = Yf Dᵀ (D Dᵀ + α s I)⁻¹
            theta = np.linalg.solve(D @ D.T + a * scale * np.eye(D.shape[0]), D @ Yf.T).T
            E = (Yv - theta @ Dv) * np.tile(sy, 4)[:, None]  # back in the channels' units
            err = np.sum((w[:, None] * E) ** 2)
            assert lsq.cv_table_[f"fold_{f}"].iloc[i] == pytest.approx(err / E.size, rel=1e-8)
    best = lsq.cv_table_["validation_error"].idxmin()
    assert lsq.alpha_ == lsq.cv_table_["candidate"].iloc[best]
    assert lsq.ridge_strength_ == pytest.approx(lsq.alpha_ * lsq.data_scale_)


def test_selection_prefers_regularisation_on_short_noisy_data(rng):
    sys = _system(rng, n=3, m=2, p=2)
    s = _session(rng, sys, n_trials=6, length=40, noise=1.0)
    lsq = LsqPredictor(past_steps=6, horizon_steps=8, alphas=[1e-8, 1e-3, 1e-1, 1.0], n_states=1).fit(s)
    assert lsq.alpha_ > 1e-8
    errs = lsq.cv_table_["validation_error"].to_numpy()
    assert errs[0] > errs.min()


def test_seed_changes_the_folds_and_is_reproducible(rng):
    sys = _system(rng)
    s = _session(rng, sys, n_trials=8, length=60, noise=0.1)
    a = LsqPredictor(past_steps=2, horizon_steps=3, alphas=[1e-3, 1e-1], seed=1).fit(s)
    b = LsqPredictor(past_steps=2, horizon_steps=3, alphas=[1e-3, 1e-1], seed=1).fit(s)
    c = LsqPredictor(past_steps=2, horizon_steps=3, alphas=[1e-3, 1e-1], seed=2).fit(s)
    assert a.cv_folds_ == b.cv_folds_ and a.cv_folds_ != c.cv_folds_


def test_one_trial_is_split_into_contiguous_blocks(rng):
    sys = _system(rng)
    s = _session(rng, sys, n_trials=1, length=400, noise=0.1)
    est = HankelPredictor(past_steps=3, horizon_steps=4, regularizer="l2", lambdas_g=[1e-3, 1.0]).fit(s)
    assert est.cv_scheme_ == "contiguous blocks (one trial)" and est.cv_folds_ == (-1,)
    assert np.isfinite(est.cv_table_["validation_error"]).all()


def test_single_candidate_skips_selection(rng):
    sys = _system(rng)
    est = LsqPredictor(past_steps=3, horizon_steps=4, alphas=[1e-3]).fit(_session(rng, sys, noise=0.1))
    assert est.cv_scheme_ == "none" and est.alpha_ == 1e-3 and len(est.cv_table_) == 1


def test_l1_regulariser_predicts_noise_free_outputs(rng):
    sys = _system(rng, n=2, m=1, p=1)
    s = _session(rng, sys, n_trials=3, length=60)
    est = HankelPredictor(past_steps=2, horizon_steps=3, regularizer="l1", lambdas_g=[1e-6, 1e-3],
                          lambda_y=1e4, n_states=2).fit(s)
    assert est.reg_matrix_ is None and not est.blocks_.compressed
    assert est.blocks_.Up.shape[1] == est.n_columns_ == 3 * (60 - 4)
    up, yp, uf, yf = _fresh_window(rng, sys, 2, 3)
    assert _rel(est.predict(up, yp, uf), yf) < 1e-3
    back = HankelPredictor.from_state(est.to_state())
    np.testing.assert_allclose(back.predict(up, yp, uf), est.predict(up, yp, uf), atol=1e-6)


# ------------------------------------------------------------------------------------------------ bad input
def _pulse_session(period, n=300):
    u = np.zeros((n, 1))
    u[::period] = 1.0
    y = np.convolve(u[:, 0], [0.0, 1.0, 0.5])[:n, None]
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=[(0, n // 2), (n // 2, n)])


def test_fit_raises_when_the_input_does_not_excite_the_window():
    with pytest.raises(ExcitationError, match="excites order 4 but the direct route needs at least 8"):
        LsqPredictor(past_steps=3, horizon_steps=5).fit(_pulse_session(4))


def test_fit_warns_when_the_input_excites_less_than_window_plus_states():
    with pytest.warns(ExcitationWarning, match="excites order 6 but the direct route needs 8 for this horizon"):
        HankelPredictor(past_steps=2, horizon_steps=3, n_states=3, lambdas_g=[1e-3]).fit(_pulse_session(6))


@pytest.mark.parametrize("lambdas", [[1e-3], [1e-3, 1e-1]])  # one strength: checked first; two: beside the folds
def test_the_excitation_warning_points_at_the_callers_line(lambdas, monkeypatch):
    from stimsteer.sysid.datadriven import _hankel_folds as hf

    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)  # 1 row: the small session begins its first fold early
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        HankelPredictor(past_steps=2, horizon_steps=3, n_states=3, lambdas_g=lambdas).fit(_pulse_session(6))
    found = [w for w in caught if issubclass(w.category, ExcitationWarning)]
    assert len(found) == 1 and found[0].filename == __file__


@pytest.mark.parametrize("method", ["hankel", "lsq"])
def test_an_input_that_does_not_excite_the_window_stops_the_fold_begun_beside_the_check(method, monkeypatch):
    # the excitation check runs once the held-out folds' work has begun (base._checked_beside): its error is the
    # same as when it ran first, and that work's worker threads have ended when it is raised (stop() waits for
    # them; dropping the plan alone would not)
    import threading

    from stimsteer.sysid.datadriven import _hankel_folds as hf
    from stimsteer.sysid.datadriven import _strength_folds as sf
    from stimsteer.sysid.datadriven import gram as gr

    # 1 row: the small session's folds take the large fits' routes; FOLDS_SIDE_BY_SIDE off: the SPC folds by strength
    monkeypatch.setattr(hf, "SIDE_BY_SIDE_ROWS", 1)
    monkeypatch.setattr(gr, "TOTAL_FACTOR_ROWS", 1)
    monkeypatch.setattr(gr, "FOLDS_SIDE_BY_SIDE", False)
    events, plan_class = [], hf._FoldPlan if method == "hankel" else sf.StrengthPlan
    real_init = plan_class.__init__
    monkeypatch.setattr(plan_class, "__init__", lambda self, *a: events.append("work begun") or real_init(self, *a))
    make = (lambda: HankelPredictor(past_steps=3, horizon_steps=5, lambdas_g=[1e-3, 1e-1])) if method == "hankel" \
        else (lambda: LsqPredictor(past_steps=3, horizon_steps=5, alphas=[1e-3, 1e-1]))
    before = set(threading.enumerate())  # threads of other tests are not this fit's
    with pytest.raises(ExcitationError, match="excites order 4 but the direct route needs at least 8"):
        make().fit(_pulse_session(4, n=2000))
    assert events == ["work begun"]
    new = set(threading.enumerate()) - before
    assert not [t for t in new if t.name.startswith(("stimsteer-hankel", "stimsteer-spc"))]


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda: LsqPredictor(past_steps=3, horizon_steps=4, alphas=[0.0]), r"alphas must be finite and > 0"),
        (lambda: LsqPredictor(past_steps=3, horizon_steps=4, alphas=[]), "non-empty 1-D grid"),
        (lambda: HankelPredictor(past_steps=3, horizon_steps=4, lambdas_g=[1.0, -2.0]), "lambdas_g must be finite"),
        (lambda: HankelPredictor(past_steps=3, horizon_steps=4, lambda_y=0.0), "lambda_y must be a finite number > 0"),
        (lambda: HankelPredictor(past_steps=3, horizon_steps=4, regularizer="l3"), "regularizer must be one of"),
        (lambda: HankelPredictor(past_steps=3, horizon_steps=4, solver_options="fast"), "solver_options must be"),
        (lambda: LsqPredictor(past_steps=0, horizon_steps=4), "past_steps must be an integer >= 1"),
        (lambda: LsqPredictor(past_steps=3, horizon_steps=2.0), "horizon_steps must be an integer >= 1"),
        (lambda: LsqPredictor(past_steps=3, horizon_steps=4, n_splits=1), "n_splits must be an integer >= 2"),
        (lambda: LsqPredictor(past_steps=3, horizon_steps=4, n_states=-1), "n_states must be an integer >= 0"),
    ],
)
def test_bad_settings_raise_clear_errors(make, match, rng):
    sys = _system(rng)
    with pytest.raises(InvalidParameterError, match=match):
        make().fit(_session(rng, sys, n_trials=2, length=100, noise=0.1))


def test_windows_longer_than_every_trial_are_a_session_error(rng):
    sys = _system(rng)
    with pytest.raises(SessionError, match=r"\(60 \+ 50 = 110 samples\) is longer than every valid segment of every "
                                          r"trial \(the longest is 100\)"):
        LsqPredictor(past_steps=60, horizon_steps=50).fit(_session(rng, sys, n_trials=2, length=100, noise=0.1))


def test_fit_rejects_something_that_is_not_a_session():
    with pytest.raises(SessionError, match="expected a stimsteer Session or an opened session file; got dict"):
        LsqPredictor(past_steps=2, horizon_steps=2).fit({"u": np.zeros(3)})


def test_selection_without_held_out_data_is_refused(rng):
    sys = _system(rng, n=2, m=1, p=1)
    s = _session(rng, sys, n_trials=1, length=14, noise=0.1)
    # one trial of 14 samples (8 windows of 2 + 5 = 7 samples, enough for one input) cut in three blocks of
    # at most 5 samples: no block holds a window
    with pytest.raises(SessionError, match=r"fit in 0 fold\(s\), fewer than two"):
        LsqPredictor(past_steps=2, horizon_steps=5, alphas=[1e-3, 1e-1], n_states=0, n_splits=3).fit(s)


@pytest.mark.parametrize(
    "args, match",
    [
        ((np.zeros((2, 2)), np.zeros((2, 2)), np.zeros((4, 2))),
         "at least past_steps_=3 samples of inputs and outputs of equal length; got 2 input and 2 output samples"),
        ((np.zeros((3, 2)), np.zeros((4, 2)), np.zeros((4, 2))), "of equal length; got 3 input and 4 output samples"),
        ((np.zeros((3, 2)), np.zeros((3, 2)), np.zeros((5, 2))),
         "1 to max_horizon_steps_ = 4 samples per window; got 5"),
        ((np.zeros((3, 2)), np.zeros((3, 2)), np.zeros((0, 2))), "got 0"),
        ((np.zeros((3, 1)), np.zeros((3, 2)), np.zeros((4, 2))), r"u_past must have shape \(n_samples, 2\)"),
        ((np.zeros((3, 2)), np.full((3, 2), np.nan), np.zeros((4, 2))), "y_past holds NaN"),
    ],
)
def test_predict_rejects_bad_windows(args, match, rng):
    sys = _system(rng)
    est = LsqPredictor(past_steps=3, horizon_steps=4, alphas=[1e-3]).fit(_session(rng, sys, noise=0.1))
    with pytest.raises(SessionError, match=match):
        est.predict(*args)


def test_hankel_blocks_split_a_matrix_in_row_order():
    H = np.arange(18.0)[:, None] * np.ones((1, 3))
    b = HankelBlocks.from_matrix(H, 1, 2, 2, 4, compressed=False)
    assert [x.shape[0] for x in (b.Up, b.Yp, b.Uf, b.Yf)] == [2, 4, 4, 8]
    np.testing.assert_array_equal(b.D[:, 0], np.arange(10.0))
    with pytest.raises(SessionError, match=r"needs 18 rows; got shape \(20, 3\)"):
        HankelBlocks.from_matrix(np.zeros((20, 3)), 1, 2, 2, 4, compressed=False)


@pytest.mark.parametrize("compress", [True, False])
def test_solve_g_satisfies_the_constraints_and_gives_the_prediction(compress, rng):
    sys = _system(rng)
    h = HankelPredictor(past_steps=3, horizon_steps=5, regularizer="l2", lambdas_g=[1e-2], lambda_y=10.0,
                        compress=compress).fit(_session(rng, sys, noise=0.1))
    up, yp, uf, _ = _fresh_window(rng, sys, 3, 5)
    g = h.solve_g(up, yp, uf)
    assert g.shape == (h.blocks_.Up.shape[1],)
    db = h.data_blocks()  # the blocks in the channels' units
    np.testing.assert_allclose(db.Up @ g, up.reshape(-1), atol=1e-9)
    np.testing.assert_allclose(db.Uf @ g, uf.reshape(-1), atol=1e-9)
    np.testing.assert_allclose((db.Yf @ g).reshape(5, 2), h.predict(up, yp, uf), atol=1e-9)


@pytest.mark.parametrize("kind", ["lsq", "l2", "projection"])
def test_predict_many_equals_predict_window_by_window(rng, kind):
    sys = _system(rng)
    s = _session(rng, sys, n_trials=4, length=150, noise=0.1)
    est = (LsqPredictor(past_steps=3, horizon_steps=5) if kind == "lsq"
           else HankelPredictor(past_steps=3, horizon_steps=5, regularizer=kind)).fit(s)
    up, yp, uf = (rng.normal(size=(6, 3, s.n_inputs)), rng.normal(size=(6, 3, s.n_outputs)),
                  rng.normal(size=(6, 4, s.n_inputs)))
    one = np.stack([est.predict(a, b, c) for a, b, c in zip(up, yp, uf)])
    np.testing.assert_allclose(est.predict_many(up, yp, uf), one, rtol=1e-10, atol=1e-12)
    with pytest.raises(SessionError, match="must have shape"):
        est.predict_many(up[0], yp[0], uf[0])


@pytest.mark.parametrize("make", [
    lambda: LsqPredictor(past_steps=3, horizon_steps=4, alphas=[1e-3], centre_outputs=True),
    lambda: HankelPredictor(past_steps=3, horizon_steps=4, regularizer="l2", lambdas_g=[1e-2], centre_outputs=True),
    lambda: HankelPredictor(past_steps=3, horizon_steps=4, regularizer="projection", lambdas_g=[1e-2]),
])
def test_prediction_maps_reproduce_predict(make, rng):
    sys = _system(rng)
    session = _session(rng, sys, noise=0.1)
    est = make().fit(session.replace(y=session.y + 2.0))
    maps = est.prediction_maps(5, 3)  # a longer past than past_steps_ and a shorter horizon than the fitted one
    up, yp, uf = rng.standard_normal((5, 2)), rng.standard_normal((5, 2)) + 2.0, rng.standard_normal((3, 2))
    np.testing.assert_allclose(maps.apply(up, yp, uf), est.predict(up, yp, uf), rtol=1e-12, atol=1e-12)


def test_the_l1_predictor_declares_that_it_has_no_linear_maps(rng):
    sys = _system(rng)
    est = HankelPredictor(past_steps=3, horizon_steps=4, regularizer="l1", lambdas_g=[1e-2]).fit(
        _session(rng, sys, noise=0.1))
    assert est.has_linear_maps is False
    with pytest.raises(SessionError, match="not affine in its window"):
        est.prediction_maps(3, 4)
