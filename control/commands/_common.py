"""What the writing subcommands share: claiming the output before any computing.

Every subcommand that writes (``fit``, ``predict``, ``network``, ``plan``, ``schedule``, ``bench``, ``demo``) runs
its whole body inside :func:`claimed`, so a second run on the same output is refused at once, with one line, before
anything is loaded or computed (:func:`stimsteer.sysid._claims.claim_output`). The claim is re-entrant within one
process: the command line may claim around a command that claims for itself, and the output is claimed once.
"""

from __future__ import annotations

import argparse
import contextlib
import functools
import os
import sys
from pathlib import Path

from ...sysid._claims import claim_output

__all__ = ["claimed", "claiming"]

_HELD: set = set()  # absolute paths this process holds a claim on


@contextlib.contextmanager
def claimed(path, *, force: bool = False, command: str = ""):
    """Claim ``path`` (file or folder) for this run; yields it as a :class:`~pathlib.Path`.

    Parameters
    ----------
    path : str or Path
        The ``--out`` of the command.
    force : bool, default False
        ``--force``: an existing output may be replaced (whole, at the end).
    command : str, optional
        The subcommand's name, for the note printed when a killed run's leftovers were removed.

    Raises
    ------
    OutputError
        Another live run writes ``path``; ``path`` exists (without ``force``); its folder cannot be written.
    """
    key = os.path.abspath(path)
    if key in _HELD:
        yield Path(path)
        return
    notes: list = []
    with claim_output(path, force=force, notes=notes) as claimed_path:
        for note in notes:
            sys.stderr.write(f"stimsteer{' ' + command if command else ''}: note: {note}\n")
        _HELD.add(key)
        try:
            yield claimed_path
        finally:
            _HELD.discard(key)


def claiming(run, command: str):
    """``run(args)`` of a subcommand, with ``args.out`` claimed (and ``args.force`` honoured) around it.

    One line wires a command whose module does not claim for itself:
    ``"plan": (plan.add_parser, claiming(plan.run, "plan"))``.
    """

    @functools.wraps(run)
    def wrapped(args):
        with claimed(args.out, force=bool(getattr(args, "force", False)), command=command):
            return run(args)

    return wrapped


class Interrupted(KeyboardInterrupt):
    """A run stopped by a signal (SIGTERM here; SIGINT is Python's own KeyboardInterrupt); ``code`` is 128 + signal."""

    def __init__(self, signum: int):
        super().__init__(f"signal {signum}")
        self.code = 128 + int(signum)


_OWNER = {"pid": None}


def _raise_interrupted(signum, _frame):
    # A worker forked while the handler was installed inherits it; a signal there (the parent stopping its pool)
    # must end that process quietly, not print a traceback into the user's terminal.
    if _OWNER["pid"] is not None and os.getpid() != _OWNER["pid"]:
        os._exit(128 + int(signum))
    raise Interrupted(signum)


@contextlib.contextmanager
def interruptible():
    """Turn SIGTERM into :class:`Interrupted` while the block runs, so it unwinds like Ctrl-C: workers stopped,
    temporary files removed, the claim released. Only the main thread can take signals; elsewhere, nothing changes.
    """
    import signal
    import threading

    if threading.current_thread() is not threading.main_thread():
        yield
        return
    _OWNER["pid"] = os.getpid()
    previous = signal.signal(signal.SIGTERM, _raise_interrupted)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def whole_number(minimum: int):
    """An argparse type: a whole number >= ``minimum``; argparse names the option in its one-line refusal.

    Checking here, not in the API, makes the message name the flag (``--past-steps``) rather than the setting it
    feeds (``past_steps``).
    """
    def parse(text):
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number >= {minimum}; got {text!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"expected a whole number >= {minimum}; got {value}")
        return value

    parse.__name__ = f"whole number >= {minimum}"
    return parse
