"""Regenerate the shipped demo session and its ground-truth plant: an invented, simulated scenario.

    python demo_data/make_demo.py                          # rewrites demo_data/demo_session.h5 and demo_plant.h5
    python demo_data/make_demo.py --out /tmp/demo          # the same files somewhere else
    python demo_data/make_demo.py --plant saturating --out /tmp/demo_sat   # the nonlinear variant (not shipped)

Everything is drawn from one seed (``DEMO_SEED``), so the same seed gives the same arrays. The scenario is described
in ``demo_data/README.md``; no real recording is involved.
"""

from __future__ import annotations

import argparse
import math
import sys
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from stimsteer.control.plants import (
    LinearNetworkPlant,
    SaturatingRateNetworkPlant,
    random_network,
    record_session,
    save_plant,
)
from stimsteer.sysid.exceptions import StimsteerError
from stimsteer.sysid.io import save_session
from stimsteer.sysid.stimulation import (PULSE_TABLE_COLUMNS, InputMapping, encode_pulse_table, load_stimulation,
                                         pulse_table_record)

__all__ = ["DEMO_SEED", "Scenario", "SCENARIO", "build_plant", "build_pulses", "build_schedule", "demo_mapping",
           "make_demo", "write_demo", "main"]

DEMO_SEED = 20240917
HERE = Path(__file__).resolve().parent
SESSION_FILE = "demo_session.h5"
PLANT_FILE = "demo_plant.h5"
STIMULATION_FILE = "demo_stimulation.toml"


@dataclass(frozen=True)
class Scenario:
    """The invented recording set-up; every number is a choice of this demo, not a measurement."""

    rhythm_hz: tuple = (4.0, 8.0, 14.0, 24.0, 40.0)  # one excitatory-inhibitory node pair per rhythm
    rhythm_jitter: float = 0.1  # each pair's frequency is drawn within ±10 % of its rhythm
    pole_radius_range: tuple = (0.85, 0.93)  # per-sample damping of each pair
    n_sites: int = 3
    n_contacts: int = 8
    sample_rate_hz: float = 250.0
    n_trials: int = 24
    trial_s: float = 3.0
    rest_s: float = 0.5  # between trials (and before the first), zero stimulation, outside every trial
    baseline_s: float = 0.2  # unstimulated start of each trial
    coupling_density: float = 0.3
    coupling_scale: float = 0.06  # max pole radius + coupling_scale < 1 keeps sigma_max(A) < 1
    drive_per_ua: float = 0.01  # node units per µA
    contact_gain_uv: float = 12.0  # µV per node unit
    # the delivered trains (their fixed width, waveform and frequency are in demo_stimulation.toml)
    amplitude_max_ua: tuple = (40.0, 40.0, 30.0)  # largest pulse amplitude per site (stim_c's material allows 33.3)
    amplitude_step_ua: float = 0.1  # the stimulator's amplitude resolution
    burst_min_ua: float = 5.0  # bursts: amplitude uniform in [burst_min_ua, the site's largest]
    burst_pulses: tuple = (1, 3)  # pulses per burst
    burst_gap_s: tuple = (0.04, 0.24)  # silence between bursts
    modulated_low_fraction: tuple = (0.1, 0.4)  # modulated trains: a low level, 10-40 % of the site's largest ...
    modulated_high_fraction: tuple = (0.6, 1.0)  # ... and a high level, 60-100 %, ...
    modulated_hold_pulses: tuple = (1, 6)  # ... one of the two chosen at random every 1-6 pulses
    segment_s: tuple = (0.4, 1.2)
    modulated_share: float = 0.4  # probability that a stimulation segment is a modulated train instead of bursts
    process_noise_std: float = 0.02  # node units
    measurement_noise_std_uv: float = 3.0
    drift_amplitude_uv: float = 2.0
    drift_period_s: float = 40.0
    drift_step_std_uv: float = 0.005
    artifact_gain_uv_per_ua: float = 1.5
    artifact_decay_s: float = 0.008
    output_resolution_uv: float = 0.05
    saturating_leak: float = 0.5


    @property
    def n_nodes(self) -> int:
        return 2 * len(self.rhythm_hz)


