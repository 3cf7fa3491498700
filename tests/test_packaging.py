"""Every subpackage of the source tree is installed by a plain (non-editable) `pip install .`.

The `package-dir` mapping of pyproject.toml makes the package list explicit; an editable install finds a missing
entry anyway, so only this check (or CI's plain install) would notice it.
"""

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


def test_every_source_package_is_listed_for_installation():
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    listed = set(config["packages"])
    found = set()
    for top, dotted in config["package-dir"].items():
        base = ROOT / dotted
        for init in base.rglob("__init__.py"):
            rel = init.parent.relative_to(base).parts
            found.add(".".join([top, *rel]))
    assert found - listed == set(), f"add to pyproject.toml [tool.setuptools] packages: {sorted(found - listed)}"
    assert listed - found == set(), f"listed but not in the tree: {sorted(listed - found)}"


def test_the_command_runs_as_a_module_without_a_warning():
    """``python -m stimsteer.control.cli`` is the documented fallback when the script is not on PATH; it used to
    warn (RuntimeWarning: found in sys.modules ... unpredictable behaviour) because the package imported it first."""
    import subprocess
    import sys

    proc = subprocess.run([sys.executable, "-W", "error", "-m", "stimsteer.control.cli", "--help"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and "usage: stimsteer" in proc.stdout, proc.stderr
    assert "Warning" not in proc.stderr, proc.stderr
