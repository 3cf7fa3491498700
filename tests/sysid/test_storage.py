"""Model files: round trips with provenance, and every refusal of a file that is not one of ours."""

import json

import h5py
import numpy as np
import pytest

from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.exceptions import FileFormatError, NotFittedError, StimsteerError
from stimsteer.sysid.session import Session
from stimsteer.sysid.statespace import StateSpaceModel
from stimsteer.sysid.storage import LAYOUT_VERSION, load_predictor, model_from_state, model_to_state, save_predictor

PROV = {"route": "indirect", "session": {"content_hash": "abc"}, "split": {"train": [0, 2], "test": [1]}}


def session(rng, n_trials=4, length=150):
    model = StateSpaceModel(A=[[0.7, 0.2], [0.0, 0.4]], B=[[0.0, 1.0], [1.0, 0.0]], C=[[1.0, 0.0], [0.3, 1.0]])
    u = rng.standard_normal((n_trials * length, 2))
    y = model.simulate(u) + 0.05 * rng.standard_normal((n_trials * length, 2))
    return Session(u=u, y=y, sample_rate_hz=250.0, trials=[(i * length, (i + 1) * length) for i in range(n_trials)])


def test_ridge_arx_round_trip_with_provenance(rng, tmp_path):
    s = session(rng)
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[1e-4, 1e-1]).fit(s)
    path = save_predictor(est, tmp_path / "m.h5", provenance=PROV)
    back, prov = load_predictor(path)
    assert isinstance(back, RidgeArx)
    up, yp, uf = s.u[:5], s.y[:5], s.u[5:40]
    np.testing.assert_array_equal(back.predict(up, yp, uf), est.predict(up, yp, uf))
    np.testing.assert_array_equal(back.model_.A, est.model_.A)
    assert back.cv_table_.equals(est.cv_table_)
    assert {k: prov[k] for k in PROV} == PROV
    saved = prov["saved"]
    assert saved["kind"] == "ridge_arx" and saved["layout_version"] == LAYOUT_VERSION
    assert {"numpy", "scipy", "h5py", "python"} <= set(saved["versions"]) and saved["created_utc"].endswith("+00:00")


def test_state_space_round_trip(tmp_path):
    m = StateSpaceModel(A=[[0.5]], B=[[1.0]], C=[[2.0]], K=[[0.1]], innovation_cov=[[0.3]], sample_rate_hz=10.0,
                        past_steps=4, input_names=("stim",), output_names=("rate",), info={"note": "invented"})
    np.testing.assert_array_equal(model_from_state(model_to_state(m)).K, m.K)
    save_predictor(m, tmp_path / "ss.h5", provenance={})
    back, _ = load_predictor(tmp_path / "ss.h5")
    for name in ("A", "B", "C", "D", "K", "innovation_cov"):
        np.testing.assert_array_equal(getattr(back, name), getattr(m, name))
    assert (back.past_steps, back.input_names, back.info["note"]) == (4, ("stim",), "invented")


def test_subspace_round_trip(rng, tmp_path):
    from stimsteer.sysid import subspace as sub
    s = session(rng, n_trials=4, length=300)
    est = sub.SubspaceId(past_steps=4, future_steps=4).fit(s)
    save_predictor(est, tmp_path / "sub.h5", provenance=PROV)
    back, _ = load_predictor(tmp_path / "sub.h5")
    up, yp, uf = s.u[:4], s.y[:4], s.u[4:30]
    np.testing.assert_allclose(back.predict(up, yp, uf), est.predict(up, yp, uf), rtol=1e-12, atol=1e-12)
    assert back.order_ == est.order_


def test_nested_state_values_round_trip(tmp_path):
    # every kind of value a to_state() dict may hold, through the encoder and back
    state = {"a": np.arange(6.0).reshape(2, 3), "flags": np.array([True, False]), "n": 3, "x": 0.1, "s": "text",
             "none": None, "names": ["u0", "u1"], "nan": float("nan"), "sub": {"deep": {"v": np.ones(2)}, "k": 1}}
    from stimsteer.sysid import storage

    with h5py.File(tmp_path / "raw.h5", "w") as f:
        storage._write_dict(f.create_group("state"), state, "state")
    with h5py.File(tmp_path / "raw.h5", "r") as f:
        back = storage._read_dict(f["state"])
    np.testing.assert_array_equal(back["a"], state["a"])
    assert back["flags"].dtype == bool and back["n"] == 3 and back["x"] == 0.1 and back["none"] is None
    assert back["names"] == ["u0", "u1"] and np.isnan(back["nan"]) and back["sub"]["k"] == 1
    np.testing.assert_array_equal(back["sub"]["deep"]["v"], np.ones(2))


