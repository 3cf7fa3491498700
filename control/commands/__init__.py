"""One module per ``stimsteer`` subcommand: the file workflow (load, call the public API, write the outputs
atomically). No argument parsing here (that is ``stimsteer.control.cli``) and no numerics (that is the API).

* :mod:`.bench` — ``stimsteer bench``: claim the output folder, run the benchmark, write the report.
"""
