"""The ``stimsteer`` command: parse the arguments, call a subcommand, map its errors to exit codes.

Nothing else happens here: each subcommand's file workflow lives in :mod:`stimsteer.control.commands` (one module
per subcommand exposing ``add_parser(subparsers)`` and ``run(args)``). Every toolkit error becomes one line on stderr
and exit code 2; anything else is a bug and gives one line with exit code 1 (``STIMSTEER_DEBUG=1`` shows its
traceback). Nothing is half-written: outputs go through ``stimsteer.sysid._files``.

Register a new subcommand in ``_SUBCOMMANDS``. A command's module is imported when that command runs (or when the
whole parser is built, for ``--help``): ``stimsteer inspect`` does not import what ``plan`` or ``live`` need.
"""

from __future__ import annotations

import argparse
import atexit
import importlib
import os
import sys
import threading
from pathlib import Path

from ..sysid._claims import _errno_known, _is_temporary_of, os_error_text
from ..sysid.caution import CAUTION
from ..sysid.exceptions import StimsteerError
from .commands._common import claiming, interruptible

__all__ = ["main", "run", "leave", "build_parser", "CAUTION"]


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit code 2."""

    def error(self, message):
        sys.stderr.write(f"stimsteer: error: {message} (see `{self.prog} --help`)\n")
        sys.exit(2)


def _run_demo(args):
    # the demo runs each of its steps through this command line: it gets `main` as its step runner
    return importlib.import_module(".commands.demo", __package__).run(args, run_step=main)


def _plan_run(args):
    # plan does not claim its --out itself yet: claimed here, before it loads or computes anything
    return claiming(importlib.import_module(".commands.plan", __package__).run, "plan")(args)


# name -> the module under commands/ with ``add_parser`` and ``run``, or an ``(add_parser, run)`` pair
_SUBCOMMANDS = {
    "fit": "fit",
    "predict": "predict",
    "network": "network",
    "schedule": "schedule",
    "plan": ("plan", _plan_run),
    "bench": "bench",
    "inspect": "inspect",
    "convert": "convert",
    "demo": ("demo", _run_demo),
    "live": "live",
    "study": "study",
}


def command_modules(names=None) -> list:
    """The modules of the named subcommands (default every one), imported."""
    out = []
    for name in _SUBCOMMANDS if names is None else names:
        entry = _SUBCOMMANDS[name]
        if isinstance(entry, str) or isinstance(entry[0], str):
            out.append(importlib.import_module(f".commands.{entry if isinstance(entry, str) else entry[0]}",
                                               __package__))
    return out


def _command(name: str) -> tuple:
    """``(add_parser, run)`` of a subcommand, importing its module."""
    entry = _SUBCOMMANDS[name]
    if isinstance(entry, str):
        module = command_modules([name])[0]
        return module.add_parser, module.run
    add, run = entry
    return (command_modules([name])[0].add_parser if isinstance(add, str) else add), run


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """The ``stimsteer`` argument parser with every subcommand of ``_SUBCOMMANDS``, or with ``command`` alone (a
    known name: what :func:`main` needs to run it, without importing the others)."""
    parser = _Parser(
        prog="stimsteer",
        description="Check stimulation sessions, fit predictors of the stimulated response, design stimulation "
        "under declared limits, and benchmark the indirect (model) and direct (data) routes. " + CAUTION,
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for name in ([command] if command in _SUBCOMMANDS else _SUBCOMMANDS):
        _command(name)[0](sub)
    return parser


def _command_named(argv) -> str | None:
    """The subcommand ``argv`` names (its first word when that is one), else None: the whole parser is needed."""
    argv = sys.argv[1:] if argv is None else list(argv)
    return argv[0] if argv and argv[0] in _SUBCOMMANDS else None


def _given_as(args, filename) -> str:
    """Which argument named a missing file (``" (the limits argument); check the path"``), or "" if none did."""
    for name, value in vars(args).items():
        if name != "command" and value is not None and str(value) == str(filename):
            return f" (the {name.replace('_', '-')} argument); check the path"
    return ""


def main(argv=None) -> int:
    """Run ``stimsteer`` with ``argv`` (default: the process arguments) and return its exit code.

    0 on success; 2 for a toolkit error, a missing file or a refusal of the operating system (no space, read-only,
    quota, too many open files: one line naming the path and the reason); 1 for anything else, a bug (one line, or
    the traceback with ``STIMSTEER_DEBUG=1``); 130 when interrupted (Ctrl-C, SIGINT) and 143 when terminated
    (SIGTERM), with no partial output kept.
    """
    parser = build_parser(_command_named(argv))
    args = parser.parse_args(argv)
    _add, run = _command(args.command)
    try:
        with interruptible():
            return int(run(args) or 0)
    except StimsteerError as exc:
        return _fail(args.command, str(exc), 2)
    except (FileNotFoundError, IsADirectoryError, NotADirectoryError) as exc:
        return _fail(args.command, f"{exc.strerror or exc}: {exc.filename}{_given_as(args, exc.filename)}", 2)
    except KeyboardInterrupt as exc:
        return _fail(args.command, "interrupted; no partial output was kept.", getattr(exc, "code", 130))
    except Exception as exc:  # a bug, not bad input: still one line, with the way to see the traceback
        if _errno_known(exc):  # the system refused (full disk, read-only, quota, open files): say so plainly
            return _fail(args.command, _os_error_line(exc, args), 2)
        if os.environ.get("STIMSTEER_DEBUG"):
            raise
        return _fail(args.command, f"internal error ({type(exc).__name__}: {exc}); please report it with the "
                     "command you ran (set STIMSTEER_DEBUG=1 to see the traceback).", 1)


def _os_error_line(exc: OSError, args) -> str:
    """The system's refusal in one line: the output path (not our temporary name) when writing it, else the file."""
    out = getattr(args, "out", None)
    name = Path(str(exc.filename)) if exc.filename else None
    writing = out is not None and (name is None or _is_temporary_of(name, Path(out)))
    return os_error_text(exc, out if writing else None, verb="write" if writing else "use")


