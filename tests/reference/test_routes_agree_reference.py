"""Outside checks of the route benchmark (control/evaluation.py) on noise-free simulated data.

With an input that is persistently exciting (white noise) and past windows at least the system's lag, both routes
must predict the held-out outputs exactly and their closed loops must coincide with the one of the true model.
Tolerances are float64 rounding with margin for the solvers (common practice, no source): 1e-8 relative for
predictions, 1e-6 relative for closed-loop inputs (OSQP run at 1e-9 tolerances by control/mpc.py).
"""

import numpy as np
import pytest

from stimsteer.control.evaluation import BenchSettings, ControlSettings, MethodSpec, recorded_limits, run_bench
from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import ModelPredictiveController
from stimsteer.control.plants import LinearNetworkPlant, record_session

N_STATES, N_INPUTS, N_OUTPUTS, HORIZON = 3, 1, 2, 6


def _noise_free(rng):
    A = rng.standard_normal((N_STATES, N_STATES))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.standard_normal((N_STATES, N_INPUTS)), rng.standard_normal((N_OUTPUTS, N_STATES))
    ctrb = np.hstack([np.linalg.matrix_power(A, k) @ B for k in range(N_STATES)])
    obsv = np.vstack([C @ np.linalg.matrix_power(A, k) for k in range(N_STATES)])
    assert np.linalg.matrix_rank(ctrb) == N_STATES and np.linalg.matrix_rank(obsv) == N_STATES  # minimal
    plant = LinearNetworkPlant(A, B, C, sample_rate_hz=100.0)
    length, n_trials = 150, 8
    u = rng.standard_normal((length * n_trials, N_INPUTS))
    session = record_session(plant, u, trials=[(i * length, (i + 1) * length) for i in range(n_trials)])
    return session, plant


def _settings():
    # ARX with n lags is exact for an n-state system (Cayley-Hamilton; Ljung 1999, section 4.3); alpha = 0 is the
    # minimum-norm least-squares solution. The SPC ridge strength 1e-12 (relative) is negligible.
    methods = (MethodSpec("indirect", "arx", {"past_steps": N_STATES, "alphas": (0.0,), "fit_intercept": False}),
               MethodSpec("direct", "lsq", {"alphas": (1e-12,)}))
    return BenchSettings(methods=methods, past_steps=N_STATES, horizon_steps=HORIZON, n_splits=2,
                         control=ControlSettings(n_steps=40), train_trials=(), noise_scales=(), horizons=())


@pytest.fixture
def bench(rng):
    session, plant = _noise_free(rng)
    return session, plant, run_bench(session, _settings(), plant=plant, n_workers=1, progress=False)


# Willems J.C., Rapisarda P., Markovsky I., De Moor B.L.M. (2005), "A note on persistency of excitation", Systems &
# Control Letters 54:325 (the fundamental lemma) and Favoreel W., De Moor B., Gevers M. (1999), "SPC: Subspace
# predictive control", IFAC World Congress: from noise-free, exciting data the multi-step predictor is exact, as is
# the model identified from the same data; so held-out predictions equal the true outputs at every step.
def test_both_routes_predict_held_out_outputs_exactly(bench):
    session, _plant, result = bench
    assert result.failures.empty
    scale = session.y.std(axis=0).max()
    p = result.prediction
    assert set(p["label"]) == {"indirect (arx)", "direct (lsq)"}
    assert p["rmse"].max() < 1e-8 * scale
    assert (p["r2"] > 1 - 1e-12).all() and (p["vaf"] > 100 - 1e-10).all()
    tr = result.traces["prediction"]
    assert np.allclose(tr["predicted"].dropna(), tr.loc[tr["predicted"].notna(), "recorded"], atol=1e-8 * scale)


# Coulson J., Lygeros J., Dörfler F. (2019), "Data-enabled predictive control: in the shallows of the DeePC",
# European Control Conference, Theorem 5.1: with noise-free, exciting data the data-driven predictive controller has
# the same optimal inputs as model predictive control with the true model; the closed loops then coincide.
def test_closed_loops_of_both_routes_coincide_with_the_true_model(bench):
    session, plant, result = bench
    tr = result.traces["closed_loop"]

    def signal(label, kind):
        part = tr[(tr["label"] == label) & (tr["signal"] == kind)]
        return part.sort_values(["channel", "time_s"])["value"].to_numpy()

    u_ind, u_dir = signal("indirect (arx)", "input"), signal("direct (lsq)", "input")
    u_scale = max(np.abs(u_ind).max(), 1e-12)
    assert np.abs(u_ind).max() > 0.1  # the pulse target makes the controllers act
    assert np.allclose(u_ind, u_dir, atol=1e-6 * u_scale)
    y_scale = np.abs(signal("indirect (arx)", "output")).max()
    assert np.allclose(signal("indirect (arx)", "output"), signal("direct (lsq)", "output"), atol=1e-6 * y_scale)
    # the same run with the true model's controller (same limits, target and weights as the benchmark's)
    split = result.splits[0]
    train = session.select_trials(split.train)
    st = result.settings
    target = np.tile(train.y.mean(axis=0), (st.control.n_steps + HORIZON - 1, 1))
    a, b = (int(round(f * st.control.n_steps)) for f in st.control.pulse_fraction)
    target[a:b, 0] += st.control.target_level_std * train.y[:, 0].std()
    weight = np.array([1.0, st.control.other_output_weight])
    true = plant.to_state_space().replace(past_steps=N_STATES)
    ctrl = ModelPredictiveController(model=true, limits=recorded_limits(train), horizon_steps=HORIZON,
                                     output_weight=weight, input_weight=st.control.input_weight).fit()
    loop = run_closed_loop(ctrl, plant, n_steps=st.control.n_steps, target=target)
    assert np.allclose(np.asarray(loop.inputs).reshape(-1), u_ind, atol=1e-6 * u_scale)
