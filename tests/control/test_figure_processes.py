"""Figures drawn side by side in forked processes (control/figures/_processes.py): the same PNG bytes as drawn in
one process, drawn by other processes, in the makers' order, and drawn here where children may not be started."""

import multiprocessing
import os

import pytest

from stimsteer.control.figures import _processes
from stimsteer.control.figures._processes import render_pngs
from stimsteer.control.figures._glyphs import GlyphSafeFigure

_PNG = b"\x89PNG\r\n\x1a\n"  # the PNG file signature (PNG specification, section 5.2)


def _makers(log_dir):
    """Four small figures (one maker draws nothing); each maker leaves a file named by its process id."""
    def maker(k):
        def make():
            (log_dir / f"{os.getpid()}_{k}").touch()
            if k == 2:
                return None
            fig = GlyphSafeFigure(figsize=(2, 1.5), dpi=50, layout="constrained")
            ax = fig.add_subplot()
            ax.plot([0, 1, 2], [k, 2 * k, k * k])
            ax.set_title(f"figure {k}")
            return fig
        return make
    return {f"f{k}": maker(k) for k in range(4)}


@pytest.mark.skipif("fork" not in multiprocessing.get_all_start_methods(), reason="needs fork")
def test_figures_drawn_in_two_processes_are_the_bytes_of_one(tmp_path):
    here, there = tmp_path / "here", tmp_path / "there"
    here.mkdir(), there.mkdir()
    one = render_pngs(_makers(here), processes=1)
    two = render_pngs(_makers(there), processes=2)
    assert list(one) == list(two) == ["f0", "f1", "f3"]  # the makers' order; the empty one left out
    assert all(png.startswith(_PNG) for png in one.values())
    assert one == two
    assert {p.name.split("_")[0] for p in here.iterdir()} == {str(os.getpid())}
    drawn_by = {p.name.split("_")[0] for p in there.iterdir()}
    assert str(os.getpid()) not in drawn_by
    assert _processes._MAKERS is None  # nothing of the rendering is left behind


def test_a_daemonic_caller_draws_in_its_own_process(tmp_path, monkeypatch):
    # a daemonic process may not start children (multiprocessing): the figures are drawn where they are asked for
    monkeypatch.setattr(multiprocessing.current_process(), "_config",
                        {**multiprocessing.current_process()._config, "daemon": True})
    pngs = render_pngs(_makers(tmp_path), processes=2)
    assert list(pngs) == ["f0", "f1", "f3"]
    assert {p.name.split("_")[0] for p in tmp_path.iterdir()} == {str(os.getpid())}
