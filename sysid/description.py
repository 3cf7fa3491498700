"""The description file: how a lab's recording becomes a session (which channels are inputs and outputs, which events
open trials, the model grid, artifacts, biomarkers). A small TOML file of our own; ``stimsteer convert`` reads it.

Layout (every table optional except ``[channels]``; every key listed here, no other)::

    [recording]                 # how to open the source
    neo_io = "BlackrockIO"      # a Neo IO for acquisition formats not recognised by content
    segment = 0                 # Neo segment
    bids = {subject = "01", task = "stim", session = "1", run = "1"}   # entities, for a BIDS root folder

    [channels]
    inputs = ["STIM1"]          # recorded stimulation channels (model inputs), in order
    outputs = ["LFP1", "LFP2"]  # recorded channels that are model outputs, in order
    output_types = ["seeg"]     # and/or every channel of these kinds (MNE channel types, NWB series places)
    output_unit = "uV"          # convert every output to this unit (by the quantities library)
    input_unit = "uA"           # the same for recorded input channels

    [pulses]                    # stimulation as a pulse table instead of (or beside) input channels
    file = "pulses.csv"         # columns time_s, site, amplitude (relative to this file); or
    from_recording = true       # the pulses the source carries (BIDS events.tsv stimulation columns)
    sites = ["A", "B"]          # input names, in order
    unit = "uA"
    clock_offset_s = 0.0        # t_model = t_pulse + clock_offset_s

    [grid]
    sample_rate_hz = 1000.0     # default: the first output's rate
    output_anti_aliasing = "fir"    # fir | mean | none (stimsteer.sysid.events.ANTI_ALIASING)
    input_anti_aliasing = "mean"
    clock_offset_s = {STIM1 = 0.0}  # per channel: t_model = t_channel + offset

    [trials]                    # default: one trial over the whole grid
    events = ["stim_on"]        # event labels (annotations, event tables, NWB intervals); or
    trigger = "TRIG"            # a trigger channel with
    threshold = 2.5             # its threshold (in its unit) and
    min_interval_s = 0.0        # the shortest interval between triggers; or
    pulse_trains_gap_s = 0.5    # the first pulse of every train (pulses more than this apart)
    before_s = 0.5
    after_s = 2.0
    overlap = "merge"           # merge | drop

    [artifacts]
    method = "template"         # blank | template | interpolate
    window_s = 0.004
    threshold = 0.0
    scale = "amplitude"         # template only: amplitude | none

    [line_noise]
    line_hz = 50.0
    harmonics = 3
    quality = 30.0
    phase = "causal"            # causal | zero-phase (required)

    [[biomarkers]]
    kind = "band_power"         # band_power | spike_rate
    channels = ["LFP1"]         # band_power: outputs to take the envelope of
    band_hz = [13.0, 30.0]
    phase = "causal"            # required
    smoothing_hz = 5.0
    order = 4
    keep_source = false
    names = ["LFP1_beta"]
    # kind = "spike_rate": units = ["unit_0"] (spike trains of the source), names = [...]

Order of the steps: channels onto the grid (clock alignment), pulses, masks from bad intervals, line noise,
artifacts, biomarkers, trials. Each step is recorded in the session metadata.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from .exceptions import InvalidParameterError

__all__ = ["Description", "load_description", "parse_description"]

_KEYS = {
    "recording": {"neo_io", "segment", "bids"},
    "channels": {"inputs", "outputs", "output_types", "output_unit", "input_unit"},
    "pulses": {"file", "from_recording", "sites", "unit", "clock_offset_s", "stimulation"},
    "grid": {"sample_rate_hz", "output_anti_aliasing", "input_anti_aliasing", "clock_offset_s"},
    "trials": {"events", "trigger", "threshold", "min_interval_s", "pulse_trains_gap_s", "before_s", "after_s",
               "overlap"},
    "artifacts": {"method", "window_s", "threshold", "scale"},
    "line_noise": {"line_hz", "harmonics", "quality", "phase"},
    "biomarkers": {"kind", "channels", "band_hz", "phase", "smoothing_hz", "order", "keep_source", "names",
                   "units"},
}


@dataclass(frozen=True)
class Description:
    """A parsed description (the tables of the file as dicts; see the module docstring).

    Attributes
    ----------
    recording, channels, pulses, grid, trials, artifacts, line_noise : dict
    biomarkers : list of dict
    folder : Path
        Where relative file names (the pulse table) are resolved.
    """

    channels: dict
    recording: dict = field(default_factory=dict)
    pulses: dict = field(default_factory=dict)
    grid: dict = field(default_factory=dict)
    trials: dict = field(default_factory=dict)
    artifacts: dict = field(default_factory=dict)
    line_noise: dict = field(default_factory=dict)
    biomarkers: list = field(default_factory=list)
    folder: Path = Path(".")

    def as_dict(self) -> dict:
        """The description as read (for the session metadata)."""
        return {k: getattr(self, k) for k in ("recording", "channels", "pulses", "grid", "trials", "artifacts",
                                              "line_noise", "biomarkers")}


def _names(where: str, value) -> list[str]:
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not all(isinstance(v, str) and v for v in value):
        raise InvalidParameterError(f"{where} must be a list of channel names; got {value!r}.")
    return value


def _check_table(name: str, table, source: str) -> dict:
    if not isinstance(table, dict):
        raise InvalidParameterError(f"{source}: [{name}] must be a table; got {type(table).__name__}.")
    unknown = sorted(set(table) - _KEYS[name])
    if unknown:
        raise InvalidParameterError(f"{source}: unknown key(s) {unknown} in [{name}]; the keys are "
                                    f"{sorted(_KEYS[name])}.")
    return dict(table)


def parse_description(data: dict, *, source: str = "description", folder=".") -> Description:
    """Check a description's tables and keys (values are checked where they are used).

    Raises
    ------
    InvalidParameterError
        An unknown table or key, a missing ``[channels]``, no outputs, or neither inputs nor pulses.
    """
    unknown = sorted(set(data) - set(_KEYS))
    if unknown:
        raise InvalidParameterError(f"{source}: unknown table(s) {unknown}; the tables are {sorted(_KEYS)}.")
    if "channels" not in data:
        raise InvalidParameterError(f"{source}: [channels] is missing; name the outputs (and inputs) there.")
    tables = {k: _check_table(k, v, source) for k, v in data.items() if k != "biomarkers"}
    chans = tables["channels"]
    chans["output_types"] = _names(f"{source}: [channels] output_types", chans.get("output_types", []))
    chans["outputs"] = _names(f"{source}: [channels] outputs", chans.get("outputs", []))
    if not chans["outputs"] and not chans["output_types"]:
        raise InvalidParameterError(f"{source}: [channels] outputs must be a list of channel names; got an empty "
                                    "list. Name at least one recorded output (or give output_types).")
    chans["inputs"] = _names(f"{source}: [channels] inputs", chans.get("inputs", []))
    if not chans["inputs"] and not tables.get("pulses"):
        raise InvalidParameterError(f"{source}: no model inputs: name input channels in [channels] inputs or give "
                                    "a [pulses] table.")
    bios = data.get("biomarkers", [])
    if not isinstance(bios, list):
        raise InvalidParameterError(f"{source}: biomarkers must be an array of tables ([[biomarkers]]).")
    bios = [_check_table("biomarkers", b, source) for b in bios]
    return Description(biomarkers=bios, folder=Path(folder), **tables)


def load_description(path) -> Description:
    """Read and check a description file (TOML).

    Raises
    ------
    FileNotFoundError
        No such file.
    InvalidParameterError
        Not valid TOML (line and reason given), or bad tables or keys.
    """
    try:
        import tomllib
    except ModuleNotFoundError:  # Python < 3.11
        import tomli as tomllib
    path = Path(path)
    raw = path.read_bytes()
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise InvalidParameterError(f"{path} is not a valid TOML description ({exc}).") from None
    return parse_description(data, source=str(path), folder=path.parent)
