"""``stimsteer inspect``: summarise a session (channels, rate, trials, gaps, flat or saturated channels) and its
excitation."""

from __future__ import annotations

from ...sysid import excitation_report, describe_session, open_session_source

__all__ = ["add_parser", "run"]


def add_parser(subparsers) -> None:
    """Declare ``stimsteer inspect`` and its options."""
    p = subparsers.add_parser("inspect", help="summarise a session: channels, rate, trials, gaps, flat or saturated "
                              "channels")
    p.add_argument("session", help="session file (our HDF5 layout, CSV/Parquet table, or NWB)")
    p.add_argument("--past-steps", dest="past", type=int, default=10, metavar="N",
                   help="past window of the direct route, in samples, for the excitation check (default 10)")
    p.add_argument("--horizon-steps", dest="horizon", type=int, default=20, metavar="N",
                   help="prediction horizon of the direct route, in samples, for the excitation check (default 20)")
    p.add_argument("--states", type=int, default=None, metavar="N",
                   help="state dimension assumed by the excitation check (default: the past window)")


def run(args) -> int:
    """Print the session summary and the excitation report; 0 on success."""
    with open_session_source(args.session) as session:  # our HDF5 layout is read lazily, in one pass each
        print(describe_session(session).to_text())
        print(excitation_report(session, past_steps=args.past, horizon_steps=args.horizon,
                                n_states=args.states).to_text())
    return 0
