"""Figures drawn side by side on forked helpers (control/figures/_forked.py): the same PNGs as drawn in one process,
every figure once, and failures of a helper fall back to the calling process.

Reference: the same figures drawn one after another in one process, byte for byte (no outside source: the
forked drawing must not change a pixel)."""

import multiprocessing
import os

import pytest
from matplotlib.figure import Figure

from stimsteer.control.figures._forked import ForkedDrawing

pytestmark = pytest.mark.skipif("fork" not in multiprocessing.get_all_start_methods(), reason="needs fork")


def _maker(k: int, log=None, home=None, fail_away=False, die_away=False):
    def make():
        away = home is not None and os.getpid() != home
        if log is not None:
            with open(log, "a", encoding="utf-8") as fh:
                fh.write(f"{k} {os.getpid()}\n")
        if away and fail_away:
            raise RuntimeError("fails on a helper")
        if away and die_away:
            os._exit(3)
        fig = Figure(figsize=(1.2, 0.8), dpi=40)
        ax = fig.add_subplot()
        ax.plot([0, 1, 2], [0, k, k * k])
        ax.set_title(f"figure {k}", fontsize=6)
        return fig
    return make


def _drawn(makers, processes):
    with ForkedDrawing(makers, processes) as drawing:
        return drawing.collect()


def test_side_by_side_gives_the_same_pngs_each_figure_drawn_once_and_some_on_a_helper(tmp_path):
    log = tmp_path / "log.txt"
    makers = {f"f{k}": _maker(k, log) for k in range(6)}
    makers["none"] = lambda: None  # nothing to draw: left out, as in one process
    one = _drawn(makers, 1)
    log.unlink()
    two = _drawn(makers, 2)
    assert list(two) == list(one) == [f"f{k}" for k in range(6)]
    assert two == one
    rows = [line.split() for line in log.read_text().splitlines()]
    assert sorted(k for k, _pid in rows) == [str(k) for k in range(6)]  # each figure drawn once
    assert {pid for _k, pid in rows} - {str(os.getpid())}  # a helper drew some


def test_a_figure_a_helper_cannot_draw_is_drawn_here(tmp_path):
    makers = {f"f{k}": _maker(k, home=os.getpid(), fail_away=True) for k in range(4)}
    assert _drawn(makers, 2) == _drawn({f"f{k}": _maker(k) for k in range(4)}, 1)


def test_a_helper_that_dies_leaves_its_figures_to_this_process():
    makers = {f"f{k}": _maker(k, home=os.getpid(), die_away=True) for k in range(4)}
    assert _drawn(makers, 2) == _drawn({f"f{k}": _maker(k) for k in range(4)}, 1)


def test_an_error_here_stops_the_helpers():
    def broken():
        raise ValueError("no figure")

    makers = {"broken": broken, **{f"f{k}": _maker(k) for k in range(3)}}
    with pytest.raises(ValueError, match="no figure"):
        with ForkedDrawing(makers, 2) as drawing:
            helpers = [h for h, _conn in drawing.helpers]
            drawing.collect()
    assert helpers and not any(h.is_alive() for h in helpers)


def test_a_forked_process_keeps_none_of_the_parents_font_objects():
    # they read their font file at an offset shared with the parent: drawing in both at once read wrong glyphs
    from stimsteer.control.figures._fast_agg import FastRenderer
    from stimsteer.control.figures._forked import png_of
    from stimsteer.control.figures._glyphs import GlyphSafeFigure

    def ours():
        fig = GlyphSafeFigure(figsize=(1.2, 0.8), dpi=40, layout="constrained")
        fig.add_subplot().set_title("shaped once", fontsize=6)
        return fig

    png_of(ours)
    assert FastRenderer._shapes
    ctx = multiprocessing.get_context("fork")
    receive, send = ctx.Pipe(duplex=False)
    child = ctx.Process(target=_count_shapes, args=(send,))
    child.start()
    assert receive.recv() == 0
    child.join()


def _count_shapes(conn):
    from stimsteer.control.figures._fast_agg import FastRenderer

    conn.send(len(FastRenderer._shapes))
