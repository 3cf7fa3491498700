"""``stimsteer inspect``: summarise a session (channels, rate, trials, gaps, flat or saturated channels), its
excitation, stimulation artifacts in its outputs (:func:`stimsteer.sysid.artifacts.detect_artifacts`), and how its
channels were aligned onto the model grid when it was built from a recording (``stimsteer convert``)."""

from __future__ import annotations

import dataclasses
from pathlib import Path

from ...sysid import excitation_report, describe_session
from ...sysid.window_defaults import resolve_windows
from ...sysid._claims import claim_output
from ...sysid._files import atomic_path
from ...sysid.artifacts import ARTIFACT_RATIO_THRESHOLD, detect_artifacts
from ...sysid.exceptions import InvalidParameterError
from ._common import add_channel_options, add_window_options, open_selected, whole_number

__all__ = ["add_parser", "run", "alignment_text", "blanked_text", "gap_lines"]


def add_parser(subparsers) -> None:
    """Declare ``stimsteer inspect`` and its options."""
    p = subparsers.add_parser("inspect", help="summarise a session: channels, rate, trials, gaps, flat or saturated "
                              "channels, stimulation artifacts, clock alignment")
    p.add_argument("session", help="session file (our HDF5 layout, CSV/Parquet table, or NWB)")
    add_window_options(p, past="past window of the direct route, for the excitation check",
                       horizon="prediction horizon of the direct route, for the excitation check")
    add_channel_options(p)
    p.add_argument("--states", type=whole_number(0), default=None, metavar="N",
                   help="state dimension assumed by the excitation check (default: the past window)")
    p.add_argument("--artifact-window-s", type=float, default=None, metavar="S",
                   help="window after each stimulation onset for the artifact check, seconds (default one sample "
                   "or 2 ms, whichever is longer)")
    p.add_argument("--artifact-ratio", type=float, default=ARTIFACT_RATIO_THRESHOLD, metavar="R",
                   help="flag a channel whose post-onset power exceeds R times its pre-onset level "
                   f"(default {ARTIFACT_RATIO_THRESHOLD:g})")
    p.add_argument("--artifact-figure", default=None, metavar="PNG",
                   help="write the onset-locked power of every output channel to this PNG")
    p.add_argument("--force", action="store_true", help="replace an existing --artifact-figure file")


def alignment_text(metadata) -> list[str]:
    """Lines on how a session's channels were put on the model grid (empty for sessions not built by convert)."""
    lines = []
    for a in metadata.get("clock_alignment", []) or []:
        lines.append(f"  {a['channel']}: {a['source_rate_hz']:g} Hz -> {a['target_rate_hz']:g} Hz, clock offset "
                     f"{a['offset_s']:g} s, {a['method']}; {a['n_samples_outside_source']} model sample(s) outside "
                     "its span (masked)")
    if "pulse_mapping" in metadata:
        m = metadata["pulse_mapping"]
        lines.append(f"  pulses -> inputs: {m.get('name')} ({m.get('rule')}); {m.get('n_pulses')} pulse(s) placed, "
                     f"{m.get('n_pulses_off_grid')} off the grid")
    return (["clock alignment (model grid):"] + lines) if lines else []


def gap_lines(metadata) -> list[str]:
    """Lines on the rows a table reader masked because a cell was missing (channel, samples, first time): an empty
    cell or one marked missing (``n/a``, ``NA``, ``nan``, ``null``: pandas' missing-value marks)."""
    cells = metadata.get("masked_empty_cells") or []
    return [f"gap: {c['samples']} sample(s) of {c['channel']} are missing (empty cells or a "
            f"mark such as n/a), first at t = {c['first_s']:.6g} s; "
            "those rows are masked (excluded from fits and scores)" for c in cells]


def _check_args(args) -> None:
    if args.artifact_window_s is not None and not args.artifact_window_s > 0:
        raise InvalidParameterError(f"--artifact-window-s must be a positive number of seconds; got "
                                    f"{args.artifact_window_s}.")
    if not args.artifact_ratio > 0:
        raise InvalidParameterError(f"--artifact-ratio must be positive; got {args.artifact_ratio}.")
    if args.artifact_figure is not None and Path(args.artifact_figure).suffix.lower() != ".png":
        raise InvalidParameterError(f"--artifact-figure must name a .png file; got {args.artifact_figure}.")


def blanked_text(session) -> str | None:
    """A line on the outputs hidden by blanking (``Session.output_mask``), or None when none is."""
    om = getattr(session, "output_mask", None)  # a lazily opened file without blanking has none
    if om is None or bool(om.all()):
        return None
    inside = sum(int(b - a) for a, b in session.trials)
    hidden = sum(int((~om[a:b]).sum()) for a, b in session.trials)
    return (f"blanked outputs: {hidden} in-trial sample(s) ({100 * hidden / max(inside, 1):.1f} %); their inputs "
            "stay valid, fits and scores skip the blanked outputs")


def _report(session, args):
    # read one trial at a time: a lazily opened file is never loaded whole
    return detect_artifacts(session, window_s=args.artifact_window_s, ratio_threshold=args.artifact_ratio)


def run(args) -> int:
    """Print the session summary (with artifact warnings), the excitation report, the artifact table and the clock
    alignment; write the artifact figure when asked; 0 on success."""
    _check_args(args)
    fig_path = Path(args.artifact_figure) if args.artifact_figure else None
    with open_selected(args.session, args) as session:  # our HDF5 layout is read lazily, in one pass each
        past, horizon, window_note = resolve_windows(session, args.past, args.horizon)
        summary = describe_session(session)
        artifacts = _report(session, args)
        if artifacts is not None and artifacts.flagged:
            summary = dataclasses.replace(summary, warnings=tuple(summary.warnings) + tuple(artifacts.warnings()))
        gaps = tuple(gap_lines(session.metadata))  # masked rows are a note under the verdict, not a problem
        if gaps:
            summary = dataclasses.replace(summary, notes=tuple(summary.notes) + gaps)
        print(summary.to_text())
        if blanked_text(session):
            print(blanked_text(session))
        if window_note:
            print(window_note)
        print(excitation_report(session, past_steps=past, horizon_steps=horizon, n_states=args.states).to_text())
        print(artifacts.to_text() if artifacts is not None else
              "artifacts: no stimulation onset with a clean (unblanked, valid) window before and after it; nothing "
              "to check.")
        for line in alignment_text(session.metadata):
            print(line)
    if fig_path is not None:
        if artifacts is None:
            raise InvalidParameterError("--artifact-figure: the session has no stimulation onset to lock to; "
                                        "nothing was written.")
        from ..figures.artifacts import artifact_figure
        with claim_output(fig_path, force=args.force), atomic_path(fig_path) as tmp:
            artifact_figure(artifacts).savefig(tmp, dpi=110, format="png")
        print(f"wrote {fig_path}")
    return 0