# ------------------------------------------------------------------------------------------------ refusals
def test_not_hdf5(tmp_path):
    p = tmp_path / "m.h5"
    p.write_text("time,value\n0,1\n")
    with pytest.raises(FileFormatError, match="is not an HDF5 file, so not a stimsteer model"):
        load_predictor(p)


def test_foreign_hdf5(tmp_path):
    with h5py.File(tmp_path / "other.h5", "w") as f:
        f["data"] = np.zeros(3)
    with pytest.raises(FileFormatError, match="without stimsteer's model marker"):
        load_predictor(tmp_path / "other.h5")


def test_session_file_is_not_a_model(rng, tmp_path):
    from stimsteer.sysid import io as io
    io.save_session(session(rng, n_trials=2, length=20), tmp_path / "s.h5")
    with pytest.raises(FileFormatError, match="is a stimsteer session file, not a stimsteer model"):
        load_predictor(tmp_path / "s.h5")


def _saved(rng, tmp_path):
    est = RidgeArx(output_lags=1, input_lags=1, alphas=[1e-3]).fit(session(rng, n_trials=2, length=60))
    return save_predictor(est, tmp_path / "m.h5", provenance=PROV)


def test_other_layout_version(rng, tmp_path):
    p = _saved(rng, tmp_path)
    with h5py.File(p, "a") as f:
        f.attrs["layout_version"] = LAYOUT_VERSION + 1
    with pytest.raises(FileFormatError, match=f"layout version {LAYOUT_VERSION + 1}; this stimsteer reads version"):
        load_predictor(p)


def test_unknown_kind(rng, tmp_path):
    p = _saved(rng, tmp_path)
    with h5py.File(p, "a") as f:
        f.attrs["kind"] = "crystal_ball"
    with pytest.raises(FileFormatError, match="unknown kind 'crystal_ball'"):
        load_predictor(p)


def test_damaged_state(rng, tmp_path):
    p = _saved(rng, tmp_path)
    with h5py.File(p, "a") as f:
        del f["state/coef"]
    with pytest.raises(FileFormatError, match="stored state does not match"):
        load_predictor(p)
    with h5py.File(p, "a") as f:
        del f["provenance"]
    with pytest.raises(FileFormatError, match="damaged stimsteer model file"):
        load_predictor(p)


def test_missing_file(tmp_path):
    with pytest.raises(FileNotFoundError, match="no such model file"):
        load_predictor(tmp_path / "nope.h5")


def test_existing_file_needs_overwrite(rng, tmp_path):
    p = _saved(rng, tmp_path)
    est, _ = load_predictor(p)
    with pytest.raises(StimsteerError, match="already exists; choose another path or pass --force"):
        save_predictor(est, p, provenance={})
    save_predictor(est, p, provenance={"again": True}, overwrite=True)
    assert load_predictor(p)[1]["again"] is True


def test_unfitted_and_unstorable_predictors(tmp_path):
    with pytest.raises(NotFittedError, match="RidgeArx is not fitted yet"):
        save_predictor(RidgeArx(), tmp_path / "m.h5", provenance={})
    with pytest.raises(StimsteerError, match="not a storable predictor"):
        save_predictor(object(), tmp_path / "m.h5", provenance={})


def test_failed_save_leaves_nothing_behind(rng, tmp_path):
    est = RidgeArx(output_lags=1, input_lags=1, alphas=[1e-3]).fit(session(rng, n_trials=2, length=60))
    with pytest.raises(StimsteerError, match="cannot store provenance/when of type object"):
        save_predictor(est, tmp_path / "m.h5", provenance={"when": object()})
    assert list(tmp_path.iterdir()) == []


def test_provenance_is_plain_json(rng, tmp_path):
    p = _saved(rng, tmp_path)
    with h5py.File(p, "r") as f:
        text = f["provenance"][()]
    assert json.loads(text)["route"] == "indirect"


def _drop_stored_units(path):
    """Make a model file look as written before units were stored (its state holds no units)."""
    with h5py.File(path, "r+") as f:
        values = json.loads(f["state/__values__"][()])
        del values["input_units"], values["output_units"]
        del f["state/__values__"]
        f["state"].create_dataset("__values__", data=json.dumps(values))


