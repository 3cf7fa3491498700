"""Where the open measured data live, and the one rule for a missing file: skip naming the folder, fail under CI.

The files are read-only copies in ``../shared/data`` beside the repository (on a workstation and in CI alike);
``STIMSTEER_OPEN_DATA=/path/to/data`` points the tests at another copy (a fresh clone elsewhere). A skip's reason
starts with :data:`SKIP_PREFIX`, so ``tests/conftest.py`` can list them at the end of every run, where ``pytest -q``
shows them without ``-rs``.
"""

import os
from pathlib import Path

import pytest

SKIP_PREFIX = "open data"
ENV = "STIMSTEER_OPEN_DATA"


def data_folder() -> Path:
    """The open-data folder: ``$STIMSTEER_OPEN_DATA``, else ``../shared/data`` beside the repository."""
    given = os.environ.get(ENV)
    return Path(given) if given else Path(__file__).resolve().parents[2].parent / "shared" / "data"


def require(path: Path) -> Path:
    """``path`` if it exists; else skip naming where it was expected and how to provide it, or fail when ``CI`` is
    set (CI always has the shared folder beside the clone: a missing file there is a broken set-up)."""
    path = Path(path)
    if path.exists():
        return path
    where = (f"{SKIP_PREFIX} file {path.name} not found: expected at {path} (the shared data folder ../shared/data "
             f"beside the repository; set {ENV}=/path/to/data to use a copy elsewhere)")
    if os.environ.get("CI"):
        pytest.fail(f"{where}; CI is set, so this check must run.")
    pytest.skip(where)
