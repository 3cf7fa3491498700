"""Adding a method is one class and one registry line: then `fit`, `predict`, `plan` and the benchmark take it.

The toy method is a first-order model fitted by least squares, ``y_k = A y_{k-1} + B u_k`` (an ARX model of order
one with direct feed-through; Ljung 1999, System Identification, ch. 4). Nothing outside this file is changed for
it: the registration below is the only link.
"""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control import BenchSettings, LinearNetworkPlant, MethodSpec, random_network, record_session, run_bench
from stimsteer.control.cli import main
from stimsteer.sysid import METHODS, BasePredictor, MethodEntry, PredictionMaps, check_fitted, save_session


class ToyFirstOrder(BasePredictor):
    """``y_k = A y_{k-1} + B u_k``, fitted by least squares on every pair of consecutive valid samples."""

    storage_kind = "toy_first_order"

    def __init__(self, *, ridge=0.0):
        self.ridge = ridge

    def fit(self, session):
        rows, targets = [], []
        for start, stop in session.segments(min_length=2):
            u, y, _ = session.read(start, stop)
            rows.append(np.hstack([y[:-1], u[1:]]))
            targets.append(y[1:])
        X, Y = np.vstack(rows), np.vstack(targets)
        theta = np.linalg.solve(X.T @ X + self.ridge * np.eye(X.shape[1]), X.T @ Y).T
        p = Y.shape[1]
        self.A_, self.B_ = theta[:, :p], theta[:, p:]
        self._describe(session.input_names, session.output_names, session.input_units, session.output_units)
        return self

    def _describe(self, input_names, output_names, input_units, output_units):
        self.n_inputs_, self.n_outputs_ = len(input_names), len(output_names)
        self.input_names_, self.output_names_ = tuple(input_names), tuple(output_names)
        self.input_units_, self.output_units_ = tuple(input_units), tuple(output_units)
        self.past_steps_, self.max_horizon_steps_ = 1, None

    def predict_many(self, u_past, y_past, u_future):
        check_fitted(self, "A_")
        y, out = np.asarray(y_past, float)[:, -1], []
        for k in range(np.shape(u_future)[1]):
            y = y @ self.A_.T + np.asarray(u_future, float)[:, k] @ self.B_.T
            out.append(y)
        return np.stack(out, axis=1)

    def prediction_maps(self, past_steps, horizon_steps):
        check_fitted(self, "A_")
        m, p, T, N = self.n_inputs_, self.n_outputs_, int(past_steps), int(horizon_steps)
        P, F = np.zeros((N * p, T * (m + p))), np.zeros((N * p, N * m))
        Ak = np.eye(p)
        for k in range(N):
            Ak = self.A_ @ Ak
            P[k * p:(k + 1) * p, T * m + (T - 1) * p:] = Ak
            for j in range(k + 1):
                F[k * p:(k + 1) * p, j * m:(j + 1) * m] = np.linalg.matrix_power(self.A_, k - j) @ self.B_
        return PredictionMaps(P=P, F=F, c=np.zeros(N * p), past_steps=T, horizon_steps=N)

    def rest_window(self):
        return np.zeros((1, self.n_inputs_)), np.zeros((1, self.n_outputs_))

    def to_state(self):
        return {"params": {"ridge": float(self.ridge)},
                "fitted": {"A_": self.A_, "B_": self.B_, "names": "\n".join(
                    ["|".join(self.input_names_), "|".join(self.output_names_), "|".join(self.input_units_),
                     "|".join(self.output_units_)])}}

    @classmethod
    def from_state(cls, state):
        obj = cls(ridge=float(state["params"]["ridge"]))
        obj.A_, obj.B_ = np.asarray(state["fitted"]["A_"]), np.asarray(state["fitted"]["B_"])
        obj._describe(*(line.split("|") for line in str(state["fitted"]["names"]).split("\n")))
        obj._mark_fitted()
        return obj


@pytest.fixture(scope="module")
def registered():
    METHODS[("direct", "toy")] = MethodEntry(ToyFirstOrder)  # the one registry line
    yield
    del METHODS[("direct", "toy")]


@pytest.fixture(scope="module")
def session():
    rng = np.random.default_rng(5)
    plant = LinearNetworkPlant(random_network(3, density=0.6, seed=5), B=rng.normal(size=(3, 1)) * 0.3,
                               C=np.eye(2, 3), measurement_noise_std=0.01, sample_rate_hz=100.0,
                               input_names=["site"], output_names=["a", "b"])
    u = np.clip(rng.normal(scale=3.0, size=(1200, 1)), -10, 10)
    return record_session(plant, u, trials=[(k * 150, (k + 1) * 150) for k in range(8)], seed=5)


def test_the_toy_predictor_keeps_the_contract(registered, session):
    toy = ToyFirstOrder().fit(session)
    up, yp, uf = session.u[:4], session.y[:4], session.u[4:10]
    np.testing.assert_allclose(toy.prediction_maps(4, 6).apply(up, yp, uf), toy.predict(up, yp, uf), atol=1e-12)


def test_a_registered_method_works_through_fit_predict_and_plan(registered, session, tmp_path, capsys):
    data = tmp_path / "session.h5"
    save_session(session, data)
    model = tmp_path / "toy.h5"
    assert main(["fit", str(data), "--route", "direct", "--method", "toy", "--out", str(model)]) == 0
    pattern = tmp_path / "pattern.csv"
    pd.DataFrame({"time [s] @ 100 Hz": np.arange(30) / 100.0, "in:site [uA]": np.sin(np.arange(30) / 5.0)}) \
        .to_csv(pattern, index=False)
    assert main(["predict", str(model), "--pattern", str(pattern), "--out", str(tmp_path / "pred")]) == 0
    predicted = pd.read_csv(tmp_path / "pred" / "prediction.csv", comment="#")
    assert predicted.shape[0] == 30 and np.all(np.isfinite(predicted.filter(like="out:").to_numpy()))
    limits = tmp_path / "limits.toml"
    limits.write_text("[inputs.site]\namplitude_min_ua = -5.0\namplitude_max_ua = 5.0\n")
    assert main(["plan", str(model), "--target", "a=0.5", "--limits", str(limits), "--horizon-steps", "10",
                 "--out", str(tmp_path / "plan")]) == 0
    plan = pd.read_csv(tmp_path / "plan" / "plan.csv", comment="#")
    assert np.all(np.abs(plan["in:site [uA]"]) <= 5.0 + 1e-9)
    capsys.readouterr()


def test_a_registered_method_takes_part_in_the_benchmark(registered, session):
    settings = BenchSettings.quick(methods=(MethodSpec("indirect", "arx"), MethodSpec("direct", "toy")),
                                   past_steps=2, horizon_steps=5, train_trials=(), noise_scales=())
    result = run_bench(session, settings, n_workers=1, progress=False)
    tables = result.tables()
    fits = tables["fits"]
    assert set(fits["method"]) == {"arx", "toy"} and (fits["status"] == "ok").all()
    toy = tables["prediction"].query("method == 'toy'")
    assert len(toy) and np.all(np.isfinite(toy["r2"]))
