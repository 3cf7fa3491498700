"""The README stays true: its Python example runs, and its commands name options the command line has."""

import re
import subprocess
import sys
from pathlib import Path

import pytest

from stimsteer.control.cli import build_parser

README = Path(__file__).resolve().parents[1] / "README.md"


def _python_blocks():
    return re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), flags=re.S)


def test_the_readme_python_example_runs_and_its_plan_stays_inside_the_limits(tmp_path):
    (block,) = [b for b in _python_blocks() if "controller_for" in b]
    script = tmp_path / "example.py"
    script.write_text(block, encoding="utf-8")
    run = subprocess.run([sys.executable, str(script)], capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stderr
    assert run.stdout.split() == ["optimal", "True"]


def _command_rows():
    rows = re.findall(r"^\| `stimsteer ([a-z]+)([^`]*)`", README.read_text(encoding="utf-8"), flags=re.M)
    assert len(rows) >= 9
    return rows


@pytest.mark.parametrize("name,rest", _command_rows())
def test_every_option_in_the_readme_command_table_exists(name, rest):
    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command").choices[name]
    known = {s for a in sub._actions for s in a.option_strings}
    for option in re.findall(r"--[a-z][a-z-]*", rest):
        assert option in known, f"README names `stimsteer {name} {option}`, which the command does not have"
