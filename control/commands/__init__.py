"""stimsteer.control.commands: one module per ``stimsteer`` subcommand.

Each module holds the file workflow of its subcommand (load, call the public API, write CSV/JSON/PNG atomically,
print) and exposes ``add_parser(subparsers) -> None`` and ``run(args) -> int``; :mod:`stimsteer.control.cli` only
parses, calls ``run`` and maps errors to exit codes.
"""

__all__: list[str] = []
