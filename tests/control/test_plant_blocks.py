"""The network plants' recording model computed a block at a time gives, bit for bit, the numbers of the model
computed one sample at a time (the reference below, written plainly from the model's equations in
stimsteer.control.plants; common practice, no source): the demo's golden numbers and every seeded session depend on
that stream of numbers."""

import numpy as np
import pytest

from stimsteer.control import network_plant
from stimsteer.control.plants import LinearNetworkPlant, SaturatingRateNetworkPlant, random_network, record_session

_NOISE = dict(process_noise_std=0.05, measurement_noise_std=[0.1, 0.2, 0.3], drift_amplitude=[0.5, 0.0, 1.0],
              drift_period_s=3.0, drift_step_std=0.02, artifact_gain=0.7, artifact_decay_s=0.02, sample_rate_hz=100.0)


def _reference(plant, u, seed, rest_at=()):
    """The outputs and states of ``plant`` under ``u`` (n, m) from rest, one sample at a time."""
    n_states, p = plant.n_states, plant.n_outputs
    gens = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(4)]
    chunk = network_plant._CHUNK

    def stream(gen, dim, scale):  # rows drawn a chunk at a time, scaled per element after the draw
        while True:
            buf = gen.standard_normal((chunk, dim))
            if scale is not None:
                buf *= scale
            yield from buf

    proc = stream(gens[0], n_states, plant.process_noise_std)
    meas = stream(gens[1], p, plant.measurement_noise_std)
    walk_steps = stream(gens[2], p, None)
    phase = gens[3].uniform(0.0, 2.0 * np.pi, p)
    omega = 2.0 * np.pi / (plant.drift_period_s * plant.sample_rate_hz)
    decay = float(np.exp(-1.0 / (plant.artifact_decay_s * plant.sample_rate_hz)))
    x, walk, art, prev = plant.rest_state(), np.zeros(p), np.zeros(plant.n_inputs), np.zeros(plant.n_inputs)
    Y, X = np.empty((len(u), p)), [x.copy()]
    for k, uk in enumerate(np.asarray(u, np.float64)):
        if k in rest_at:
            x = plant.rest_state()
        y = plant.C @ x + plant.D @ uk
        y += next(meas)
        y += plant.drift_amplitude * np.sin(omega * k + phase)
        y += walk
        walk += plant.drift_step_std * next(walk_steps)
        art *= decay
        onset = (uk != 0.0) & (prev == 0.0)
        art[onset] += uk[onset]
        y += plant.artifact_gain @ art
        if isinstance(plant, SaturatingRateNetworkPlant):
            x = (1.0 - plant.leak) * x + plant.leak * np.tanh(plant.W @ x + plant.B @ uk + plant.bias)
        else:
            x = plant.A @ x + plant.B @ uk
        x += next(proc)
        Y[k], prev = y, uk
        X.append(x.copy())
    return Y, np.array(X)


@pytest.fixture(scope="module")
def plants():
    rng = np.random.default_rng(4)
    A, B, C = random_network(6, density=0.5, seed=4), rng.standard_normal((6, 2)), rng.standard_normal((3, 6))
    D = np.array([[0.1, 0.0], [0.0, 0.0], [0.2, -0.1]])
    return (LinearNetworkPlant(A, B, C, **_NOISE, seed=11),
            LinearNetworkPlant(A, B, C, D, **_NOISE, seed=12),
            SaturatingRateNetworkPlant(A, B, C, leak=0.3, bias=np.full(6, 0.1), **_NOISE, seed=13))


def _schedule(n, seed=0):
    """Pulses switching on and off (artifact onsets), negative amplitudes and -0.0 among them."""
    rng = np.random.default_rng(seed)
    u = rng.uniform(-3.0, 5.0, (n, 2)) * (rng.random((n, 2)) < 0.4)
    u[5, 0] = -0.0
    return u


@pytest.mark.parametrize("which", [0, 1, 2])
def test_step_simulate_and_record_give_the_reference_bit_for_bit(plants, which):
    plant = plants[which]
    u = _schedule(3 * network_plant._CHUNK + 37)  # over several noise blocks, the last one partly used
    Y, X = _reference(plant, u, plant.seed)
    plant.reset()
    stepped = np.array([plant.step(row) for row in u])
    y_sim, x_sim = plant.simulate(u, return_states=True)
    rec = record_session(plant, u)
    for got in (stepped, y_sim, rec.y):
        assert np.array_equal(got, Y)
    assert np.array_equal(x_sim, X)


def test_a_recording_with_rests_and_a_run_continued_sample_by_sample(plants):
    plant = plants[2]
    u = _schedule(700, seed=1)
    trials = [[0, 200], [250, 600], [600, 700]]
    Y, _ = _reference(plant, u, 5, rest_at={0, 250, 600})
    rec = record_session(plant, u, trials=trials, trial_start="rest", seed=5)
    assert np.array_equal(rec.y, Y)
    # stream, walk, artifact and last input carry on from a whole-schedule run into single steps
    Y, X = _reference(plant, u, 9)
    record_session(plant, u[:300], seed=9)
    assert np.array_equal([plant.step(row) for row in u[300:]], Y[300:])
    assert np.array_equal(plant.state, X[-1])


def test_a_generator_seed_and_noise_switched_off(plants):
    plant = plants[0].with_params(measurement_noise_std=0.0, drift_amplitude=0.0)
    u = _schedule(300, seed=2)
    y = plant.simulate(u, seed=np.random.default_rng(3))
    plant.reset(seed=np.random.default_rng(3))
    assert np.array_equal(y, [plant.step(row) for row in u])
    assert plant.simulate(np.zeros((0, 2))).shape == (0, 3)


def test_a_plant_with_a_step_of_its_own_is_recorded_through_it(plants):
    class Clipped(LinearNetworkPlant):
        def step(self, u_k):
            return np.minimum(super().step(u_k), 0.5)

    plant = Clipped(**plants[0].get_params())
    u = _schedule(300, seed=4)
    y = np.minimum(_reference(plants[0], u, plant.seed)[0], 0.5)
    assert np.array_equal(record_session(plant, u).y, y) and np.array_equal(plant.simulate(u), y)
