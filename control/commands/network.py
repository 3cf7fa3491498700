"""``stimsteer network``: network-control tables and figures of a fitted model or of a network map, in one folder.

Two sources:

- a model file (``stimsteer fit --route indirect``): its states are arbitrary coordinates, so the default figures are
  those seen through the recorded channels (output Gramians, squared H2 norms, output controllability, the least
  energy that produces an output pattern), which another equally good fit would give too. ``--state-figures`` adds
  average and modal controllability of ``A``, labelled coordinate-dependent. A fitted model is never rescaled.
- a network map (``--map``: a CSV with node names, or ``.npy``), with ``--stimulated`` nodes, optional
  ``--recorded`` nodes and a time convention (``--time``, ``--normalisation``; see
  :mod:`stimsteer.sysid.network.maps`): its states are the nodes, so the per-node state figures are written too.
  With ``--session``, the map's support constrains a model fitted to the session (:mod:`stimsteer.sysid.mapfit`),
  and its figures, fitted weights and held-out scores against an unconstrained fit are written.

With ``--session`` and trials labelled by condition (``--conditions`` or the session's metadata
``trial_conditions``), the figures per condition, their differences and bootstrap intervals over trials are written
too: for a map from map-constrained fits, for a model file by refitting its method (same settings) per condition.

=============================  =====================================================================================
file                           content
=============================  =====================================================================================
``controllability.csv``        Kalman rank, output rank, Gramian horizon, output Gramian condition, squared H2 norm
                               of all sites, the coordinates the figures refer to, time convention, normalisation
``gramian_spectrum.csv/.png``  eigenvalues of the output Gramian ``C W Cᵀ``, largest first
``site_controllability.csv``   per site: squared H2 norm to the recorded channels, output rank; best first
``site_sets.csv``              sites and site sets by squared H2 norm and worst-case unit-pattern energy
``state_controllability.csv``  maps (or ``--state-figures``): average and modal controllability per site
``impulse_responses.csv/.png`` impulse response of every recorded channel to every site
``site_ranking.csv/.png``      with a target: site sets by the least energy that produces the pattern; without one:
                               sites by squared H2 norm (figure only)
``transition.csv``             with a target: the least-energy input over the horizon using every site
``map_fit_edges.csv``          ``--session`` with a map: map weight and fitted weight of every connection
``map_fit_scores.csv``         ``--session`` with a map: held-out scores, map-constrained vs unconstrained
``conditions.csv``             ``--conditions``: per-condition figures, differences, bootstrap intervals
=============================  =====================================================================================
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from ...sysid import InvalidParameterError, StateSpaceForm, load_predictor
from ._common import add_channel_options, add_window_options, claimed, selection, whole_number, window_steps
from ...sysid.caution import CAUTION
from ...sysid.network.maps import NORMALISATIONS, TIME_CONVENTIONS, map_model, read_network_map
from ._network_write import NetworkOutputs, write_network_outputs
from ._network_session import model_condition_tables, session_outputs

__all__ = ["add_parser", "run", "NetworkOutputs", "read_pattern", "read_target", "state_space_of", "write_network_outputs"]


def add_parser(subparsers) -> None:
    """Declare ``stimsteer network`` and its options."""
    p = subparsers.add_parser("network", help="network-control tables and figures of a fitted state-space model or "
                              "of a network map: controllability, site ranking, minimum-energy transitions")
    p.add_argument("model", nargs="?", help="model file written by `stimsteer fit --route indirect` (or use --map)")
    p.add_argument("--out", required=True, help="output folder for the CSV tables and PNG figures")
    p.add_argument("--target", metavar="PATTERN",
                   help="target activity pattern: 'name=value,name=value' as in `plan` (channels not named are left "
                   "free), one value per recorded channel in model order ('0.5,0,1.2'), or a CSV file holding such a "
                   "row (optionally under a header of channel names)")
    p.add_argument("--start", metavar="PATTERN", help="start pattern, same forms as --target (channels not named "
                   "start at rest; default: rest)")
    p.add_argument("--free", metavar="CHANNELS", help="comma-separated channels left free at the end of the "
                   "transition (their target values are ignored)")
    add_window_options(p, past=None, horizon="length of the minimum-energy transition",
                       default="default: 2 x the model's states")
    p.add_argument("--gramian-steps", type=int, help="finite Gramian horizon in samples (default: infinite, which "
                   "needs a stable model)")
    p.add_argument("--max-set-size", type=int, choices=[1, 2, 3], default=2,
                   help="largest number of sites stimulated together in the rankings (default 2)")
    p.add_argument("--state-figures", action="store_true", help="fitted model: also write average and modal "
                   "controllability of A (coordinate-dependent: they change with the arbitrary state basis)")
    p.add_argument("--normalise", action="store_true", help="network maps: same as --normalisation sigma "
                   "(a fitted model is never rescaled)")
    g = p.add_argument_group("network map")
    g.add_argument("--map", metavar="FILE", help="adjacency matrix: CSV with a header of node names, or .npy; "
                   "entry (i, j) is the connection from node j to node i")
    g.add_argument("--node-names", metavar="NAMES", help=".npy maps: comma-separated node names")
    g.add_argument("--stimulated", metavar="NODES", help="comma-separated stimulated nodes (one site each)")
    g.add_argument("--recorded", metavar="NODES", help="comma-separated recorded nodes (default: every node)")
    g.add_argument("--time", choices=TIME_CONVENTIONS, default="discrete", help="time convention of the map")
    g.add_argument("--normalisation", choices=NORMALISATIONS, default=None,
                   help="none (default), sigma: A/(c+sigma_max), eigenvalue: A/(c+lambda_max); continuous maps "
                   "subtract I (Gu et al. 2015; Karrer et al. 2020)")
    g.add_argument("--normalisation-constant", type=float, default=1.0, metavar="C", help="c above (default 1)")
    g.add_argument("--time-step", type=float, default=1.0, help="continuous maps: map time units per model step")
    g.add_argument("--rate-hz", type=float, default=1.0, help="maps: model steps per second (default 1)")
    s = p.add_argument_group("stimulation data")
    s.add_argument("--session", metavar="FILE", help="with --map: session to fit the map-constrained model to; with "
                   "a model file: session whose trials are refitted per condition (--conditions)")
    add_channel_options(s)
    s.add_argument("--mixing", metavar="FILE", help="CSV: how the recorded channels mix the nodes (rows: channels, "
                   "header: node names); default each channel is the node of the same name")
    s.add_argument("--shrink", type=float, default=0.0, help="ridge weight pulling fitted weights toward the map's")
    s.add_argument("--conditions", metavar="LABELS", help="comma-separated condition label of every trial (default: "
                   "the session table's 'condition' column or its metadata 'trial_conditions')")
    s.add_argument("--bootstrap", type=int, default=200, help="bootstrap resamples over trials (default 200)")
    s.add_argument("--seed", type=whole_number(0), default=0, help="seed of the held-out split and the bootstrap")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")


def _names(text):
    return None if text is None else [c.strip() for c in text.split(",") if c.strip()]


def _map_source(args):
    """The model of ``--map`` (maps are normalised only when asked)."""
    if args.stimulated is None:
        raise InvalidParameterError("--map needs --stimulated NODES: the nodes that receive stimulation.")
    norm = args.normalisation or ("sigma" if args.normalise else "none")
    if args.normalise and args.normalisation not in (None, "sigma"):
        raise InvalidParameterError("--normalise means --normalisation sigma; give one of the two.")
    net = read_network_map(args.map, _names(args.node_names))
    if args.session is not None:
        net.indices(_names(args.stimulated), "stimulated nodes")
        return net, None
    model = map_model(net, stimulated=_names(args.stimulated), recorded=_names(args.recorded), time=args.time,
                      normalisation=norm, c=args.normalisation_constant, time_step=args.time_step,
                      sample_rate_hz=args.rate_hz)
    return net, model


def _check_sources(args):
    if (args.model is None) == (args.map is None):
        raise InvalidParameterError("give either a model file or --map FILE (a network map), not both or neither.")
    if args.start is not None and args.target is None:
        raise InvalidParameterError("--start needs --target: give the pattern to move to as well.")
    map_only = [f for f, v in (("--stimulated", args.stimulated), ("--recorded", args.recorded),
                               ("--node-names", args.node_names), ("--normalisation", args.normalisation),
                               ("--mixing", args.mixing),
                               ("--time continuous", "x" if args.time == "continuous" else None)) if v is not None]
    if args.map is None and (map_only or args.normalise):
        raise InvalidParameterError(
            f"{(map_only or ['--normalise'])[0]} applies to a network map (--map) only. A fitted model is analysed "
            "as fitted: rescaling it would change its time constants; for an unstable model use --gramian-steps N.")
    if args.session is None and (args.conditions is not None or args.mixing is not None):
        raise InvalidParameterError("--conditions and --mixing need --session.")
    if args.session is None and selection(args):
        raise InvalidParameterError("--inputs, --outputs and --drop choose channels of --session; a model file "
                                    "keeps the channels it was fitted on (choose them with `stimsteer fit --drop`).")
    if args.session is not None:
        fixed = [f for f, v in (("--recorded", args.recorded), ("--normalisation", args.normalisation),
                                ("--normalise", args.normalise or None), ("--node-names", None),
                                ("--time continuous", args.time == "continuous" or None)) if v is not None]
        if fixed:
            raise InvalidParameterError(
                f"{fixed[0]} does not apply with --session: the fitted model is discrete in the session's samples, "
                "its channels are the session's outputs (--mixing says how they mix the nodes), and it is never "
                "rescaled. Leave it out.")


def run(args) -> int:
    """Load the model or map, write the tables and figures, print the summary; 0 on success."""
    _check_sources(args)
    with claimed(args.out, force=args.force, command="network"):
        units = {}
        if args.map is not None:
            net, model = _map_source(args)
            extra = None
            if args.session is not None:  # the map gives the support; the session gives the weights
                model, extra = session_outputs(net, args)
        else:
            predictor, provenance = load_predictor(args.model)
            model = state_space_of(predictor, args.model)
            extra = None if args.session is None else model_condition_tables(predictor, args)
            recorded = provenance.get("session") if isinstance(provenance, dict) else None
            units = {k: recorded.get(k) for k in ("input_units", "output_units")} if isinstance(recorded, dict) else {}
        target, unnamed = (None, []) if args.target is None else read_target(args.target, model.output_names)
        start = None if args.start is None else read_target(args.start, model.output_names)[0]
        free = _names(args.free)
        if unnamed:  # as in plan: the channels a name=value target leaves out are not held to anything
            free = list(dict.fromkeys((free or []) + unnamed))
        result = write_network_outputs(model, args.out, target=target, start=start, free_channels=free,
                                       horizon_steps=window_steps(args.horizon, model.sample_rate_hz, "--horizon"),
                                       gramian_steps=args.gramian_steps,
                                       max_set_size=args.max_set_size, state_figures=args.state_figures,
                                       force=args.force, extra_tables=extra, **units)
    print("\n".join(result.lines))
    print(f"wrote {len(result.files)} files to {args.out}: " + ", ".join(sorted(p.name for p in result.files.values())))
    if target is not None:
        print("note: the minimum-energy input is a figure of the model, not a stimulation plan: no declared limit "
              "was applied to it. Design stimulation with `stimsteer plan --limits`.")
    print(CAUTION)
    return 0


# ---------------------------------------------------------------------------------------------------- inputs
def state_space_of(predictor, source: str = "the model file"):
    """The state-space model behind a loaded predictor (indirect route), or a clear error for the direct route.

    Dispatches on the contract: a predictor with the :class:`~stimsteer.sysid.protocols.StateSpaceForm`
    capability (``state_space_model()``) gives its model.

    Raises
    ------
    InvalidParameterError
        When the predictor has no state-space model (a direct-route data predictor).
    """
    if isinstance(predictor, StateSpaceForm):
        return predictor.state_space_model()
    raise InvalidParameterError(
        f"{source} holds a {type(predictor).__name__}, a direct-route data predictor without a state-space model; "
        "network figures need a state-space model. Fit one with `stimsteer fit SESSION --route indirect --method "
        "subspace` (or arx) and pass that file."
    )


def _numbers(cells, where) -> np.ndarray:
    try:
        return np.array([float(c) for c in cells], dtype=np.float64)
    except ValueError:
        raise InvalidParameterError(f"{where}: expected numbers separated by commas; got "
                                    f"{','.join(cells)!r}.") from None


def _channel_name(header: str) -> str:
    h = header.strip()
    h = h[4:] if h.startswith("out:") else h
    return h.split("[", 1)[0].strip()


def read_target(text: str, output_names):
    """A pattern of ``--target``/``--start``: ``name=value,...`` (as ``plan`` takes it) or any form of
    :func:`read_pattern`; returns ``(values, unnamed channels)``, the unnamed ones at 0."""
    if "=" not in str(text) or os.path.isfile(text):
        return read_pattern(text, output_names), []
    names = list(output_names)
    values = np.zeros(len(names))
    given = {}
    for cell in (c.strip() for c in str(text).split(",") if c.strip()):
        name, sep, number = cell.partition("=")
        name = name.strip()
        if not sep or name not in names:
            raise InvalidParameterError(f"pattern {text!r}: {name!r} is not a recorded channel of the model; its "
                                        f"channels are {', '.join(names)} (write name=value,name=value).")
        if name in given:
            raise InvalidParameterError(f"pattern {text!r}: {name} is given twice.")
        value = _numbers([number.strip()], f"pattern {text!r}, channel {name}")[0]
        if not np.isfinite(value):
            raise InvalidParameterError(f"pattern {text!r}: {name} = {value} must be finite.")
        given[name] = value
        values[names.index(name)] = value
    return values, [n for n in names if n not in given]


def read_pattern(text: str, output_names) -> np.ndarray:
    """An activity pattern from the command line: ``"0.5,0,1.2"`` or a CSV file holding such a row.

    A file may start with a header row of channel names (plain, or ``out:<name> [<unit>]`` as in session tables);
    its columns are then matched to the model's outputs by name. Lines starting with ``#`` are skipped.

    Parameters
    ----------
    text : str
        The numbers, or a path to the file.
    output_names : sequence of str
        The model's recorded channels.

    Returns
    -------
    ndarray, shape (n_outputs,)

    Raises
    ------
    InvalidParameterError
        Wrong count, non-numbers, or header names that do not match the model's outputs.
    """
    names = list(output_names)
    where = f"pattern {text!r}"
    if os.path.isfile(text):
        lines = [ln.strip() for ln in Path(text).read_text(encoding="utf-8-sig").splitlines()]
        rows = [[c.strip() for c in ln.split(",")] for ln in lines if ln and not ln.startswith("#")]
        if not rows:
            raise InvalidParameterError(f"{where} is an empty file; write one row of {len(names)} values.")
        header = None
        try:
            [float(c) for c in rows[0]]
        except ValueError:
            header, rows = [_channel_name(c) for c in rows[0]], rows[1:]
        if not rows:
            raise InvalidParameterError(f"{where} has a header but no row of values.")
        values = _numbers(rows[0], where)
        if header is not None:
            if sorted(header) != sorted(names) or len(header) != len(values):
                raise InvalidParameterError(f"{where}: the header names {header} must be the model's outputs {names}.")
            values = values[[header.index(n) for n in names]]
    else:
        values = _numbers([c.strip() for c in text.split(",") if c.strip()], where)
    if values.shape != (len(names),):
        raise InvalidParameterError(
            f"{where}: expected {len(names)} finite values, one per recorded channel ({', '.join(names)}); got "
            f"{values.size}."
        )
    bad = [f"{names[i]} = {values[i]}" for i in np.flatnonzero(~np.isfinite(values))]
    if bad:
        raise InvalidParameterError(
            f"{where}: every value must be finite, but {', '.join(bad)}; give a number for each channel (use --free "
            "CHANNELS to leave a channel unconstrained)."
        )
    return values


