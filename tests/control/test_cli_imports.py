"""The command line imports a command's module when that command runs (control/cli.py, control/__init__.py)."""

import json
import subprocess
import sys

_PROBE = r"""
import json, sys
from stimsteer.control.cli import main
try:
    main(["schedule", "--help"])
except SystemExit:
    pass
heavy = ["matplotlib", "stimsteer.control.report", "stimsteer.control.evaluation", "stimsteer.control.commands.live",
         "stimsteer.control.commands.plan"]
loaded = [m for m in heavy if m in sys.modules]
import stimsteer.control as control
names = {n: type(getattr(control, n)).__name__ for n in control.__all__}
print(json.dumps({"loaded": loaded, "names": names, "schedule": "stimsteer.control.commands.schedule" in sys.modules}))
"""


def test_a_command_imports_only_what_it_needs_and_the_package_still_offers_every_name():
    done = subprocess.run([sys.executable, "-c", _PROBE], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    found = json.loads(done.stdout.strip().splitlines()[-1])
    # `stimsteer schedule --help` needs the schedule command, not the figures, the benchmark or the other commands
    assert found["schedule"] and found["loaded"] == [], found["loaded"]
    # the public names load on first use: every one of them is there, and `write_report` is `write_bench`
    assert found["names"]["run_bench"] == "function" and found["names"]["StimLimits"] == "type"
    assert found["names"]["write_report"] == found["names"]["write_bench"] == "function"
    assert len(found["names"]) == 33
