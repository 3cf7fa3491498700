"""``stimsteer network``: network-control tables and figures of a fitted state-space model, in one folder.

:func:`write_network_outputs` computes everything with :mod:`stimsteer.sysid.network`, draws the figures of
:mod:`stimsteer.control.figures.network` and writes one folder, atomically:

=============================  =====================================================================================
file                           content
=============================  =====================================================================================
``controllability.csv``        one row per figure: Kalman rank and its tolerance, Gramian horizon, condition,
                               average controllability, the normalisation used, spectral radius
``gramian_spectrum.csv/.png``  eigenvalues of the controllability Gramian, largest first (log scale)
``site_controllability.csv``   average and modal controllability per stimulation site, best average first
``impulse_responses.csv/.png`` impulse response of every recorded channel to every site (long table; grid figure)
``site_ranking.csv/.png``      with a target: single sites and site sets ranked by the minimum energy they need;
                               without one: the sites ranked by average controllability
``transition.csv``             with a target: the minimum-energy input over the horizon using every site
=============================  =====================================================================================
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ...sysid import (InvalidParameterError, StateSpaceForm, UnstableModelError, controllability,
                      impulse_responses, load_predictor, pattern_transition, rank_sites, site_controllability)
from ...sysid._files import atomic_dir
from ...sysid.caution import CAUTION

if TYPE_CHECKING:
    from ...sysid import StateSpaceModel

__all__ = ["add_parser", "run", "NetworkOutputs", "read_pattern", "state_space_of", "write_network_outputs"]


_DPI = 110


@dataclass(frozen=True)
class NetworkOutputs:
    """What :func:`write_network_outputs` wrote and found.

    Attributes
    ----------
    files : dict
        File role -> final path.
    lines : tuple of str
        A short summary for the terminal.
    """

    files: dict
    lines: tuple


def add_parser(subparsers) -> None:
    """Declare ``stimsteer network`` and its options."""
    p = subparsers.add_parser("network", help="network-control tables and figures of a fitted state-space model: "
                              "controllability, site ranking, minimum-energy transitions")
    p.add_argument("model", help="model file written by `stimsteer fit --route indirect`")
    p.add_argument("--out", required=True, help="output folder for the CSV tables and PNG figures")
    p.add_argument("--target", metavar="PATTERN",
                   help="target activity pattern: one value per recorded channel, comma-separated (e.g. "
                   "'0.5,0,1.2'), or a CSV file holding such a row (optionally under a header of channel names)")
    p.add_argument("--start", metavar="PATTERN", help="start pattern, same forms as --target (default: rest)")
    p.add_argument("--horizon-steps", type=int, help="samples of the minimum-energy transition (default 2 x states)")
    p.add_argument("--max-set-size", type=int, choices=[1, 2, 3], default=2,
                   help="largest number of sites stimulated together in the ranking (default 2)")
    p.add_argument("--normalise", action="store_true",
                   help="analyse A / (1 + sigma_max(A)) for Gramian and site controllability (Gu et al. 2015); "
                   "default: the fitted A as it is")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")


def run(args) -> int:
    """Load the model, write the tables and figures, print the summary; 0 on success."""
    if args.start is not None and args.target is None:
        raise InvalidParameterError("--start needs --target: give the pattern to move to as well.")
    predictor, provenance = load_predictor(args.model)
    model = state_space_of(predictor, args.model)
    target = None if args.target is None else read_pattern(args.target, model.output_names)
    start = None if args.start is None else read_pattern(args.start, model.output_names)
    recorded = provenance.get("session") if isinstance(provenance, dict) else None
    units = {k: recorded.get(k) for k in ("input_units", "output_units")} if isinstance(recorded, dict) else {}
    result = write_network_outputs(model, args.out, target=target, start=start, horizon_steps=args.horizon_steps,
                                   max_set_size=args.max_set_size, normalise=args.normalise, force=args.force,
                                   **units)
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
    if values.shape != (len(names),) or not np.all(np.isfinite(values)):
        raise InvalidParameterError(
            f"{where}: expected {len(names)} finite values, one per recorded channel ({', '.join(names)}); got "
            f"{values.size}."
        )
    return values


# ---------------------------------------------------------------------------------------------------- tables
def _summary_table(rep, model):
    rows = [
        ("n_states", model.n_states), ("n_sites", model.n_inputs), ("n_channels", model.n_outputs),
        ("spectral_radius", model.spectral_radius), ("kalman_rank", rep.rank), ("kalman_rank_tolerance", rep.rank_tol),
        ("controllable", rep.is_controllable),
        ("gramian_horizon_steps", "infinite" if rep.horizon_steps is None else rep.horizon_steps),
        ("gramian_condition_number", rep.condition_number),
        ("average_controllability", rep.average_controllability), ("normalisation", rep.normalisation),
    ]
    return pd.DataFrame(rows, columns=["quantity", "value"])


def _impulse_table(h, model, units=None):
    T, p, m = h.shape
    k, i, j = np.meshgrid(np.arange(T), np.arange(p), np.arange(m), indexing="ij")
    table = pd.DataFrame({
        "step": k.ravel(), "time [s]": k.ravel() / model.sample_rate_hz,
        "site": np.asarray(model.input_names)[j.ravel()], "channel": np.asarray(model.output_names)[i.ravel()],
        "response": h.ravel(),
    })
    if units is not None:
        per = np.array([[f"{units[1][a]}/{units[0][b]}" for b in range(m)] for a in range(p)], dtype=object)
        table["response unit"] = per[i.ravel(), j.ravel()]
    return table


def _units(model, input_units, output_units):
    """``(input_units, output_units)`` checked against the model's channels, or None when either is missing."""
    if input_units is None or output_units is None:
        return None
    iu, ou = tuple(str(x) for x in input_units), tuple(str(x) for x in output_units)
    if len(iu) != model.n_inputs or len(ou) != model.n_outputs:
        raise InvalidParameterError(f"expected {model.n_inputs} input units and {model.n_outputs} output units (one "
                                    f"per channel of the model); got {len(iu)} and {len(ou)}.")
    return iu, ou


