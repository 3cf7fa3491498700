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


# ------------------------------------------------------------------------------------------ windows and channels
def window_length(option: str):
    """An argparse type: a window length ``100ms``, ``0.1s`` or ``40samples``
    (:func:`stimsteer.sysid.window_defaults.parse_window`); a bad value is one line naming ``option``, exit 2."""
    from ...sysid.exceptions import InvalidParameterError
    from ...sysid.window_defaults import parse_window

    def parse(text):
        try:
            return parse_window(text, option=option)
        except InvalidParameterError as exc:
            raise argparse.ArgumentTypeError(str(exc).removeprefix(f"{option} ").removeprefix(f"{option}: ")) \
                from None

    parse.__name__ = "window length"
    return parse


def _samples_length(minimum: int, option: str):
    """The older ``--past-steps N`` spelling: a whole number of samples, as a window length."""
    from ...sysid.window_defaults import samples_window

    whole = whole_number(minimum)

    def parse(text):
        return samples_window(whole(text), option)

    parse.__name__ = f"whole number >= {minimum}"
    return parse


_DEFAULT_WINDOWS = ("default: from the data, twice the outputs' autocorrelation time for the past window and twice "
                    "that for the horizon, capped; the command prints what it took")


def add_window_options(p, *, past: str | None = "past window", horizon: str | None = "prediction horizon",
                       default: str = _DEFAULT_WINDOWS) -> None:
    """``--past`` and ``--horizon`` (a length: ``100ms``, ``0.1s`` or ``40samples``), with the older
    ``--past-steps N`` / ``--horizon-steps N`` (samples) kept as aliases; ``args.past`` / ``args.horizon`` hold a
    :class:`~stimsteer.sysid.window_defaults.WindowLength` or None. ``past``/``horizon`` None leaves that one out."""
    for name, what in (("past", past), ("horizon", horizon)):
        if what is None:
            continue
        group = p.add_mutually_exclusive_group()
        group.add_argument(f"--{name}", dest=name, type=window_length(f"--{name}"), metavar="LENGTH",
                           help=f"{what}: a time (100ms, 0.1s) or a number of samples (40samples); {default}")
        group.add_argument(f"--{name}-steps", dest=name, type=_samples_length(1, f"--{name}-steps"), metavar="N",
                           help=f"the same in samples (older spelling of --{name} Nsamples)")


def window_steps(value, rate_hz: float, option: str):
    """A window option's value in samples at ``rate_hz`` (None stays None)."""
    return None if value is None else value.steps(rate_hz, option=option)


def _name_list(text):
    items = [t.strip() for t in str(text).split(",") if t.strip()]
    if not items:
        raise argparse.ArgumentTypeError(f"expected names or glob patterns separated by commas; got {text!r}")
    return items


def add_channel_options(p) -> None:
    """``--inputs``, ``--outputs`` (keep these channels) and ``--drop`` (leave these out): names or glob patterns
    separated by commas (``--outputs 'lfp_*' --drop lfp_7``); see :meth:`stimsteer.sysid.Session.select`."""
    p.add_argument("--inputs", dest="select_inputs", type=_name_list, metavar="NAMES",
                   help="stimulation inputs to keep, by name or glob, comma-separated (default all)")
    p.add_argument("--outputs", dest="select_outputs", type=_name_list, metavar="NAMES",
                   help="recorded outputs to keep, by name or glob, comma-separated (default all)")
    p.add_argument("--drop", dest="select_drop", type=_name_list, metavar="NAMES",
                   help="channels to leave out (inputs or outputs), by name or glob, comma-separated; e.g. a dead "
                   "channel")


def selection(args) -> dict:
    """The ``Session.select`` arguments of a command's channel options (empty when none was given)."""
    chosen = {"inputs": getattr(args, "select_inputs", None), "outputs": getattr(args, "select_outputs", None),
              "drop": getattr(args, "select_drop", None)}
    return {k: v for k, v in chosen.items() if v is not None}


@contextlib.contextmanager
def open_selected(path, args):
    """The session at ``path`` with the command's channel selection applied (:func:`open_session_source` when
    there is none, so a large file is still read lazily; with a selection the file is loaded whole)."""
    from ...sysid import open_session_source

    chosen = selection(args)
    with open_session_source(path) as source:
        if not chosen:
            yield source
            return
        whole = source if hasattr(source, "select") else source.to_session()
        yield whole.select(**chosen)


@contextlib.contextmanager
def open_for_model(path, provenance):
    """The session at ``path`` with the channels of a model fitted on a selection of them (``fit --drop ...``):
    when the model's inputs and outputs (from its provenance) are a strict subset of the session's, the session is
    loaded whole and those channels are selected; otherwise it is opened as it is (the usual checks then apply)."""
    from ...sysid import open_session_source

    record = provenance.get("session", {}) if isinstance(provenance, dict) else {}
    ins, outs = record.get("input_names"), record.get("output_names")
    with open_session_source(path) as source:
        same = ins is None or outs is None or (tuple(source.input_names) == tuple(ins)
                                               and tuple(source.output_names) == tuple(outs))
        subset = not same and set(ins) <= set(source.input_names) and set(outs) <= set(source.output_names)
        if not subset:
            yield source
            return
        whole = source if hasattr(source, "select") else source.to_session()
        yield whole.select(inputs=list(ins), outputs=list(outs))
