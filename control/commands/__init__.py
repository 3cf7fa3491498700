"""One module per ``stimsteer`` subcommand: the file workflow (load, call the public API, write files atomically).

Each module offers ``add_parser(subparsers)`` and ``run(args) -> int``; :mod:`stimsteer.control.cli` only parses
the command line, calls a command and maps errors to exit codes.
"""
