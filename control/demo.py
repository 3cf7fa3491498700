"""``stimsteer demo``: the whole job on the shipped (simulated) demo session, step by step.

Each step is one ``stimsteer`` subcommand, run exactly as a user would type it on their own data, and the demo
prints that command line before its output, so the demo doubles as a worked example of the command line. All
outputs go into one folder, written atomically: if any step fails, nothing of the run is left behind.

The steps are run by a step runner given by the caller (the command line passes its own ``main``), so this module
does not depend on the command line that runs it.
"""

from __future__ import annotations

import importlib
import io
import json
import os
import sys
import time
from contextlib import contextmanager, redirect_stderr, redirect_stdout
from pathlib import Path

import numpy as np

from ..demo_data import demo_file
from ..sysid import StimsteerError, open_session_source
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
# the step that runs beside the others from the start (it reads only the shipped files and is the longest)
_BACKGROUND_STEP = "bench"
_STOP_WAIT_S = 20.0  # how long a stopped background step may take to remove what it wrote
# the young generation of Python's cycle collector while the steps run (Python's default is 700 objects)
_YOUNG_OBJECTS = 50_000



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
    spellings = (str(tmp), json.dumps(str(tmp))[1:-1])  # as written, and as JSON escapes it
    for path in sorted(tmp.rglob("*.json")):
        text = path.read_text(encoding="utf-8")
        if not any(s in text for s in spellings):  # names no temporary path (the bench's 3 MB results, 0.25 s)
            continue
        record = json.loads(text)
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

    Notes
    -----
    The benchmark step, the longest, needs nothing the other steps write: where processes can be forked it runs in
    a child process from the start, beside the other steps, and its text is shown in its turn (see
    :class:`_Background`). Every process of the demo uses one BLAS thread: the steps and the benchmark's workers
    already fill the cores, and more threads would only wait on each other.
    """
    from threadpoolctl import threadpool_limits

    session, plant, limits = (str(demo_file(n)) for n in ("demo_session.h5", "demo_plant.h5", "demo_limits.toml"))
    out = Path(out)
    started = time.perf_counter()
    with atomic_dir(out, force=force) as tmp, threadpool_limits(limits=1):
        (tmp / "inputs").mkdir()
        (tmp / "models").mkdir()
        steps = list(zip(demo_steps(session, plant, limits, str(tmp)), demo_steps(session, plant, limits, str(out))))
        with _collector_for_steps(steps), _Background.start(_BACKGROUND_STEP, steps, run_step, str(tmp), str(out)) as background:
            # the background step does not read the pattern: it starts first (it is the longest)
            with open_session_source(session) as demo:  # its header: the pattern needs no samples
                _write_pattern(tmp / "inputs" / DEMO_PATTERN_FILE, demo.sample_rate_hz, demo.input_names,
                               demo.input_units)
            for (title, argv), (_, shown_argv) in steps:
                echo(f"\n== {title}\n$ stimsteer {' '.join(shown_argv)}")
                if background is not None and argv is background.argv:
                    code, text, err = background.result()
                    sys.stderr.write(err)
                else:
                    code, text = _run_here(run_step, argv, str(tmp), str(out))
                echo(text.replace(str(tmp), str(out)).rstrip())
                _check_code(argv, code)
        _record_final_paths(tmp, out)
    report = out / "report" / "report.html"
    echo(f"\ndemo finished in {time.perf_counter() - started:.0f} s; outputs in {out}")
    echo(f"open the report: {report}")
    echo(CAUTION)
    return report


def _import_commands(steps) -> None:
    """Import the steps' command modules before the background step is forked, so that the two processes share
    them (the command line imports a command's module when that command runs): imported in each, they would cost
    their CPU time twice (about 1 s: matplotlib, the benchmark, the controllers)."""
    for name in sorted({argv[0] for (_, argv), _shown in steps}):
        try:
            importlib.import_module(f".commands.{name}", __package__)
        except ImportError:  # a step runner of the caller's own: nothing to share
            pass


@contextmanager
def _collector_for_steps(steps):
    """Import the steps' command modules (:func:`_import_commands`) with Python's cycle collector set for the demo's
    steps, and put it back as it was when they end.

    The objects that exist once they are imported (about 130,000 tracked ones) are moved out of the collector's
    reach (:func:`gc.freeze`): they live as long as the process, and every full collection of the demo's processes
    walked them again, in the background step's child (forked from here) and its workers too, where the walk also
    copies the pages it touches. A young generation of :data:`_YOUNG_OBJECTS` instead of 700 lets the steps' short
    lives end by reference counting before a collection looks at them. Collected, the demo's processes spent
    1.0-1.3 s of CPU in the collector (590 young, 54 middle and 5 full collections in this process alone); with this,
    0.31-0.35 s (measured with ``gc.callbacks`` over a whole demo, 2026-12-03; the largest child's resident memory
    212 -> 235 MB). Cycles are still collected, and nothing the steps compute depends on when.
    """
    import gc

    thresholds, frozen_before = gc.get_threshold(), gc.get_freeze_count()
    try:
        gc.set_threshold(_YOUNG_OBJECTS, *thresholds[1:])
        _import_commands(steps)
        gc.freeze()
        yield
    finally:
        gc.set_threshold(*thresholds)
        if not frozen_before:  # a caller's own frozen objects stay frozen (freezing is not undone in parts)
            gc.unfreeze()


def _run_here(run_step, argv, tmp: str, out: str) -> tuple[int, str]:
    """Run one step in this process: its exit code and what it printed (its stderr goes on to ours, renamed)."""
    text = io.StringIO()
    with redirect_stdout(text), redirect_stderr(_Renamed(sys.stderr, tmp, out)):
        code = run_step(argv)
    return code, text.getvalue()


def _check_code(argv, code: int) -> None:
    if code in (130, 143):  # the step was interrupted (Ctrl-C, SIGTERM): so is the demo
        raise Interrupted(code - 128)
    if code != 0:
        raise DemoStepFailed(argv[0], code)


class _Background:
    """One step run in a forked child process from the start of the demo; :meth:`result` waits for it.

    The child captures the step's standard output and error and sends them back with its exit code, so the demo
    shows them in the step's turn. It ends with the demo however the demo ends: stopped (SIGTERM, which the step
    unwinds like Ctrl-C, removing what it wrote) when the demo leaves early, and sent SIGTERM by the system when the
    demo process dies without stopping it (Linux). Where processes cannot be forked, :meth:`start` yields None and
    the step runs in its turn.
    """

    def __init__(self, argv, process, conn):
        self.argv, self._process, self._conn = argv, process, conn

    @classmethod
    @contextmanager
    def start(cls, command: str, steps, run_step, tmp: str, out: str):
        """Start the step whose subcommand is ``command`` (of ``steps``, ``((title, argv), shown)`` pairs)."""
        import multiprocessing

        argv = next((argv for (_, argv), _shown in steps if argv[0] == command), None)
        if argv is None or "fork" not in multiprocessing.get_all_start_methods():
            yield None
            return
        ctx = multiprocessing.get_context("fork")
        receive, send = ctx.Pipe(duplex=False)
        process = ctx.Process(target=_background_step, args=(run_step, argv, tmp, out, send, os.getpid()),
                              name="stimsteer-demo-step", daemon=False)
        process.start()
        send.close()
        try:
            yield cls(argv, process, receive)
        finally:
            if process.is_alive():  # the demo ends early (a failed step, Ctrl-C): so does the step
                process.terminate()
                process.join(timeout=_STOP_WAIT_S)
                if process.is_alive():  # it could not unwind in time (e.g. blocked on a full pipe)
                    process.kill()
            process.join()
            receive.close()

    def result(self) -> tuple[int, str, str]:
        """``(exit code, standard output, standard error)`` of the step, once it has ended."""
        try:
            code, text, err = self._conn.recv()
        except EOFError:  # the child died without a word (killed): report it as the step's failure
            self._process.join()
            code = self._process.exitcode
            return (128 - code if code is not None and code < 0 else 1), "", ""
        self._process.join()
        return code, text, err


def _background_step(run_step, argv, tmp: str, out: str, conn, parent_pid: int) -> None:
    """The child's body: run the step with its output captured and send ``(code, stdout, stderr)`` home."""
    import signal

    from .evaluation.execute import _death_signal

    if _death_signal(signal.SIGTERM) and os.getppid() != parent_pid:
        os._exit(1)  # the demo died before the death signal was set up
    text, err = io.StringIO(), io.StringIO()
    with redirect_stdout(text), redirect_stderr(_Renamed(err, tmp, out)):
        code = run_step(argv)
    conn.send((int(code), text.getvalue(), err.getvalue()))
    conn.close()