def test_units_are_stored_and_an_older_file_takes_them_from_its_provenance(rng, tmp_path):
    s = session(rng).replace(input_units=("uA", "uA"), output_units=("mV", "mV"))
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[1e-3]).fit(s)
    assert est.input_units_ == ("uA", "uA") and est.output_units_ == ("mV", "mV")
    back, _ = load_predictor(save_predictor(est, tmp_path / "new.h5", provenance=PROV))
    assert back.input_units_ == ("uA", "uA") and back.output_units_ == ("mV", "mV")
    record = {**PROV, "session": {"input_units": ["uA", "uA"], "output_units": ["mV", "mV"]}}
    for name, prov, expected in (("old.h5", record, ("uA", "mV")), ("bare.h5", PROV, ("", ""))):
        path = save_predictor(est, tmp_path / name, provenance=prov)
        _drop_stored_units(path)
        back, _ = load_predictor(path)
        assert back.input_units_ == (expected[0],) * 2 and back.output_units_ == (expected[1],) * 2


def test_a_loaded_model_refuses_settings_changed_after_loading(rng, tmp_path):
    est = RidgeArx(output_lags=2, input_lags=2, alphas=[1e-3]).fit(session(rng))
    back, _ = load_predictor(save_predictor(est, tmp_path / "m.h5", provenance=PROV))
    back.set_params(output_lags=1)
    with pytest.raises(NotFittedError, match="fit\\(\\.\\.\\.\\) again"):
        back.predict(np.zeros((2, 2)), np.zeros((2, 2)), np.zeros((3, 2)))


# ------------------------------------------------------------------------------------------------ packing
def test_large_mostly_zero_arrays_are_stored_compressed_and_come_back_exactly(tmp_path):
    # a 1,100 × 1,100 coordinate projector (the Hankel predictor's regulariser, 100 nonzeros per 1,000 rows) and a
    # dense array of the same size: the first through HDF5's standard gzip filter, the second as it is
    from stimsteer.sysid import storage

    sparse = np.zeros((1100, 1100))
    sparse[np.arange(1000, 1100), np.arange(1000, 1100)] = 1.0
    dense = np.random.default_rng(3).standard_normal((1100, 1100))
    with h5py.File(tmp_path / "raw.h5", "w") as f:
        storage._write_dict(f.create_group("state"), {"sparse": sparse, "dense": dense}, "state")
    with h5py.File(tmp_path / "raw.h5", "r") as f:
        assert f["state/sparse"].compression == "gzip" and f["state/dense"].compression is None
        back = storage._read_dict(f["state"])
    np.testing.assert_array_equal(back["sparse"], sparse)
    np.testing.assert_array_equal(back["dense"], dense)
    # the dense array as it is, the sparse one at under a twentieth of its size (the author's margin: gzip of 100
    # ones among 1.21 million zeros)
    assert (tmp_path / "raw.h5").stat().st_size < dense.nbytes + sparse.nbytes / 20


def test_a_hankel_predictors_projection_regulariser_is_stored_small_and_loaded_as_fitted(rng, tmp_path, monkeypatch):
    from stimsteer.sysid import storage
    from stimsteer.sysid.datadriven.hankel_predictor import HankelPredictor

    monkeypatch.setattr(storage, "_SPARSE_STORE_MIN", 1)  # the small test model's regulariser counts as large
    est = HankelPredictor(past_steps=6, horizon_steps=4).fit(session(rng))
    M = est.reg_matrix_
    n_b = int(np.count_nonzero(np.diagonal(M) == 0))
    assert 0 < n_b < M.shape[0] and np.count_nonzero(M) == M.shape[0] - n_b  # diag(0, I): what the fit makes
    path = save_predictor(est, tmp_path / "h.h5", provenance=PROV)
    with h5py.File(path, "r") as f:
        assert f["state/fitted/reg_matrix_"].compression == "gzip"
    back, _prov = load_predictor(path)
    np.testing.assert_array_equal(back.reg_matrix_, M)
    rng2 = np.random.default_rng(4)
    window = rng2.standard_normal((6, 2)), rng2.standard_normal((6, 2)), rng2.standard_normal((4, 2))
    np.testing.assert_array_equal(back.predict(*window), est.predict(*window))
    # the loaded projector is made again as the fit makes it (its zero pages untouched); other matrices stay as read
    from stimsteer.sysid.datadriven import hankel_predictor as hp

    made = []
    monkeypatch.setattr(hp, "_coordinate_projector",
                        lambda r, k: made.append((r, k)) or np.diag((np.arange(r) >= k) * 1.0))
    assert np.array_equal(hp._compact(np.asarray(M)), M) and made == [(M.shape[0], n_b)]
    other = np.eye(M.shape[0])
    assert hp._compact(other) is other and len(made) == 1
