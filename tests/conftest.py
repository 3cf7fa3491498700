import numpy as np
import pytest


@pytest.fixture(scope="session")
def seed():
    """The one seed tests use, so every random number in the suite is reproducible."""
    return 20261201


@pytest.fixture
def rng(seed):
    return np.random.default_rng(seed)


def pytest_terminal_summary(terminalreporter):
    """List the open-data checks that were skipped and why (``pytest -q`` shows no skip reasons without ``-rs``):
    a fresh clone without ../shared/data beside it should say where the data were expected (issue 18)."""
    reasons = {}
    for report in terminalreporter.stats.get("skipped", []):
        longrepr = getattr(report, "longrepr", None)
        text = longrepr[2] if isinstance(longrepr, tuple) and len(longrepr) == 3 else str(longrepr)
        text = text.removeprefix("Skipped: ")
        if text.startswith("open data"):
            reasons.setdefault(text, []).append(report)
    if reasons:
        total = sum(len(v) for v in reasons.values())
        terminalreporter.write_line(f"{total} check(s) on open measured data were skipped:")
        for text, reports in reasons.items():
            terminalreporter.write_line(f"  {len(reports)} x {text}")


@pytest.fixture
def saved_figures(monkeypatch):
    """The figures the commands save during a test, in order (through the figures' own ``savefig``, which draws
    once: their texts and tick labels exist afterwards)."""
    from stimsteer.control.figures._glyphs import GlyphSafeFigure

    seen, original = [], GlyphSafeFigure.savefig

    def capture(fig, *args, **kwargs):
        seen.append(fig)
        return original(fig, *args, **kwargs)

    monkeypatch.setattr(GlyphSafeFigure, "savefig", capture)
    return seen
