"""``stimsteer demo``: the whole job on the shipped demo session, every step a ``stimsteer`` subcommand."""

from __future__ import annotations

from ..demo import DemoStepFailed, run_demo
from ._common import claimed

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    """Declare ``stimsteer demo`` and its options."""
    p = subparsers.add_parser("demo", help="run the whole job on the shipped demo session and write the outputs to "
                              "--out")
    p.add_argument("--out", required=True, help="output folder (must be new or empty, unless --force)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")


def run(args, *, run_step) -> int:
    """Run the demo into ``args.out``; ``run_step(argv) -> int`` runs each step (the command line's ``main``)."""
    with claimed(args.out, force=args.force, command="demo"):
        try:
            run_demo(args.out, run_step=run_step, force=args.force, echo=print)
        except DemoStepFailed as failed:  # the step printed its own one line; a second would only repeat it
            return failed.code
    return 0
