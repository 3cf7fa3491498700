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

__all__ = ["add_parser", "run"]


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
    print(f"wrote {out}")
    return 0
