"""Network-control tables and figures of a fitted state-space model (the ``stimsteer network`` command).

:func:`write_network_outputs` computes everything with :mod:`stimsteer.sysid.network` and writes one folder,
atomically:

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

Figures use matplotlib's Agg backend and the plain style below (no top/right frame, light horizontal grid).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..sysid._files import atomic_dir
from ..sysid.exceptions import FileFormatError, SessionError, UnstableModelError
from ..sysid.network import (
    controllability,
    impulse_responses,
    pattern_transition,
    rank_sites,
    site_controllability,
)
from ..sysid.statespace import StateSpaceModel

__all__ = ["NetworkOutputs", "read_pattern", "state_space_of", "write_network_outputs"]

_INK, _ACCENT, _MUTED, _WARN = "#24434f", "#c7792f", "#8a9aa3", "#a23b3b"
_MAX_GRID = 8       # impulse-response grid: at most this many channels x sites are drawn (all are in the CSV)
_MAX_BARS = 20      # ranking figure: the best this many sets


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


# ---------------------------------------------------------------------------------------------------- inputs
def state_space_of(predictor, source: str = "the model file") -> StateSpaceModel:
    """The state-space model behind a loaded predictor (indirect route), or a clear error for the direct route.

    Raises
    ------
    FileFormatError
        When the predictor has no state-space model (a direct-route data predictor).
    """
    if isinstance(predictor, StateSpaceModel):
        return predictor
    model = getattr(predictor, "model_", None)
    if isinstance(model, StateSpaceModel):
        return model
    raise FileFormatError(
        f"{source} holds a {type(predictor).__name__}, a direct-route data predictor without a state-space model; "
        "network figures need a state-space model. Fit one with `stimsteer fit SESSION --route indirect --method "
        "subspace` (or arx) and pass that file."
    )


def _numbers(cells, where) -> np.ndarray:
    try:
        return np.array([float(c) for c in cells], dtype=np.float64)
    except ValueError:
        raise SessionError(f"{where}: expected numbers separated by commas; got {','.join(cells)!r}.") from None


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
    SessionError
        Wrong count, non-numbers, or header names that do not match the model's outputs.
    """
    names = list(output_names)
    where = f"pattern {text!r}"
    if os.path.isfile(text):
        lines = [ln.strip() for ln in Path(text).read_text(encoding="utf-8-sig").splitlines()]
        rows = [[c.strip() for c in ln.split(",")] for ln in lines if ln and not ln.startswith("#")]
        if not rows:
            raise SessionError(f"{where} is an empty file; write one row of {len(names)} values.")
        header = None
        try:
            [float(c) for c in rows[0]]
        except ValueError:
            header, rows = [_channel_name(c) for c in rows[0]], rows[1:]
        if not rows:
            raise SessionError(f"{where} has a header but no row of values.")
        values = _numbers(rows[0], where)
        if header is not None:
            if sorted(header) != sorted(names) or len(header) != len(values):
                raise SessionError(f"{where}: the header names {header} must be the model's outputs {names}.")
            values = values[[header.index(n) for n in names]]
    else:
        values = _numbers([c.strip() for c in text.split(",") if c.strip()], where)
    if values.shape != (len(names),) or not np.all(np.isfinite(values)):
        raise SessionError(
            f"{where}: expected {len(names)} finite values, one per recorded channel ({', '.join(names)}); got "
            f"{values.size}."
        )
    return values


# ---------------------------------------------------------------------------------------------------- figures
def _plain_axes(ax):
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(axis="y", color="0.92", lw=0.6)
    ax.tick_params(labelsize=7)


def _figure(w, h):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt, plt.figure(figsize=(w, h))


def _plot_spectrum(rep, path):
    plt, fig = _figure(6.0, 3.4)
    ax = fig.add_subplot()
    eig = np.asarray(rep.gramian_eigenvalues)
    k = np.arange(1, eig.size + 1)
    positive = eig > 0
    ax.semilogy(k[positive], eig[positive], "o-", color=_INK, ms=3.5, lw=1.0)
    if (~positive).any():
        ax.text(0.98, 0.95, f"{int((~positive).sum())} zero eigenvalue(s)", transform=ax.transAxes, ha="right",
                va="top", fontsize=7, color=_WARN)
    horizon = "infinite horizon" if rep.horizon_steps is None else f"horizon {rep.horizon_steps} steps"
    ax.set_xlabel("eigenvalue index", fontsize=8)
    ax.set_ylabel("Gramian eigenvalue", fontsize=8)
    ax.set_title(f"Controllability Gramian spectrum ({horizon}; condition {rep.condition_number:.3g};\n"
                 f"normalisation: {rep.normalisation})", fontsize=9)
    _plain_axes(ax)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _with_unit(name: str, unit: str | None) -> str:
    return name if not unit else f"{name} [{unit}]"