def _transition_table(tr, model):
    T = tr.u.shape[0]
    cols = {"step": np.arange(T), "time [s]": np.arange(T) / model.sample_rate_hz}
    for j, name in enumerate(model.input_names):
        cols[name] = tr.u[:, j]
    return pd.DataFrame(cols)


# ---------------------------------------------------------------------------------------------------- outputs
def _check_stable(model, normalise):
    if not normalise and not model.is_stable:
        raise UnstableModelError(
            f"the model is unstable (spectral radius {model.spectral_radius:.4f} >= 1), so its Gramian and modal "
            "controllability do not exist. Pass --normalise to analyse A / (1 + sigma_max(A)), or refit a stable "
            "model."
        )


def write_network_outputs(model: StateSpaceModel, out_dir, *, target=None, start=None,
                          horizon_steps: int | None = None, max_set_size: int = 2, normalise: bool = False,
                          impulse_steps: int | None = None, force: bool = False, input_units=None,
                          output_units=None) -> NetworkOutputs:
    """Compute the network-control tables and figures of a model and write them to ``out_dir``.

    Parameters
    ----------
    model : StateSpaceModel
    out_dir : str or Path
        New or empty folder (replaced whole with ``force``).
    target, start : ndarray, shape (n_outputs,), optional
        Activity patterns (recorded output units); with ``target`` the site ranking and the minimum-energy input
        are written. ``start`` defaults to rest.
    horizon_steps : int, optional
        Horizon of the minimum-energy transitions; default ``2 * n_states``.
    max_set_size : {1, 2, 3}, default 2
    normalise : bool, default False
        Analyse ``A / (1 + sigma_max(A))`` for the Gramian and per-site controllability (the transition and the
        ranking always use the model itself).
    impulse_steps : int, optional
        Length of the impulse responses; default ``max(20, 3 * n_states)``.
    force : bool, default False
    input_units, output_units : sequence of str, optional
        Units of the sites and channels (the model file's provenance has them); with both, the impulse-response
        figure labels its axes with them and its table gains a ``response unit`` column.

    Returns
    -------
    NetworkOutputs

    Raises
    ------
    UnstableModelError
        For an unstable model without ``normalise``.
    InvalidParameterError
        For a horizon that is not a whole number >= 1, or unit lists that do not match the model's channels.
    """
    _check_stable(model, normalise)
    units = _units(model, input_units, output_units)
    n = model.n_states
    T = max(2 * n, 1) if horizon_steps is None else horizon_steps
    if isinstance(T, bool) or not isinstance(T, (int, np.integer)) or T < 1:
        raise InvalidParameterError(f"horizon_steps must be a whole number of samples >= 1; got {horizon_steps!r}.")
    rep = controllability(model, normalise=normalise)
    sites = site_controllability(model, normalise=normalise)
    h = impulse_responses(model, max(20, 3 * n) if impulse_steps is None else impulse_steps)
    lines = [
        f"model: {n} states, {model.n_inputs} sites, {model.n_outputs} channels, spectral radius "
        f"{model.spectral_radius:.4f}",
        f"Kalman rank {rep.rank} of {n} (tolerance {rep.rank_tol:.3g}): "
        + ("controllable" if rep.is_controllable else "NOT controllable from these sites"),
        f"Gramian (infinite horizon, normalisation: {rep.normalisation}): condition {rep.condition_number:.3g}, "
        f"average controllability {rep.average_controllability:.4g}",
    ]
    order = np.argsort(-sites.average, kind="stable")
    out = Path(out_dir)
    from ..figures import network as figures  # matplotlib is loaded only when a figure is drawn

    with atomic_dir(out, force=force) as tmp:
        _summary_table(rep, model).to_csv(tmp / "controllability.csv", index=False)
        _write_spectrum(rep, tmp, figures)
        sites.to_frame().iloc[order].to_csv(tmp / "site_controllability.csv", index=False, float_format="%.10g")
        _impulse_table(h, model, units).to_csv(tmp / "impulse_responses.csv", index=False, float_format="%.10g")
        figures.impulse_response_figure(h, model, units).savefig(tmp / "impulse_responses.png", dpi=_DPI)
        if target is None:
            figures.ranking_figure([sites.site_names[i] for i in order], sites.average[order],
                                   f"Sites by average controllability (normalisation: {sites.normalisation})",
                                   "average controllability (trace of the site's Gramian)",
                                   ).savefig(tmp / "site_ranking.png", dpi=_DPI)
        else:
            lines += _write_target(model, tmp, target, start, T, max_set_size, figures)
    names = ["controllability.csv", "gramian_spectrum.csv", "gramian_spectrum.png", "site_controllability.csv",
             "impulse_responses.csv", "impulse_responses.png", "site_ranking.png"]
    if target is not None:
        names += ["site_ranking.csv", "transition.csv"]
    files = {name: out / name for name in names}
    return NetworkOutputs(files=files, lines=tuple(lines))


