"""Generate an invented study: simulated subjects, each with its own network, recorded on several days.

    python demo_data/make_study.py --out /tmp/study                       # 12 subjects x 3 sessions
    python demo_data/make_study.py --out /tmp/same --identical            # every subject the same plant
    python demo_data/make_study.py --out /tmp/big --subjects 40 --trials 8

Layout written: ``OUT/<subject>/day<k>.h5`` (our HDF5 layout), which ``stimsteer study OUT`` reads as a study.

The scenario (every number a choice of this generator, not a measurement): a cohort network of ``n_nodes`` nodes
(:func:`~stimsteer.control.plants.random_network`, stable by construction), ``n_sites`` stimulation sites and
``n_channels`` recorded channels. Each subject's coupling, drive and mixing are the cohort's plus a seeded
subject-specific perturbation (``subject_spread``); each day adds a smaller perturbation of the drive
(``day_drift``) and a per-channel baseline offset (``offset_uv``), the session-level offset the study removes.
Inputs are seeded random pulse trains inside trials and zero in the rests between trials. ``identical=True``
gives every subject and day the same plant (only the noise and the schedule differ) for the outside check that
transfer across subjects then equals within-subject accuracy.
"""

from __future__ import annotations

import argparse
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from stimsteer.control.plants import LinearNetworkPlant, random_network, record_session
from stimsteer.sysid.exceptions import StimsteerError
from stimsteer.sysid.io import save_session

__all__ = ["StudyScenario", "STUDY_SEED", "make_study", "main"]

STUDY_SEED = 20261202


@dataclass(frozen=True)
class StudyScenario:
    """The invented cohort; defaults are small enough for the tests."""

    n_subjects: int = 12
    n_sessions: int = 3
    n_trials: int = 8
    trial_samples: int = 120
    rest_samples: int = 20
    n_nodes: int = 4
    n_sites: int = 3
    n_channels: int = 3
    sample_rate_hz: float = 100.0
    subject_spread: float = 0.25
    day_drift: float = 0.05
    offset_uv: float = 5.0
    noise_uv: float = 0.3
    process_noise: float = 0.05
    identical: bool = False


def _perturbed(rng, base: np.ndarray, spread: float) -> np.ndarray:
    return base * (1.0 + spread * rng.standard_normal(base.shape))


def _schedule(rng, sc: StudyScenario) -> tuple[np.ndarray, np.ndarray]:
    parts, trials, t = [], [], 0
    for _ in range(sc.n_trials):
        trial = np.where(rng.random((sc.trial_samples, sc.n_sites)) < 0.15,
                         rng.uniform(5.0, 20.0, (sc.trial_samples, sc.n_sites)), 0.0)
        parts += [np.zeros((sc.rest_samples, sc.n_sites)), trial]
        trials.append((t + sc.rest_samples, t + sc.rest_samples + sc.trial_samples))
        t += sc.rest_samples + sc.trial_samples
    return np.concatenate(parts), np.array(trials, dtype=np.int64)


def _cohort(sc: StudyScenario, seed: int) -> tuple:
    rng = np.random.default_rng([seed, 0])
    A = random_network(sc.n_nodes, density=0.5, seed=rng, scale=0.35, self_weight=0.55)
    B = rng.uniform(0.02, 0.08, (sc.n_nodes, sc.n_sites)) * np.linspace(1.5, 0.5, sc.n_sites)
    C = rng.normal(0.0, 10.0, (sc.n_channels, sc.n_nodes))
    return A, B, C


def _session(sc: StudyScenario, seed: int, subject: int, day: int, cohort: tuple):
    A, B, C = cohort
    if not sc.identical:
        rs = np.random.default_rng([seed, 1, subject])
        A = np.diag(np.diag(A)) + _perturbed(rs, A - np.diag(np.diag(A)), sc.subject_spread)
        B, C = _perturbed(rs, B, sc.subject_spread), _perturbed(rs, C, sc.subject_spread)
        B = _perturbed(np.random.default_rng([seed, 2, subject, day]), B, sc.day_drift)
    rd = np.random.default_rng([seed, 3, subject, day])
    offset = np.zeros(sc.n_channels) if sc.identical else rd.normal(0.0, sc.offset_uv, sc.n_channels)
    plant = LinearNetworkPlant(A, B, C, process_noise_std=sc.process_noise, measurement_noise_std=sc.noise_uv,
                               sample_rate_hz=sc.sample_rate_hz, seed=int(rd.integers(2 ** 31)),
                               input_names=[f"site{j + 1}" for j in range(sc.n_sites)],
                               output_names=[f"ch{i + 1}" for i in range(sc.n_channels)])
    u, trials = _schedule(rd, sc)
    s = record_session(plant, u, trials=trials, metadata={"subject": f"s{subject + 1:02d}", "day": day + 1})
    return s.replace(y=s.y + offset)


def make_study(out, scenario: StudyScenario = StudyScenario(), *, seed: int = STUDY_SEED) -> list:
    """Write the study's session files under ``out`` (``out/<subject>/day<k>.h5``); return their paths.

    Raises
    ------
    StimsteerError
        ``out`` already holds session files (a study is never overwritten in part).
    """
    out = Path(out)
    if out.exists() and any(out.rglob("*.h5")):
        raise StimsteerError(f"{out} already holds session files; choose a new --out.")
    cohort = _cohort(scenario, seed)
    paths = []
    for i in range(scenario.n_subjects):
        folder = out / f"s{i + 1:02d}"
        folder.mkdir(parents=True, exist_ok=True)
        for d in range(scenario.n_sessions):
            paths.append(save_session(_session(scenario, seed, i, d, cohort), folder / f"day{d + 1}.h5"))
    return paths


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description="Write an invented, simulated study (one folder per subject).")
    p.add_argument("--out", required=True)
    p.add_argument("--subjects", type=int, default=12)
    p.add_argument("--sessions", type=int, default=3)
    p.add_argument("--trials", type=int, default=8)
    p.add_argument("--identical", action="store_true", help="the same plant for every subject and day")
    p.add_argument("--seed", type=int, default=STUDY_SEED)
    a = p.parse_args(argv)
    sc = StudyScenario(n_subjects=a.subjects, n_sessions=a.sessions, n_trials=a.trials, identical=a.identical)
    try:
        paths = make_study(a.out, sc, seed=a.seed)
    except StimsteerError as exc:
        sys.stderr.write(f"make_study: error: {exc}\n")
        return 2
    print(f"wrote {len(paths)} sessions of {sc.n_subjects} subjects under {a.out}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
