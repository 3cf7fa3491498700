"""Regenerate the shipped demo session and its ground-truth plant: an invented, simulated scenario.

    python demo_data/make_demo.py                          # rewrites demo_data/demo_session.h5 and demo_plant.h5
    python demo_data/make_demo.py --out /tmp/demo          # the same files somewhere else
    python demo_data/make_demo.py --plant saturating --out /tmp/demo_sat   # the nonlinear variant (not shipped)

Everything is drawn from one seed (``DEMO_SEED``), so the same seed gives the same arrays. The scenario is described
in ``demo_data/README.md``; no real recording is involved.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from stimsteer.control.plants import (
    LinearNetworkPlant,
    SaturatingRateNetworkPlant,
    random_network,
    record_session,
    save_plant,
)
from stimsteer.sysid.exceptions import StimsteerError
from stimsteer.sysid.io import save_session

__all__ = ["DEMO_SEED", "Scenario", "SCENARIO", "build_plant", "build_schedule", "make_demo", "write_demo", "main"]

DEMO_SEED = 20240917
HERE = Path(__file__).resolve().parent
SESSION_FILE = "demo_session.h5"
PLANT_FILE = "demo_plant.h5"


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
    max_pulse_ua: float = 40.0
    prbs_level_ua: tuple = (10.0, 30.0)
    pulse_gap_s: tuple = (0.04, 0.24)
    pulse_width_samples: tuple = (1, 3)
    prbs_hold_samples: tuple = (1, 6)
    segment_s: tuple = (0.4, 1.2)
    prbs_share: float = 0.4  # probability that a stimulation segment is pseudo-random binary instead of pulses
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


def _pulses(rng, n: int, sc: Scenario) -> np.ndarray:
    fs, u = sc.sample_rate_hz, np.zeros(n)
    gap = (int(round(sc.pulse_gap_s[0] * fs)), int(round(sc.pulse_gap_s[1] * fs)))
    k = int(rng.integers(0, gap[1]))
    while k < n:
        width = int(rng.integers(sc.pulse_width_samples[0], sc.pulse_width_samples[1] + 1))
        u[k:k + width] = rng.uniform(-sc.max_pulse_ua, sc.max_pulse_ua)
        k += width + int(rng.integers(gap[0], gap[1] + 1))
    return u


def _prbs(rng, n: int, sc: Scenario) -> np.ndarray:
    level, u, k = rng.uniform(*sc.prbs_level_ua), np.empty(n), 0
    while k < n:
        hold = int(rng.integers(sc.prbs_hold_samples[0], sc.prbs_hold_samples[1] + 1))
        u[k:k + hold] = level * rng.choice((-1.0, 1.0))
        k += hold
    return u


def _trial_input(rng, sc: Scenario) -> np.ndarray:
    fs = sc.sample_rate_hz
    n, k = int(round(sc.trial_s * fs)), int(round(sc.baseline_s * fs))
    u = np.zeros((n, sc.n_sites))
    while k < n:
        length = min(int(round(rng.uniform(*sc.segment_s) * fs)), n - k)
        make = _prbs if rng.random() < sc.prbs_share else _pulses
        for j in range(sc.n_sites):
            u[k:k + length, j] = make(rng, length, sc)
        k += length
    return u


def build_schedule(seed: int = DEMO_SEED, *, scenario: Scenario = SCENARIO) -> tuple[np.ndarray, np.ndarray]:
    """The stimulation schedule (µA) and the trials ``[start, stop)``: rest, trial, rest, trial, ...

    Each trial opens with an unstimulated baseline, then runs segments of random length that are either pulses
    (random amplitude within ±``max_pulse_ua``, random width and interval per site) or pseudo-random binary
    sequences (a random level per site, random sign every few samples).
    """
    sc = scenario
    rng = np.random.default_rng(_streams(seed)["schedule"])
    rest = np.zeros((int(round(sc.rest_s * sc.sample_rate_hz)), sc.n_sites))
    parts, trials, t = [], [], 0
    for _ in range(sc.n_trials):
        trial = _trial_input(rng, sc)
        parts += [rest, trial]
        trials.append((t + rest.shape[0], t + rest.shape[0] + trial.shape[0]))
        t += rest.shape[0] + trial.shape[0]
    return np.concatenate(parts), np.array(trials, dtype=np.int64)


def make_demo(seed: int = DEMO_SEED, *, kind: str = "linear", scenario: Scenario = SCENARIO):
    """The demo session and its ground-truth plant, built in memory (nothing written).

    Returns
    -------
    session : stimsteer.sysid.Session
    plant : LinearNetworkPlant or SaturatingRateNetworkPlant
    """
    plant = build_plant(seed, kind=kind, scenario=scenario)
    u, trials = build_schedule(seed, scenario=scenario)
    meta = {"scenario": "invented simulated network (stimsteer demo)", "generator": "demo_data/make_demo.py",
            "demo_seed": int(seed), "plant_kind": kind, "settings": _jsonable(asdict(scenario))}
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
