"""The ``stimsteer`` command: one subcommand per user task.

A thin shell: parse, load, call the public API, print. No numerics here. Every toolkit error becomes one line on
stderr and exit code 2; nothing is half-written (outputs go through ``stimsteer.sysid._files``).

Each subcommand is a pair: ``_add_<name>(subparsers)`` declares its options and ``_run_<name>(args)`` does the work.
Register a new pair in ``_SUBCOMMANDS``.
"""

from __future__ import annotations

import argparse
import sys

from ..sysid.exceptions import StimsteerError

__all__ = ["main", "build_parser", "CAUTION"]

CAUTION = (
    "Caution: stimsteer is research software, not a medical device. Stimulation of people follows the approved "
    "protocol, local regulations and licensed clinical practice."
)


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors as one line and exit code 2."""

    def error(self, message):
        sys.stderr.write(f"stimsteer: error: {message} (see `{self.prog} --help`)\n")
        sys.exit(2)


# ---------------------------------------------------------------------------------------------------- inspect
def _add_inspect(sub):
    p = sub.add_parser("inspect", help="summarise a session: channels, rate, trials, gaps, flat or saturated channels")
    p.add_argument("session", help="session file (our HDF5 layout, CSV/Parquet table, or NWB)")
    return p


def _run_inspect(args):
    from ..sysid.io import load_session
    from ..sysid.quality import describe_session

    session = load_session(args.session)
    print(describe_session(session).to_text())
    return 0


# ---------------------------------------------------------------------------------------------------- demo
def _add_demo(sub):
    p = sub.add_parser("demo", help="run the whole job on the shipped demo session and write the outputs to --out")
    p.add_argument("--out", required=True, help="output folder (must be new or empty, unless --force)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    return p


def _run_demo(args):
    from .demo import run_demo

    run_demo(args.out, force=args.force, echo=print)
    return 0


_SUBCOMMANDS = {
    "inspect": (_add_inspect, _run_inspect),
    "demo": (_add_demo, _run_demo),
}


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="stimsteer",
        description="Check stimulation sessions, fit predictors of the stimulated response, design stimulation "
        "under declared limits, and benchmark the indirect (model) and direct (data) routes. " + CAUTION,
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for name, (add, _run) in _SUBCOMMANDS.items():
        add(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _add, run = _SUBCOMMANDS[args.command]
    try:
        return int(run(args) or 0)
    except StimsteerError as exc:
        sys.stderr.write(f"stimsteer {args.command}: error: {exc}\n")
        return 2
    except (FileNotFoundError, IsADirectoryError, PermissionError) as exc:
        sys.stderr.write(f"stimsteer {args.command}: error: {exc.strerror or exc}: {exc.filename}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("stimsteer: interrupted; no partial output was kept.\n")
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