SCENARIO = Scenario()


def _streams(seed: int) -> dict:
    names = ("network", "drive", "schedule", "noise")
    return dict(zip(names, np.random.SeedSequence(seed).spawn(len(names))))


def _names(sc: Scenario) -> tuple[tuple, tuple]:
    sites = tuple(f"stim_{chr(ord('a') + j)}" for j in range(sc.n_sites))
    contacts = tuple(f"rec_{i + 1:02d}" for i in range(sc.n_contacts))
    return sites, contacts


def build_plant(seed: int = DEMO_SEED, *, kind: str = "linear", scenario: Scenario = SCENARIO):
    """The ground-truth plant of the demo: a linear network (shipped) or its saturating variant.

    The saturating variant uses ``W = (A − (1 − leak) I) / leak`` and ``B / leak``, so its linearisation at rest
    is exactly the linear plant.
    """
    sc, ss = scenario, _streams(seed)
    net_rng, drive_rng = np.random.default_rng(ss["network"]), np.random.default_rng(ss["drive"])
    A = _rhythms(net_rng, sc) + random_network(sc.n_nodes, density=sc.coupling_density, seed=net_rng,
                                               scale=sc.coupling_scale)
    B = sc.drive_per_ua * drive_rng.standard_normal((sc.n_nodes, sc.n_sites))
    C = sc.contact_gain_uv * drive_rng.standard_normal((sc.n_contacts, sc.n_nodes))
    G = sc.artifact_gain_uv_per_ua * drive_rng.uniform(0.2, 1.0, (sc.n_contacts, sc.n_sites))
    sites, contacts = _names(sc)
    common = dict(process_noise_std=sc.process_noise_std, measurement_noise_std=sc.measurement_noise_std_uv,
                  drift_amplitude=sc.drift_amplitude_uv, drift_period_s=sc.drift_period_s,
                  drift_step_std=sc.drift_step_std_uv, artifact_gain=G, artifact_decay_s=sc.artifact_decay_s,
                  sample_rate_hz=sc.sample_rate_hz, input_names=sites, output_names=contacts,
                  seed=int(ss["noise"].generate_state(1)[0]))
    if kind == "linear":
        return LinearNetworkPlant(A, B, C, **common)
    if kind == "saturating":
        leak = sc.saturating_leak
        W = (A - (1.0 - leak) * np.eye(sc.n_nodes)) / leak
        return SaturatingRateNetworkPlant(W, B / leak, C, leak=leak, **common)
    raise StimsteerError(f"kind must be 'linear' or 'saturating'; got {kind!r}.")


def _rhythms(rng, sc: Scenario) -> np.ndarray:
    """Block-diagonal dynamics of the node pairs: a damped rotation ``r [[cos θ, −sin θ], [sin θ, cos θ]]`` each.

    A pair's poles are ``r e^{±iθ}`` with ``θ = 2π f / sample_rate_hz``, and each block has ``σ_max = r``.
    """
    A = np.zeros((sc.n_nodes, sc.n_nodes))
    for i, f in enumerate(sc.rhythm_hz):
        r = rng.uniform(*sc.pole_radius_range)
        theta = 2.0 * np.pi * f / sc.sample_rate_hz * rng.uniform(1 - sc.rhythm_jitter, 1 + sc.rhythm_jitter)
        A[2 * i:2 * i + 2, 2 * i:2 * i + 2] = r * np.array([[np.cos(theta), -np.sin(theta)],
                                                          [np.sin(theta), np.cos(theta)]])
    return A


def demo_mapping(scenario: Scenario = SCENARIO) -> InputMapping:
    """The declared mapping of the demo's sites (``demo_stimulation.toml``) on the scenario's grid."""
    mapping = InputMapping(load_stimulation(HERE / STIMULATION_FILE), scenario.sample_rate_hz)
    sites, _ = _names(scenario)
    if tuple(mapping.description.names) != sites:
        raise StimsteerError(f"{STIMULATION_FILE} must describe the sites {list(sites)} in that order; it describes "
                             f"{list(mapping.description.names)}.")
    return mapping


