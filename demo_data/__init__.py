"""The shipped demo session (simulated; see README.md here), installed as ``stimsteer.demo_data``."""

from pathlib import Path

__all__ = ["DEMO_DIR", "demo_file"]

DEMO_DIR = Path(__file__).resolve().parent


def demo_file(name: str) -> Path:
    """Path of a shipped demo file (``demo_session.h5``, ``demo_plant.h5``, ``demo_limits.toml``, ...)."""
    path = DEMO_DIR / name
    if not path.is_file():
        from stimsteer.sysid.exceptions import StimsteerError

        raise StimsteerError(
            f"the demo file {name} is missing from {DEMO_DIR}; reinstall stimsteer or regenerate it with "
            "`python demo_data/make_demo.py`."
        )
    return path
