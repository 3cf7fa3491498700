"""The command's quick ending (``cli.leave``): exit handlers and streams as before, no module teardown.

Python's ending frees every object and module of numpy, SciPy, pandas, matplotlib and cvxpy one by one (0.3-0.75 s
measured after the work is done); ``leave`` runs the exit handlers, flushes both streams and lets the operating system
take the memory back. What must not change: the exit code, everything printed, the exit handlers, and a thread that
is still working is waited for (common practice, no source: the behaviour of Python's own ending).
"""

import subprocess
import sys

import pytest

from .conftest import cli_env

# A user's program around the command: an exit handler, a module-level object whose finaliser only Python's
# teardown runs, optionally a non-daemon thread still at work; then the command with a missing session (exit 2).
_DRIVER = r"""
import atexit, sys, threading, time
from pathlib import Path
from stimsteer.control import cli
marks = Path(sys.argv[1])
def mark(text, _open=open):
    with _open(marks, "a", encoding="utf-8") as fh:
        fh.write(text + "\n")
class Torn:
    def __del__(self):
        mark("torn down")
keep = Torn()
atexit.register(mark, "exit handler")
if sys.argv[2] == "thread":
    threading.Thread(target=lambda: (time.sleep(0.3), mark("thread"))).start()
print("printed, not flushed")
sys.argv = ["stimsteer", "fit", str(marks.with_name("missing.h5")), "--route", "indirect", "--method", "arx",
            "--out", str(marks.with_name("model.h5"))]
cli.run()
"""


@pytest.mark.parametrize("thread, marks", [("none", ["exit handler"]),
                                           ("thread", ["thread", "exit handler", "torn down"])])
def test_the_command_ends_with_its_code_its_text_and_its_exit_handlers(tmp_path, thread, marks):
    proc = subprocess.run([sys.executable, "-c", _DRIVER, str(tmp_path / "marks.txt"), thread], env=cli_env(),
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert proc.stdout == "printed, not flushed\n"  # flushed although the process did not end the ordinary way
    assert proc.stderr.count("\n") == 1 and "missing.h5" in proc.stderr
    # without a thread at work, no teardown (the finaliser never runs); with one, Python's ordinary ending as before
    assert (tmp_path / "marks.txt").read_text(encoding="utf-8").splitlines() == marks
    assert not (tmp_path / "model.h5").exists()