def _quantised(a: np.ndarray, step: float) -> np.ndarray:
    """Amplitudes on the stimulator's resolution (rounded again so they print as short decimals)."""
    return np.round(np.round(a / step) * step, 6)


def _bursts(rng, n: int, top: float, sc: Scenario, f: float) -> np.ndarray:
    """Short bursts of pulses of one random amplitude each, separated by random silences (pulse slots at ``f``)."""
    a, gap = np.zeros(n), (int(round(sc.burst_gap_s[0] * f)), int(round(sc.burst_gap_s[1] * f)))
    k = int(rng.integers(0, gap[1]))
    while k < n:
        count = int(rng.integers(sc.burst_pulses[0], sc.burst_pulses[1] + 1))
        a[k:k + count] = rng.uniform(sc.burst_min_ua, top)
        k += count + int(rng.integers(gap[0], gap[1] + 1))
    return a


def _modulated(rng, n: int, top: float, sc: Scenario) -> np.ndarray:
    """A train on throughout: its amplitude switched at random between a low and a high level every few pulses."""
    low, high = (rng.uniform(*sc.modulated_low_fraction) * top, rng.uniform(*sc.modulated_high_fraction) * top)
    a, k = np.empty(n), 0
    while k < n:
        hold = int(rng.integers(sc.modulated_hold_pulses[0], sc.modulated_hold_pulses[1] + 1))
        a[k:k + hold] = high if rng.integers(0, 2) else low
        k += hold
    return a


def _trial_pulses(rng, sc: Scenario, mapping: InputMapping, t0: float) -> list:
    """The pulses of one trial starting at ``t0`` s: a baseline, then segments of bursts or modulated trains."""
    slots = [np.zeros(int(round(sc.trial_s * s.frequency_hz))) for s in mapping.sites]
    t = sc.baseline_s
    while t < sc.trial_s - 1e-9:
        stop = min(t + rng.uniform(*sc.segment_s), sc.trial_s)
        modulated = rng.random() < sc.modulated_share
        for j, site in enumerate(mapping.sites):
            f = site.frequency_hz
            a, b = int(math.ceil(t * f - 1e-9)), int(math.ceil(stop * f - 1e-9))
            top = sc.amplitude_max_ua[j]
            slots[j][a:b] = _modulated(rng, b - a, top, sc) if modulated else _bursts(rng, b - a, top, sc, f)
        t = stop
    rows = []
    for j, site in enumerate(mapping.sites):
        amp = _quantised(slots[j], sc.amplitude_step_ua)
        for k in np.flatnonzero(amp > 0):
            rows.append((t0 + k / site.frequency_hz, site.name, float(amp[k]), site.phase_width_us,
                         float(amp[k]) * site.second_phase_ratio, site.leading_phase))
    return rows


def build_pulses(seed: int = DEMO_SEED, *, scenario: Scenario = SCENARIO) -> tuple[pd.DataFrame, np.ndarray, int]:
    """What the simulated stimulator delivered: one row per charge-balanced biphasic pulse.

    Rest, trial, rest, trial, ...: each trial opens with an unstimulated baseline, then runs segments of random
    length. Per segment every site either fires *bursts* (1-3 pulses of one random amplitude, random silences) or a
    *modulated train* (on throughout, its amplitude switched at random between a low and a high level every few
    pulses). The amplitude is a magnitude on the
    stimulator's resolution; polarity is the site's leading phase. Pulse onsets are on the stimulator's clock,
    which is the recording's (t = 0 at sample 0).

    Returns
    -------
    pulses : pandas.DataFrame
        Columns :data:`PULSE_TABLE_COLUMNS` (``amplitude`` and ``second_phase_amplitude`` in µA).
    trials : ndarray, shape (n_trials, 2)
        Half-open sample ranges of the trials.
    n_samples : int
        Length of the recording in samples.
    """
    sc, mapping = scenario, demo_mapping(scenario)
    rng = np.random.default_rng(_streams(seed)["schedule"])
    fs = sc.sample_rate_hz
    rest, n_trial = int(round(sc.rest_s * fs)), int(round(sc.trial_s * fs))
    rows, trials, k = [], [], 0
    for _ in range(sc.n_trials):
        trials.append((k + rest, k + rest + n_trial))
        rows += _trial_pulses(rng, sc, mapping, (k + rest) / fs)
        k += rest + n_trial
    frame = pd.DataFrame(rows, columns=list(PULSE_TABLE_COLUMNS))
    frame = frame.sort_values(["time_s", "site"], kind="stable").reset_index(drop=True)
    return frame, np.array(trials, dtype=np.int64), k