def _write_spectrum(rep, tmp, figures):
    eig = np.asarray(rep.gramian_eigenvalues)
    pd.DataFrame({"index": np.arange(1, eig.size + 1), "eigenvalue": eig}).to_csv(
        tmp / "gramian_spectrum.csv", index=False, float_format="%.10g")
    figures.gramian_spectrum_figure(rep).savefig(tmp / "gramian_spectrum.png", dpi=_DPI)


def _write_target(model, tmp, target, start, T, max_set_size, figures):
    pt = pattern_transition(model, target, horizon_steps=T, y_start=start)
    ranking = rank_sites(model, pt.target.x, horizon_steps=T, x0=pt.transition.x0, max_set_size=max_set_size)
    ranking.to_frame().to_csv(tmp / "site_ranking.csv", index=False, float_format="%.10g")
    _transition_table(pt.transition, model).to_csv(tmp / "transition.csv", index=False, float_format="%.10g")
    ok = ranking.reachable
    title = f"Minimum energy to reach the target in {T} steps ({T / model.sample_rate_hz:g} s)"
    if ranking.n_unreachable:
        title += f"\n{ranking.n_unreachable} of {len(ranking.sets)} site sets cannot reach it (not shown)"
    if ok.any():
        fig = figures.ranking_figure([nm for nm, g in zip(ranking.names, ok) if g], ranking.energy[ok], title,
                                     "minimum input energy (sum of u², input units² x samples)")
    else:
        fig = figures.ranking_figure(list(ranking.names), ranking.residual,
                                     title + "\nno set reaches it: distance left shown",
                                     "distance to the target state left by the closest input")
    fig.savefig(tmp / "site_ranking.png", dpi=_DPI)
    lines = []
    for label, ps in (("target", pt.target), ("start", pt.start)):
        if ps is not None and not ps.unique:
            lines.append(f"note: the {label} pattern fixes the state only up to a {ps.null_space_dim}-dimensional "
                         "null space of C; the smallest such state is used.")
        if ps is not None and ps.residual > 1e-8 * max(1.0, float(np.linalg.norm(ps.pattern))):
            lines.append(f"note: no state gives the {label} pattern exactly (least-squares residual "
                         f"{ps.residual:.3g}); its closest pattern is used.")
    tr = pt.transition
    if tr.reachable:
        lines.append(f"all sites: target reached in {T} steps with energy {tr.energy:.4g} "
                     f"(residual {tr.residual:.2g})")
    else:
        lines.append(f"all sites: the target is NOT reachable in {T} steps (distance left {tr.residual:.3g}); "
                     "a longer --horizon-steps or other sites may help")
    best = [f"{nm} ({e:.4g})" for nm, e, g in zip(ranking.names[:5], ranking.energy[:5], ranking.reachable[:5]) if g]
    lines.append("best site sets (energy): " + (", ".join(best) if best else "none reaches the target"))
    if ranking.n_unreachable:
        lines.append(f"{ranking.n_unreachable} of {len(ranking.sets)} site sets cannot reach the target "
                     "(energy inf in site_ranking.csv)")
    return lines
