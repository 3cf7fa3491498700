"""The lifted route as a user meets it: selection by cross-validation, bad input, model files, fit/predict/plan."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control import SaturatingRateNetworkPlant, random_network, record_session
from stimsteer.control.cli import main
from stimsteer.sysid import InvalidParameterError, SessionError, load_predictor, save_predictor, save_session
from stimsteer.sysid.lifted import LiftedPredictor


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(8)
    plant = SaturatingRateNetworkPlant(random_network(3, density=0.6, seed=8), B=np.abs(rng.normal(size=(3, 1))),
                                       C=np.eye(2, 3), measurement_noise_std=0.01, sample_rate_hz=100.0,
                                       input_names=["site"], output_names=["a", "b"])
    u = np.repeat(rng.uniform(-3, 3, size=(120, 1)), 10, axis=0)
    return record_session(plant, u, trials=[(k * 150, (k + 1) * 150) for k in range(8)], seed=8)


@pytest.fixture(scope="module")
def small(session):
    return LiftedPredictor(past_steps=2, feature_grid=(0, 10), bandwidths=(1.0,), alphas=(1e-6, 1e-2)).fit(session)


def test_the_cross_validation_table_covers_the_grid_and_marks_one_choice(small):
    table = small.cv_table_
    assert len(table) == 4 and table["selected"].sum() == 1
    best = table.loc[table["selected"]].iloc[0]
    assert best["cv_nmse"] == table["cv_nmse"].min()
    assert small.n_features_ == best["n_features"] and small.alpha_ == best["alpha"]


def test_a_dictionary_larger_than_the_data_supports_is_refused(session):
    short = session.select_trials([0])
    with pytest.raises(InvalidParameterError, match=r"needs more than \d+ training transitions.*n_features <= \d+"):
        LiftedPredictor(past_steps=2, n_features=500, alphas=(1e-3,), bandwidths=(1.0,)).fit(short)


def test_a_grid_on_one_trial_is_refused_naming_the_trials_needed(session):
    with pytest.raises(SessionError, match="at least 2 trials"):
        LiftedPredictor(past_steps=2, feature_grid=(0, 5)).fit(session.select_trials([0]))


def test_unknown_dictionary_is_refused(session):
    with pytest.raises(InvalidParameterError, match="dictionary must be one of"):
        LiftedPredictor(dictionary="wavelets").fit(session)


def test_a_saved_lifted_model_predicts_the_same(small, session, tmp_path):
    save_predictor(small, tmp_path / "lifted.h5", provenance={})
    back, _ = load_predictor(tmp_path / "lifted.h5")
    up, yp, uf = session.u[:2], session.y[:2], session.u[2:40]
    np.testing.assert_array_equal(back.predict(up, yp, uf), small.predict(up, yp, uf))
    np.testing.assert_array_equal(back.input_map(7), small.input_map(7))
    assert back.spectral_radius_ == small.spectral_radius_  # stored, not recomputed on every load


def test_a_model_file_without_its_spectral_radius_gets_it_computed(small):
    state = small.to_state()
    del state["spectral_radius"]  # as written before it was stored
    back = LiftedPredictor.from_state(state)
    # the eigenvalues of the whole lifted matrix (without its constant); the fit takes its output-and-feature block
    # (measured 1.1e-15 relative at past 3; 1e-10 a margin)
    assert back.spectral_radius_ == pytest.approx(float(np.max(np.abs(np.linalg.eigvals(small.A_[:-1, :-1])))),
                                                  rel=1e-10)
    assert small.spectral_radius_ == pytest.approx(back.spectral_radius_, rel=1e-10)


@pytest.mark.slow
def test_the_lifted_method_works_through_fit_predict_and_plan(session, tmp_path, capsys):
    data = tmp_path / "session.h5"
    save_session(session, data)
    model = tmp_path / "lifted.h5"
    assert main(["fit", str(data), "--route", "indirect", "--method", "lifted", "--out", str(model)]) == 0
    assert "n_features" in capsys.readouterr().out
    pattern = tmp_path / "pattern.csv"
    pd.DataFrame({"time [s] @ 100 Hz": np.arange(30) / 100.0, "in:site [uA]": np.sin(np.arange(30) / 5.0)}) \
        .to_csv(pattern, index=False)
    assert main(["predict", str(model), "--pattern", str(pattern), "--out", str(tmp_path / "pred")]) == 0
    limits = tmp_path / "limits.toml"
    limits.write_text("[inputs.site]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.5\n")
    assert main(["plan", str(model), "--target", "a=0.3", "--limits", str(limits), "--horizon-steps", "10",
                 "--out", str(tmp_path / "plan")]) == 0
    plan = pd.read_csv(tmp_path / "plan" / "plan.csv", comment="#")
    assert np.all(plan.filter(like="in:site").to_numpy() <= 1.5 + 1e-9)
    assert np.all(plan.filter(like="in:site").to_numpy() >= -1.0 - 1e-9)


def test_the_cross_validation_shows_its_progress_on_a_terminal(session, capsys, monkeypatch):
    # one bar step per dictionary and fold: 2 dictionaries (sizes 0 and 10, one bandwidth) x 3 folds
    monkeypatch.setenv("STIMSTEER_PROGRESS", "1")
    LiftedPredictor(past_steps=2, feature_grid=(0, 10), bandwidths=(1.0,), alphas=(1e-6,)).fit(session)
    err = capsys.readouterr().err
    assert "stimsteer cross-validation of the lifted predictor" in err and "/6 " in err