def build_schedule(seed: int = DEMO_SEED, *, scenario: Scenario = SCENARIO) -> tuple[np.ndarray, np.ndarray]:
    """The model inputs (µA) and the trials ``[start, stop)``: the pulses of :func:`build_pulses` encoded onto the
    grid by the declared mapping of ``demo_stimulation.toml`` (each pulse's amplitude on the samples it holds)."""
    pulses, trials, n = build_pulses(seed, scenario=scenario)
    u, _ = encode_pulse_table(pulses, demo_mapping(scenario), n_samples=n)
    return u, trials


def make_demo(seed: int = DEMO_SEED, *, kind: str = "linear", scenario: Scenario = SCENARIO):
    """The demo session and its ground-truth plant, built in memory (nothing written).

    The session's inputs are the recorded pulses (``metadata["pulses"]``) encoded by the declared mapping
    (``metadata["stimulation"]``); the plant is driven by those inputs.

    Returns
    -------
    session : stimsteer.sysid.Session
    plant : LinearNetworkPlant or SaturatingRateNetworkPlant
    """
    plant = build_plant(seed, kind=kind, scenario=scenario)
    pulses, trials, n = build_pulses(seed, scenario=scenario)
    u, mapping = encode_pulse_table(pulses, demo_mapping(scenario), n_samples=n)
    mapping = {**mapping, "description_file": STIMULATION_FILE,
               "encoded_from": "metadata['pulses'], the simulated stimulator's pulse table"}
    meta = {"scenario": "invented simulated network (stimsteer demo)", "generator": "demo_data/make_demo.py",
            "demo_seed": int(seed), "plant_kind": kind, "settings": _jsonable(asdict(scenario)),
            "pulses": pulse_table_record(pulses, units={"time_s": "s", "amplitude": "uA",
                                                        "phase_width_us": "us", "second_phase_amplitude": "uA"}),
            "pulse_mapping": mapping, "stimulation": mapping}
    session = record_session(plant, u, trials=trials, trial_start="continue",
                             output_resolution=scenario.output_resolution_uv, metadata=meta)
    return session, plant


def _jsonable(d: dict) -> dict:
    return {k: list(v) if isinstance(v, tuple) else v for k, v in d.items()}


def write_demo(out_dir=HERE, *, seed: int = DEMO_SEED, kind: str = "linear") -> tuple[Path, Path]:
    """Build the demo and write ``demo_session.h5`` and ``demo_plant.h5`` into ``out_dir`` (replacing them)."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    session, plant = make_demo(seed, kind=kind)
    session_path = save_session(session, out_dir / SESSION_FILE, overwrite=True,
                                 compression="gzip")  # small to ship
    plant_path = save_plant(plant, out_dir / PLANT_FILE, overwrite=True)
    return Path(session_path), Path(plant_path)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Regenerate the stimsteer demo session and its plant.")
    parser.add_argument("--out", default=str(HERE), help="output folder (default: this folder)")
    parser.add_argument("--seed", type=int, default=DEMO_SEED, help=f"master seed (default {DEMO_SEED})")
    parser.add_argument("--plant", choices=("linear", "saturating"), default="linear",
                        help="ground-truth plant: the linear network (shipped) or its saturating variant")
    args = parser.parse_args(argv)
    session_path, plant_path = write_demo(args.out, seed=args.seed, kind=args.plant)
    print(f"wrote {session_path} ({session_path.stat().st_size / 1e6:.2f} MB) and {plant_path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
