"""Figures drawn side by side: this process and forked helpers take the figures one at a time from a shared list.

The benchmark's report draws 8 figures, one after the other about 2 s of one core, at the very end of ``stimsteer
bench`` (and of the demo, whose other steps are then done: the second core would idle). :class:`ForkedDrawing` forks
helpers (they see the figures' data without copying it), and every process, this one included, takes the next figure
from a pipe that holds one byte per figure (a one-byte read of a pipe is atomic: each figure is taken once, and no
lock is left held when a helper dies), draws it and keeps its PNG bytes; the helpers send theirs home when the list
is empty. A figure is the same PNG whichever process drew it (drawing depends only on the figure's own data).

Failures fall back to this process: a figure a helper could not draw, or did not send (it died), is drawn here, so
an error is raised here as it would be without helpers. The helpers end with this process however it ends: stopped
when the block is left early (an error, Ctrl-C, SIGTERM), and sent SIGTERM by the system if it dies (Linux).
"""

from __future__ import annotations

import io
import os

__all__ = ["ForkedDrawing", "png_of"]

_STOP_WAIT_S = 5.0  # how long a stopped helper may take to end before it is killed


def png_of(make):
    """The PNG bytes of the figure ``make()`` returns (one draw: the layout engine runs in it), None for no figure."""
    fig = make()
    if fig is None:
        return None
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def _can_fork() -> bool:
    """Whether this process can fork helpers (a daemonic process may not have children)."""
    import multiprocessing

    return "fork" in multiprocessing.get_all_start_methods() and not multiprocessing.current_process().daemon


class ForkedDrawing:
    """Draw figures as PNG bytes on ``processes`` processes (this one and ``processes - 1`` forked helpers).

    Parameters
    ----------
    makers : dict of str to callable
        ``name -> make()``; ``make`` returns a matplotlib figure, or None when it has nothing to draw.
    processes : int
        Processes that draw, this one included; 1 (or no ``fork`` on this platform) draws them all here.
    order : sequence of str, optional
        The names in the order they are taken (longest first packs the processes best); default ``makers``'
        order. Names missing from it are taken last.

    Use it as a context manager: the helpers start drawing on entry, this process can do other work, and
    :meth:`collect` then draws here what is left and gathers every PNG.
    """

    def __init__(self, makers: dict, processes: int = 1, order=()):
        self.makers = dict(makers)
        names = [n for n in order if n in self.makers]
        self.queue = names + [n for n in self.makers if n not in names]
        self.processes = max(1, min(int(processes), len(self.makers)))
        self.helpers: list = []  # (process, receiving end of its pipe)
        self._read = None

    def __enter__(self):
        if self.processes > 1 and len(self.queue) <= 255 and _can_fork():  # one byte per figure
            self._start()
        return self

    def _start(self) -> None:
        import multiprocessing

        read, write = os.pipe()
        try:
            os.write(write, bytes(range(len(self.queue))))  # one byte each, well within a pipe's room
        finally:
            os.close(write)  # no writer left: an empty list reads as its end
        self._read = read
        ctx = multiprocessing.get_context("fork")
        for _ in range(self.processes - 1):
            receive, send = ctx.Pipe(duplex=False)
            helper = ctx.Process(target=self._helper, args=(send, os.getpid()), name="stimsteer-figures", daemon=True)
            helper.start()
            send.close()
            self.helpers.append((helper, receive))

    def _next(self):
        """The next figure's name, or None when every figure has been taken."""
        if self._read is None:  # no helpers: this process takes them in order
            return self.queue.pop(0) if self.queue else None
        taken = os.read(self._read, 1)
        return self.queue[taken[0]] if taken else None

    def _draw_taken(self, out: dict) -> None:
        while (name := self._next()) is not None:
            out[name] = png_of(self.makers[name])

    def _helper(self, conn, parent_pid: int) -> None:
        """A helper's body: draw what it takes; send the PNGs home (a failed figure is left to the parent)."""
        from ..evaluation.execute import _follow_parent

        _follow_parent(parent_pid)
        out: dict = {}
        try:
            self._draw_taken(out)
        except Exception:  # the parent draws it again and raises the error there
            pass
        conn.send(out)
        conn.close()

    def collect(self) -> dict:
        """Draw here what is left, gather the helpers' PNGs and return ``{name: PNG bytes}`` in ``makers``' order
        (figures with nothing to draw left out)."""
        out: dict = {}
        self._draw_taken(out)
        for helper, receive in self.helpers:
            try:
                out.update(receive.recv())
            except EOFError:  # the helper died: what it had taken is drawn below
                pass
            helper.join()
        self.helpers = []
        for name in self.makers:  # taken by a helper that failed or died
            if name not in out:
                out[name] = png_of(self.makers[name])
        return {name: out[name] for name in self.makers if out[name] is not None}

    def __exit__(self, *exc) -> None:
        for helper, receive in self.helpers:  # left early: the helpers stop with us
            if helper.is_alive():
                helper.terminate()
                helper.join(timeout=_STOP_WAIT_S)
                if helper.is_alive():
                    helper.kill()
            helper.join()
            receive.close()
        self.helpers = []
        if self._read is not None:
            os.close(self._read)
            self._read = None
