"""``stimsteer demo``: the whole job on the shipped (simulated) demo session, step by step.

Each step is one ``stimsteer`` subcommand, run exactly as a user would type it on their own data, and the demo
prints that command line before its output, so the demo doubles as a worked example of the command line. All
outputs go into one folder, written atomically: if any step fails, nothing of the run is left behind.

The steps are run by a step runner given by the caller (the command line passes its own ``main``), so this module
does not depend on the command line that runs it.
"""

from __future__ import annotations

import io
import json
import os
import sys
import time
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import numpy as np

from ..demo_data import demo_file
from ..sysid import StimsteerError, load_session
from ..sysid._files import atomic_dir
from ..sysid.caution import CAUTION
from .commands._common import Interrupted

__all__ = ["run_demo", "demo_steps", "DEMO_PATTERN_FILE"]

DEMO_PATTERN_FILE = "pattern.csv"

# The demo's choices (an invented scenario, see demo_data/README.md): a past window of 10 samples (40 ms at 250 Hz)
# and a horizon of 20 samples (80 ms), the target of the plans, and the test pattern below.
_PAST_STEPS = 10
_HORIZON_STEPS = 20
_PLAN_TARGET = "rec_01=15,rec_04=-10"
_NETWORK_TARGET = "15,0,0,-10,0,0,0,0"  # one value per recorded contact, µV



class DemoStepFailed(StimsteerError):
    """A step of the demo failed; it has already said why in its own one line on stderr."""

    def __init__(self, step: str, code: int):
        super().__init__(f"the demo step `stimsteer {step}` failed (exit code {code}).")
        self.step, self.code = step, int(code)