def _fail(command: str, message: str, code: int) -> int:
    sys.stderr.write(f"stimsteer {command}: error: {' '.join(message.split())}\n")
    return code


def run() -> None:
    """The ``stimsteer`` command itself: :func:`main` on the process arguments, then :func:`leave` with its code."""
    leave(main())


def leave(code: int) -> None:
    """End this process with exit code ``code``, without Python taking its modules apart one by one.

    A command's process holds numpy, SciPy, pandas, matplotlib and, once it has planned, cvxpy. Python's own ending
    frees each of their objects and modules: 0.5-0.75 s after the demo's work was done and its outputs written, and
    0.3-0.6 s for these imports alone (measured with ``time.time()`` before the end and ``date`` after it; 2026-12-03,
    idle 2-core machine). Here the exit handlers still run (``atexit``: logging's flush, multiprocessing's joins,
    temporary folders) and both standard streams are flushed; then the operating system takes the memory back at once.
    Outputs are never at stake: every file was written atomically and closed before the command returned. Where a
    thread that is not a daemon still runs, or a stream cannot be flushed (a closed pipe), Python's ordinary ending
    is taken instead, as before.
    """
    if any(t is not threading.main_thread() and not t.daemon and t.is_alive() for t in threading.enumerate()):
        sys.exit(code)
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (OSError, ValueError):  # a reader that went away, a closed stream: Python's ending reports it as before
        sys.exit(code)
    atexit._run_exitfuncs()  # what sys.exit would run, in the same order (they are cleared once run)
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (OSError, ValueError):
        code = code or 120  # what Python's ending returns when it cannot flush stdout
    os._exit(code)


if __name__ == "__main__":  # pragma: no cover
    run()
