"""Shared fixtures of the command-line fault tests: run `stimsteer` as a user does, hash inputs, find leftovers.

Every test here runs the installed command in a child process (never `main()` in-process), so what is checked is
what a user or a script sees: the exit code, stdout, stderr, and the files left on disk.
"""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

from stimsteer.demo_data import demo_file


def stimsteer_command() -> list[str]:
    """The command a user runs: the venv's `stimsteer` script, else `python -m stimsteer.control.cli`."""
    script = Path(sys.executable).with_name("stimsteer")
    if script.is_file() and os.access(script, os.X_OK):
        return [str(script)]
    return [sys.executable, "-m", "stimsteer.control.cli"]


def cli_env() -> dict:
    """The user's environment without a debug switch (which would show tracebacks), one thread per process."""
    env = {k: v for k, v in os.environ.items() if k != "STIMSTEER_DEBUG"}
    env.update(OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1", PYTHONUNBUFFERED="1",
               MPLBACKEND="Agg")
    return env


@dataclass
class Run:
    """What one command run left: exit code, the two streams, and its wall time."""

    argv: list
    code: int
    out: str
    err: str
    seconds: float

    def __str__(self):  # shown by a failing assert: the command and what it printed
        return (f"$ stimsteer {' '.join(map(str, self.argv))}\n-> exit {self.code} in {self.seconds:.1f} s\n"
                f"--- stderr ---\n{self.err}--- stdout (tail) ---\n{self.out[-1500:]}")


def run_cli(*argv, cwd=None, timeout=120) -> Run:
    """Run `stimsteer ARGV...` to its end (killed after ``timeout`` seconds: a hang is a failure too)."""
    argv = [str(a) for a in argv]
    start = time.monotonic()
    try:
        proc = subprocess.run(stimsteer_command() + argv, cwd=cwd, env=cli_env(), capture_output=True, text=True,
                              timeout=timeout)
    except subprocess.TimeoutExpired as exc:
        out = exc.stdout.decode() if isinstance(exc.stdout, bytes) else (exc.stdout or "")
        err = exc.stderr.decode() if isinstance(exc.stderr, bytes) else (exc.stderr or "")
        return Run(argv, -999, out, err + f"[test harness: killed after {timeout} s]\n", time.monotonic() - start)
    return Run(argv, proc.returncode, proc.stdout, proc.stderr, time.monotonic() - start)


def start_cli(*argv, cwd=None, **popen) -> subprocess.Popen:
    """Start `stimsteer ARGV...` without waiting (for races and signals)."""
    popen.setdefault("stdout", subprocess.PIPE)  # pass files instead when children may outlive the command:
    popen.setdefault("stderr", subprocess.PIPE)  # a pipe they hold open would block communicate()
    return subprocess.Popen(stimsteer_command() + [str(a) for a in argv], cwd=cwd, env=cli_env(), text=True,
                            **popen)


def tree_hash(*paths) -> dict:
    """sha256 of every file under the given files or folders (missing paths map to None)."""
    digest = {}
    for path in map(Path, paths):
        if not path.exists():
            digest[str(path)] = None
            continue
        for item in sorted([path] if path.is_file() else path.rglob("*")):
            if item.is_file():
                digest[str(item)] = hashlib.sha256(item.read_bytes()).hexdigest()
    return digest


def leftovers(out) -> list[str]:
    """Hidden entries `.<name>.*` beside ``out``: temporary files, folders or claims a run left behind."""
    out = Path(out)
    if not out.parent.is_dir():
        return []
    return sorted(p.name for p in out.parent.iterdir() if p.name.startswith(f".{out.name}."))


def assert_one_clean_error_line(run: Run, code: int = 2):
    """The documented refusal: exit ``code``, exactly one line on stderr, no traceback anywhere."""
    assert "Traceback" not in run.err and "Traceback" not in run.out, str(run)
    assert run.code == code, str(run)
    lines = run.err.splitlines()
    assert len(lines) == 1 and run.err.endswith("\n"), str(run)
    assert lines[0].startswith("stimsteer"), str(run)
    return lines[0]


# ---------------------------------------------------------------------------------------------------- data
def small_session(seed: int = 7, n_trials: int = 8, length: int = 120, *, scale: float = 1.0):
    """A small simulated session with the demo's input names (3 sites in uA, 2 outputs in uV)."""
    from stimsteer.control.plants import LinearNetworkPlant, record_session

    rng = np.random.default_rng(seed)
    A = rng.standard_normal((3, 3))
    A *= 0.7 / np.max(np.abs(np.linalg.eigvals(A)))
    plant = LinearNetworkPlant(A, rng.standard_normal((3, 3)), rng.standard_normal((2, 3)), process_noise_std=0.02,
                               measurement_noise_std=0.05, sample_rate_hz=100.0,
                               input_names=("stim_a", "stim_b", "stim_c"), output_names=("ch_1", "ch_2"), seed=seed)
    u = scale * rng.uniform(-1.0, 1.0, (n_trials * length, 3))
    session = record_session(plant, u, trials=[(i * length, (i + 1) * length) for i in range(n_trials)])
    return session, plant


@pytest.fixture(scope="module")
def shipped(tmp_path_factory):
    """A module's read-only input folder: copies of the shipped demo files, a small session, and fitted models of
    both routes (each fitted once per module, through the command line)."""
    from stimsteer.control.plants import save_plant
    from stimsteer.sysid import save_session

    d = tmp_path_factory.mktemp("inputs")
    files = {}
    for name in ("demo_session.h5", "demo_plant.h5", "demo_limits.toml"):
        files[name.split(".")[0].replace("demo_", "")] = Path(shutil.copy(demo_file(name), d / name))
    session, plant = small_session()
    files["small"] = Path(save_session(session, d / "small.h5"))
    files["small_plant"] = Path(save_plant(plant, d / "small_plant.h5"))
    for route, method in (("indirect", "arx"), ("direct", "lsq")):
        out = d / f"{method}.h5"
        run = run_cli("fit", files["session"], "--route", route, "--method", method, "--past-steps", 4,
                      "--horizon-steps", 10, "--out", out)
        assert run.code == 0, str(run)
        files[method] = out
    files["dir"] = d
    return files