def _write_pattern(path: Path, sample_rate_hz: float, input_names, input_units) -> None:
    """A 1-second test pattern: a 40 µA pulse every 100 ms on the first site, a 2-sample 25 µA burst on the
    second half-way through, nothing on the others (the pattern layout of ``stimsteer predict``)."""
    n = int(round(sample_rate_hz))
    u = np.zeros((n, len(input_names)))
    u[::int(round(0.1 * sample_rate_hz)), 0] = 40.0
    if u.shape[1] > 1:
        u[n // 2:n // 2 + 2, 1] = 25.0
    header = [f"time [s] @ {sample_rate_hz:g} Hz"] + [f"in:{a} [{b}]" for a, b in zip(input_names, input_units)]
    rows = [",".join(header)] + [",".join([f"{k / sample_rate_hz:.6g}"] + [f"{v:g}" for v in row])
                                 for k, row in enumerate(u)]
    path.write_text("\n".join(rows) + "\n", encoding="utf-8")


def demo_steps(session: str, plant: str, limits: str, out: str) -> list[tuple[str, list[str]]]:
    """The demo's subcommands as ``(title, argv)`` pairs, with every path under ``out``."""
    o = Path(out)
    models = {"indirect": str(o / "models" / "indirect_subspace.h5"), "direct": str(o / "models" / "direct_hankel.h5")}
    window = ["--past-steps", str(_PAST_STEPS), "--horizon-steps", str(_HORIZON_STEPS)]
    steps = [
        ("check the session", ["inspect", session, *window]),
        ("indirect route: subspace identification", ["fit", session, "--route", "indirect", "--method", "subspace",
                                                     "--out", models["indirect"], *window]),
        ("direct route: regularised Hankel predictor", ["fit", session, "--route", "direct", "--method", "hankel",
                                                        "--out", models["direct"], *window]),
    ]
    for route, model in models.items():
        steps.append((f"predict a new pattern ({route} route)",
                      ["predict", model, "--pattern", str(o / "inputs" / DEMO_PATTERN_FILE),
                       "--out", str(o / f"predict_{route}")]))
    steps.append(("network-control figures of the fitted model",
                  ["network", models["indirect"], "--target", _NETWORK_TARGET, "--out", str(o / "network")]))
    for route, model in models.items():
        steps.append((f"plan stimulation under the declared limits ({route} route)",
                      ["plan", model, "--target", _PLAN_TARGET, "--limits", limits,
                       "--horizon-steps", str(_HORIZON_STEPS), "--out", str(o / f"plan_{route}")]))
    steps.append(("plan pulse trains a stimulator can take: limits in physical terms (indirect route)",
                  ["plan", models["indirect"], "--target", _PLAN_TARGET, "--limits",
                   str(demo_file("demo_physical_limits.toml")), "--stimulation",
                   str(demo_file("demo_stimulation.toml")), "--horizon-steps", str(_HORIZON_STEPS),
                   "--out", str(o / "plan_pulses")]))
    steps.append(("a schedule for the next session",
                  ["schedule", "--limits", limits, "--inputs", "3", *window, "--states", "12", "--rate-hz", "250",
                   "--trials", "24", "--trial-s", "3", "--rest-s", "0.5", "--out", str(o / "next_schedule.csv")]))
    steps.append(("benchmark both routes on held-out trials, closed loop on the ground-truth plant",
                  ["bench", session, "--plant", plant, "--limits", limits, *window, "--out", str(o / "report")]))
    return steps


class _Renamed:
    """A text stream that shows the final output folder where a step names the temporary one (errors, warnings)."""

    def __init__(self, stream, tmp: str, out: str):
        self._stream, self._tmp, self._out = stream, tmp, out

    def write(self, text: str) -> int:
        return self._stream.write(text.replace(self._tmp, self._out))

    def flush(self) -> None:
        self._stream.flush()

    def isatty(self) -> bool:  # a progress bar stays a progress bar
        return self._stream.isatty()

    def __getattr__(self, name):
        return getattr(self._stream, name)


def _final_paths(value, tmp: str, out: str):
    if isinstance(value, dict):
        return {k: _final_paths(v, tmp, out) for k, v in value.items()}
    if isinstance(value, list):
        return [_final_paths(v, tmp, out) for v in value]
    if isinstance(value, str) and (value == tmp or value.startswith(tmp + os.sep)):
        return out + value[len(tmp):]
    return value


def _record_final_paths(tmp: Path, out: Path) -> None:
    """Make the JSON records name the files where they will stay (``out/models/...``), not the temporary folder
    the steps wrote into (it is renamed to ``out`` when the demo ends)."""
    for path in sorted(tmp.rglob("*.json")):
        record = json.loads(path.read_text(encoding="utf-8"))
        fixed = _final_paths(record, str(tmp), str(out))
        if fixed != record:  # written as the plan command writes it
            path.write_text(json.dumps(fixed, indent=2, allow_nan=False), encoding="utf-8")


def run_demo(out, *, run_step, force: bool = False, echo=print) -> Path:
    """Run every demo step into the folder ``out`` and return the path of the HTML report.

    Parameters
    ----------
    out : str or Path
        Output folder, new or empty (replaced whole with ``force``).
    run_step : callable
        ``run_step(argv) -> int``: runs one ``stimsteer`` subcommand and returns its exit code
        (:func:`stimsteer.control.cli.main`).
    force : bool, default False
    echo : callable, default print
        Receives the demo's text, step by step.

    Raises
    ------
    StimsteerError
        ``out`` holds another run (without ``force``), or a step failed (its message is passed on).
    """
    session, plant, limits = (str(demo_file(n)) for n in ("demo_session.h5", "demo_plant.h5", "demo_limits.toml"))
    out = Path(out)
    demo = load_session(session)
    started = time.perf_counter()
    with atomic_dir(out, force=force) as tmp:
        (tmp / "inputs").mkdir()
        (tmp / "models").mkdir()
        _write_pattern(tmp / "inputs" / DEMO_PATTERN_FILE, demo.sample_rate_hz, demo.input_names, demo.input_units)
        steps = zip(demo_steps(session, plant, limits, str(tmp)), demo_steps(session, plant, limits, str(out)))
        for (title, argv), (_, shown_argv) in steps:
            echo(f"\n== {title}\n$ stimsteer {' '.join(shown_argv)}")
            text = io.StringIO()
            with redirect_stdout(text), redirect_stderr(_Renamed(sys.stderr, str(tmp), str(out))):
                code = run_step(argv)
            echo(text.getvalue().replace(str(tmp), str(out)).rstrip())
            if code in (130, 143):  # the step was interrupted (Ctrl-C, SIGTERM): so is the demo
                raise Interrupted(code - 128)
            if code != 0:
                raise DemoStepFailed(argv[0], code)
        _record_final_paths(tmp, out)
    report = out / "report" / "report.html"
    echo(f"\ndemo finished in {time.perf_counter() - started:.0f} s; outputs in {out}")
    echo(f"open the report: {report}")
    echo(CAUTION)
    return report
