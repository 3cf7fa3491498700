"""``stimsteer convert``: a session file from a lab's recording (EDF/BDF, BrainVision, FIF, Neo, NWB, BIDS) and a
description file saying which channels are inputs and outputs, which events open trials, the model grid, the
artifact handling and the biomarkers (:mod:`stimsteer.sysid.description`).

The output is claimed before anything is read and written atomically; the recording is only read.
"""

from __future__ import annotations

from pathlib import Path

from ...sysid._claims import claim_output
from ...sysid.description import load_description
from ...sysid.exceptions import FileFormatError
from ...sysid.from_recording import build_session, read_recording
from ...sysid.io import save_session
from ...sysid.quality import describe_session

__all__ = ["add_parser", "run", "add_blank_option", "blank_outputs"]


def add_blank_option(p) -> None:
    """Declare ``--blank-outputs-ms`` (shared by ``convert`` and ``fit``)."""
    p.add_argument("--blank-outputs-ms", dest="blank_ms", type=float, default=None, metavar="MS",
                   help="hide the recorded outputs for MS milliseconds from every stimulation onset (the "
                   "inputs stay valid; fits and scores skip the hidden outputs)")


def blank_outputs(session, blank_ms):
    """The session with its outputs blanked after every onset (``--blank-outputs-ms``), and a line saying what was
    done (None when the option was not given). A lazily opened file is loaded first (blanking needs the inputs
    of the whole recording to find the onsets)."""
    if blank_ms is None:
        return session, None
    import math

    from ...sysid.artifacts import blank_artifacts
    from ...sysid.exceptions import InvalidParameterError

    if not (math.isfinite(blank_ms) and blank_ms > 0):
        raise InvalidParameterError(f"--blank-outputs-ms must be a positive number of milliseconds; got {blank_ms}.")
    whole = session if hasattr(session, "replace") else session.to_session()
    out = blank_artifacts(whole, window_s=blank_ms / 1000.0)
    step = out.metadata["prep"][-1]
    return out, (f"blanked outputs: {step['n_blanked']} sample(s) ({100 * out.blanked_output_fraction:.1f} % of the "
                 f"valid in-trial outputs) in {step['window_samples']}-sample windows after {step['n_onsets']} "
                 "stimulation onset(s); inputs kept")


def add_parser(subparsers) -> None:
    """Declare ``stimsteer convert`` and its options."""
    p = subparsers.add_parser("convert", help="build a session file from a recording (EDF/BDF, BrainVision, FIF, "
                              "Neo, NWB, BIDS) and a description file")
    p.add_argument("recording", help="the recording: a file, or a BIDS dataset's root folder")
    p.add_argument("--description", required=True, metavar="TOML",
                   help="description file: inputs, outputs, trials, grid, artifacts, biomarkers "
                   "(see stimsteer.sysid.description)")
    p.add_argument("--out", required=True, help="session file to write (.h5, .csv, .parquet or .nwb)")
    p.add_argument("--force", action="store_true", help="replace an existing output file")
    add_blank_option(p)


def run(args) -> int:
    """Read, build, write; print the session summary and what was done; 0 on success."""
    out = Path(args.out)
    if out.suffix.lower() not in (".h5", ".hdf5", ".csv", ".parquet", ".nwb"):
        raise FileFormatError(f"--out {out}: expected a session file ending in .h5, .hdf5, .csv, .parquet or .nwb; "
                              f"got '{out.suffix}'.")
    if Path(args.recording).resolve() == out.resolve():
        raise FileFormatError(f"--out {out} is the recording itself; the source is never overwritten. Choose "
                              "another name.")
    description = load_description(args.description)
    with claim_output(out, force=args.force):
        recording = read_recording(args.recording, description)
        session = build_session(recording, description, source=str(args.recording))
        session, blanked = blank_outputs(session, args.blank_ms)
        save_session(session, out, overwrite=args.force)
    print(describe_session(session).to_text())
    meta = session.metadata
    for a in meta.get("clock_alignment", []):
        if a["source_rate_hz"] != a["target_rate_hz"] or a["offset_s"] or a["n_samples_outside_source"]:
            print(f"clock: {a['channel']} {a['source_rate_hz']:g} Hz -> {a['target_rate_hz']:g} Hz, offset "
                  f"{a['offset_s']:g} s, {a['method']}; {a['n_samples_outside_source']} sample(s) outside its span")
    if "trials_from_events" in meta:
        t = meta["trials_from_events"]
        print(f"trials: {t['n_trials']} from {t['n_events']} events; {len(t['out_of_range_s'])} window(s) outside "
              f"the recording dropped; {len(t['overlapping_s'])} overlapping pair(s) ({t['overlap']})")
    if blanked:
        print(blanked)
    print(f"wrote {out}")
    return 0
