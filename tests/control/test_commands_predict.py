"""The ``stimsteer predict`` file workflow: prediction.csv in the session table syntax, prediction.png, atomic folder."""

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.commands.predict import prediction_table, write_prediction
from stimsteer.control.figures.predict import prediction_figure
from stimsteer.sysid import Session, StateSpaceModel, fit_route, load_pattern, predict_pattern
from stimsteer.sysid.exceptions import StimsteerError

TRUE = StateSpaceModel(A=[[0.8, 0.3], [0.0, 0.5]], B=[[0.0, 0.5], [1.0, 0.0]], C=[[1.0, 0.5]])


@pytest.fixture
def prediction(rng, tmp_path):
    n_trials, length = 6, 200
    u = rng.standard_normal((n_trials * length, 2))
    y = np.concatenate([TRUE.simulate(u[i * length:(i + 1) * length]) for i in range(n_trials)])
    sess = Session(u=u, y=y + 0.02 * rng.standard_normal(y.shape), sample_rate_hz=500.0,
                   trials=[(i * length, (i + 1) * length) for i in range(n_trials)], input_names=["site_a", "site_b"],
                   input_units=["uA", "uA"], output_names=["lfp"], output_units=["mV"])
    fitted = fit_route(sess, route="indirect", method="arx", settings={"past_steps": 3, "alphas": [1e-6, 1e-3]},
                       seed=5, horizon_steps=4)
    path = tmp_path / "p.csv"
    rows = [f"{k / 500.0!r},{1.0 if 10 <= k < 20 else 0.0},0.0" for k in range(40)]
    path.write_text("\n".join(["time [s],in:site_a [uA],in:site_b [uA]", *rows]) + "\n")
    return predict_pattern(fitted.predictor, fitted.provenance, load_pattern(path))


def test_write_prediction(prediction, tmp_path):
    files = write_prediction(prediction, tmp_path / "out")
    table = pd.read_csv(files["csv"])
    assert list(table.columns) == ["time [s] @ 500 Hz", "in:site_a [uA]", "in:site_b [uA]", "out:lfp [mV]",
                                   "rmse:lfp [mV]"]
    np.testing.assert_allclose(table["out:lfp [mV]"], prediction.y[:, 0], rtol=1e-9)
    assert files["png"].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(StimsteerError, match="already holds files"):
        write_prediction(prediction, tmp_path / "out")
    write_prediction(prediction, tmp_path / "out", force=True)


def test_the_table_and_the_figure_are_objects(prediction):
    table = prediction_table(prediction)
    np.testing.assert_array_equal(table["rmse:lfp [mV]"], prediction.band[:, 0])
    fig = prediction_figure(prediction)
    assert len(fig.axes) == 2 and fig.axes[-1].get_xlabel() == "time [s]"