def _plot_impulses(h, model, path, units=None):
    p, m = h.shape[1], h.shape[2]
    in_units, out_units = units if units is not None else ((None,) * m, (None,) * p)
    rp, rm = min(p, _MAX_GRID), min(m, _MAX_GRID)
    plt, fig = _figure(1.6 * rm + 1.2, 1.1 * rp + 1.0)
    t = np.arange(h.shape[0]) / model.sample_rate_hz
    axes = fig.subplots(rp, rm, sharex=True, squeeze=False)
    for i in range(rp):
        for j in range(rm):
            ax = axes[i, j]
            ax.axhline(0.0, color=_MUTED, lw=0.5)
            ax.plot(t, h[:, i, j], color=_INK, lw=0.9)
            _plain_axes(ax)
            if i == 0:
                ax.set_title(_with_unit(model.input_names[j], in_units[j]), fontsize=7)
            if j == 0:
                ax.set_ylabel(_with_unit(model.output_names[i], out_units[i]), fontsize=7)
            if i == rp - 1:
                ax.set_xlabel("time [s]", fontsize=7)
    notes = ["response in channel unit per site unit"] if units is not None else []
    if (rp, rm) != (p, m):
        notes.append(f"first {rp} of {p} channels, {rm} of {m} sites; all in the CSV")
    second = "\n" + "; ".join(notes) if notes else ""
    fig.suptitle(f"Impulse responses: site (columns) to recorded channel (rows){second}", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _plot_ranking(labels, values, title, xlabel, path, log=True):
    n = min(len(labels), _MAX_BARS)
    plt, fig = _figure(6.0, 0.28 * n + 1.3)
    ax = fig.add_subplot()
    ypos = np.arange(n)[::-1]
    ax.barh(ypos, values[:n], color=_ACCENT, height=0.65)
    ax.set_yticks(ypos, labels[:n], fontsize=7)
    if log and np.all(np.asarray(values[:n]) > 0):
        ax.set_xscale("log")
    ax.set_xlabel(xlabel, fontsize=8)
    ax.set_title(title, fontsize=9)
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(axis="x", color="0.92", lw=0.6)
    ax.tick_params(labelsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


# ---------------------------------------------------------------------------------------------------- tables
def _summary_table(rep, model):
    import pandas as pd

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
    import pandas as pd

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
        raise SessionError(f"expected {model.n_inputs} input units and {model.n_outputs} output units (one per "
                           f"channel of the model); got {len(iu)} and {len(ou)}.")
    return iu, ou


def _transition_table(tr, model):
    import pandas as pd

    T = tr.u.shape[0]
    cols = {"step": np.arange(T), "time [s]": np.arange(T) / model.sample_rate_hz}
    for j, name in enumerate(model.input_names):
        cols[name] = tr.u[:, j]
    return pd.DataFrame(cols)


# ---------------------------------------------------------------------------------------------------- main
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
    """
    _check_stable(model, normalise)
    units = _units(model, input_units, output_units)
    n = model.n_states
    T = max(2 * n, 1) if horizon_steps is None else horizon_steps
    if isinstance(T, bool) or not isinstance(T, (int, np.integer)) or T < 1:
        raise SessionError(f"horizon_steps must be a whole number of samples >= 1; got {horizon_steps!r}.")
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
    with atomic_dir(out, force=force) as tmp:
        _summary_table(rep, model).to_csv(tmp / "controllability.csv", index=False)
        _write_spectrum(rep, tmp)
        sites.to_frame().iloc[order].to_csv(tmp / "site_controllability.csv", index=False, float_format="%.10g")
        _impulse_table(h, model, units).to_csv(tmp / "impulse_responses.csv", index=False, float_format="%.10g")
        _plot_impulses(h, model, tmp / "impulse_responses.png", units)
        if target is None:
            _plot_ranking([sites.site_names[i] for i in order], sites.average[order],
                          f"Sites by average controllability (normalisation: {sites.normalisation})",
                          "average controllability (trace of the site's Gramian)", tmp / "site_ranking.png")
        else:
            lines += _write_target(model, tmp, target, start, T, max_set_size)
    names = ["controllability.csv", "gramian_spectrum.csv", "gramian_spectrum.png", "site_controllability.csv",
             "impulse_responses.csv", "impulse_responses.png", "site_ranking.png"]
    if target is not None:
        names += ["site_ranking.csv", "transition.csv"]
    files = {name: out / name for name in names}
    return NetworkOutputs(files=files, lines=tuple(lines))


def _write_spectrum(rep, tmp):
    import pandas as pd

    eig = np.asarray(rep.gramian_eigenvalues)
    pd.DataFrame({"index": np.arange(1, eig.size + 1), "eigenvalue": eig}).to_csv(
        tmp / "gramian_spectrum.csv", index=False, float_format="%.10g")
    _plot_spectrum(rep, tmp / "gramian_spectrum.png")


def _write_target(model, tmp, target, start, T, max_set_size):
    pt = pattern_transition(model, target, horizon_steps=T, y_start=start)
    ranking = rank_sites(model, pt.target.x, horizon_steps=T, x0=pt.transition.x0, max_set_size=max_set_size)
    ranking.to_frame().to_csv(tmp / "site_ranking.csv", index=False, float_format="%.10g")
    _transition_table(pt.transition, model).to_csv(tmp / "transition.csv", index=False, float_format="%.10g")
    ok = ranking.reachable
    title = f"Minimum energy to reach the target in {T} steps ({T / model.sample_rate_hz:g} s)"
    if ranking.n_unreachable:
        title += f"\n{ranking.n_unreachable} of {len(ranking.sets)} site sets cannot reach it (not shown)"
    if ok.any():
        _plot_ranking([nm for nm, g in zip(ranking.names, ok) if g], ranking.energy[ok], title,
                      "minimum input energy (sum of u², input units² x samples)", tmp / "site_ranking.png")
    else:
        _plot_ranking(list(ranking.names), ranking.residual, title + "\nno set reaches it: distance left shown",
                      "distance to the target state left by the closest input", tmp / "site_ranking.png")
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
