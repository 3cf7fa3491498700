"""The tables and figures ``stimsteer network`` writes (see :mod:`stimsteer.control.commands.network`)."""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ...sysid import (ConditioningWarning, InvalidParameterError, UnstableModelError, controllability,
                      impulse_responses)
from ...sysid._files import atomic_dir
from ...sysid.network import (output_controllability, output_gramian, output_transition, rank_sites_by_output,
                              site_output_controllability)
from ...sysid.network.controllability import average_controllability_values, modal_controllability_values
from ...sysid.network.outputs import site_sets

__all__ = ["NetworkOutputs", "write_network_outputs", "is_network_map"]

_DPI = 110
COORDINATE_FREE = "fitted model: figures seen through the recorded channels (independent of the state coordinates)"
MAP_NODES = "network map: the states are the map's nodes"
STATE_WARNING = ("fitted model's state basis: COORDINATE-DEPENDENT (another equally good fit of the same data gives "
                 "other values); quote the output figures instead")


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


def is_network_map(model) -> bool:
    """True when the model's states are the nodes of a user's network map (``info["network_map"]``)."""
    return isinstance(model.info.get("network_map"), dict)


def _summary_table(model, kal, out, horizon):
    m = model.info.get("network_map") or {}
    rows = [
        ("n_states", model.n_states), ("n_sites", model.n_inputs), ("n_channels", model.n_outputs),
        ("spectral_radius", model.spectral_radius), ("kalman_rank", kal.rank), ("controllable", kal.is_controllable),
        ("output_rank", out.output_rank), ("output_rank_tolerance", out.rank_tol),
        ("output_controllable", out.is_output_controllable),
        ("gramian_horizon_steps", "infinite" if horizon is None else horizon),
        ("output_gramian_condition_number", out.condition_number), ("h2_squared_all_sites", out.h2_squared),
        ("coordinates", MAP_NODES if is_network_map(model) else COORDINATE_FREE),
        ("time", m.get("time", "discrete (fitted model)")), ("normalisation", m.get("normalisation", "none")),
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
    if input_units is None or output_units is None:
        return None
    iu, ou = tuple(str(x) for x in input_units), tuple(str(x) for x in output_units)
    if len(iu) != model.n_inputs or len(ou) != model.n_outputs:
        raise InvalidParameterError(f"expected {model.n_inputs} input units and {model.n_outputs} output units (one "
                                    f"per channel of the model); got {len(iu)} and {len(ou)}.")
    return iu, ou


def _check_horizons(model, horizon_steps, gramian_steps):
    n = model.n_states
    T = max(2 * n, 1) if horizon_steps is None else horizon_steps
    for name, v in (("horizon_steps", T), ("gramian_steps", gramian_steps)):
        if v is not None and (isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 1):
            raise InvalidParameterError(f"{name} must be a whole number of samples >= 1; got {v!r}.")
    if gramian_steps is None and not model.is_stable:
        raise UnstableModelError(
            f"the model is unstable (spectral radius {model.spectral_radius:.4f} >= 1), so its infinite-horizon "
            "Gramians do not exist. Give --gramian-steps N for a finite horizon, or refit a stable model (a fitted "
            "model is never rescaled: that would change its time constants).")
    return int(T)


def _state_table(model, gramian_steps, lines):
    """Average and modal controllability per site; warnings (non-normal, defective, unstable) go to ``lines``."""
    A, B = np.asarray(model.A), np.asarray(model.B)
    average = average_controllability_values(A, B, gramian_steps)
    modal = np.full(model.n_inputs, np.nan)
    if not model.is_stable:
        lines.append("warning: modal controllability needs a stable A (its weights 1 - |lambda|² assume decaying "
                     "modes); left empty.")
    else:
        try:
            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", ConditioningWarning)
                modal = modal_controllability_values(A, B)
            lines += [f"warning: {w.message}" for w in caught if issubclass(w.category, ConditioningWarning)]
        except InvalidParameterError as exc:
            lines.append(f"warning: {exc} Modal controllability is left empty.")
    label = MAP_NODES if is_network_map(model) else STATE_WARNING
    return pd.DataFrame({"site": list(model.input_names), "average_controllability": average,
                         "modal_controllability": modal, "coordinates": label})


def _pair_table(model, gramian_steps, max_set_size):
    """Site sets by their output Gramian: H2² and the worst-case energy ``1 / λ_min(C W_S Cᵀ)`` (``inf``: some
    pattern of the recorded channels is out of the set's reach), best worst case first."""
    # W_S is the sum of the single-site Gramians: one Lyapunov solve per site, then sums
    single = [output_gramian(model, gramian_steps, sites=[j]) for j in range(model.n_inputs)]
    rows = []
    for c in site_sets(model.n_inputs, max_set_size):
        G = sum(single[j] for j in c)
        eig = np.clip(np.linalg.eigvalsh(G), 0.0, None)
        full = eig.size and eig[0] > eig.size * np.finfo(float).eps * max(eig[-1], np.finfo(float).tiny)
        rows.append(("+".join(model.input_names[j] for j in c), len(c), float(np.trace(G)),
                     1.0 / eig[0] if full else np.inf))
    table = pd.DataFrame(rows, columns=["sites", "n_sites", "h2_squared_to_channels", "worst_case_unit_energy"])
    return table.sort_values(["worst_case_unit_energy", "n_sites"], kind="stable")


def write_network_outputs(model, out_dir, *, target=None, start=None, free_channels=None,
                          horizon_steps: int | None = None, gramian_steps: int | None = None, max_set_size: int = 2,
                          state_figures: bool = False, impulse_steps: int | None = None, force: bool = False,
                          input_units=None, output_units=None, extra_tables=None) -> NetworkOutputs:
    """Compute the network-control tables and figures of a model and write them to ``out_dir``.

    Parameters
    ----------
    model : StateSpaceModel
        A fitted model (figures through the recorded channels only, unless ``state_figures``) or the model of a
        network map (:func:`stimsteer.sysid.network.map_model`; the per-node state figures are added).
    out_dir : str or Path
    target, start : ndarray, shape (n_outputs,), optional
        Output patterns; with ``target`` the site ranking and the least-energy input are written.
    free_channels : sequence of str, optional
        Channels left free at the end of the transition.
    horizon_steps : int, optional
        Transition horizon; default ``2 * n_states``.
    gramian_steps : int, optional
        Finite Gramian horizon; default infinite (needs a stable model).
    max_set_size : {1, 2, 3}, default 2
    state_figures : bool, default False
        Also write average and modal controllability of ``A`` for a fitted model (labelled coordinate-dependent).
    impulse_steps : int, optional
    force : bool, default False
    input_units, output_units : sequence of str, optional
    extra_tables : dict, optional
        File name -> DataFrame, written as they are (the map fit and condition tables).

    Returns
    -------
    NetworkOutputs
    """
    T = _check_horizons(model, horizon_steps, gramian_steps)
    units = _units(model, input_units, output_units)
    n = model.n_states
    kal = controllability(model, horizon_steps=gramian_steps)
    out_rep = output_controllability(model, horizon_steps=gramian_steps)
    sites = site_output_controllability(model, horizon_steps=gramian_steps)
    lines = _summary_lines(model, kal, out_rep)
    state = _state_table(model, gramian_steps, lines) if (state_figures or is_network_map(model)) else None
    pairs = _pair_table(model, gramian_steps, max_set_size)
    h = impulse_responses(model, max(20, 3 * n) if impulse_steps is None else impulse_steps)
    order = np.argsort(-sites.h2_squared, kind="stable")
    out = Path(out_dir)
    from ..figures import network as figures  # matplotlib is loaded only when a figure is drawn

    names = ["controllability.csv", "gramian_spectrum.csv", "gramian_spectrum.png", "site_controllability.csv",
             "site_sets.csv", "impulse_responses.csv", "impulse_responses.png", "site_ranking.png"]
    with atomic_dir(out, force=force) as tmp:
        _summary_table(model, kal, out_rep, gramian_steps).to_csv(tmp / "controllability.csv", index=False)
        eig = np.asarray(out_rep.gramian_eigenvalues)
        pd.DataFrame({"index": np.arange(1, eig.size + 1), "eigenvalue": eig}).to_csv(
            tmp / "gramian_spectrum.csv", index=False, float_format="%.10g")
        figures.gramian_spectrum_figure(eig, out_rep.horizon_steps, out_rep.condition_number,
                                        "output Gramian C W Cᵀ").savefig(tmp / "gramian_spectrum.png", dpi=_DPI)
        sites.to_frame().iloc[order].to_csv(tmp / "site_controllability.csv", index=False, float_format="%.10g")
        pairs.to_csv(tmp / "site_sets.csv", index=False, float_format="%.10g")
        if state is not None:
            state.to_csv(tmp / "state_controllability.csv", index=False, float_format="%.10g")
            names.append("state_controllability.csv")
        _impulse_table(h, model, units).to_csv(tmp / "impulse_responses.csv", index=False, float_format="%.10g")
        figures.impulse_response_figure(h, model, units).savefig(tmp / "impulse_responses.png", dpi=_DPI)
        if target is None:
            figures.ranking_figure([sites.site_names[i] for i in order], sites.h2_squared[order],
                                   "Sites by squared H2 norm to the recorded channels (trace of C W_j Cᵀ)",
                                   "squared H2 norm (output units² per input unit² per sample)",
                                   ).savefig(tmp / "site_ranking.png", dpi=_DPI)
        else:
            lines += _write_target(model, tmp, target, start, free_channels, T, max_set_size, figures)
            names += ["site_ranking.csv", "transition.csv"]
        for name, table in (extra_tables or {}).items():
            table.to_csv(tmp / name, index=False, float_format="%.10g")
            names.append(name)
    return NetworkOutputs(files={name: out / name for name in names}, lines=tuple(lines))


def _summary_lines(model, kal, out_rep):
    n = model.n_states
    where = MAP_NODES if is_network_map(model) else COORDINATE_FREE
    norm = (model.info.get("network_map") or {}).get("normalisation", "none")
    horizon = "infinite horizon" if out_rep.horizon_steps is None else f"{out_rep.horizon_steps} steps"
    return [
        f"model: {n} states, {model.n_inputs} sites, {model.n_outputs} channels, spectral radius "
        f"{model.spectral_radius:.4f} ({where}; normalisation: {norm})",
        f"Kalman rank {kal.rank} of {n}: "
        + ("controllable" if kal.is_controllable else "NOT controllable from these sites"),
        f"output rank {out_rep.output_rank} of {out_rep.n_channels}: "
        + ("every pattern of the recorded channels is reachable" if out_rep.is_output_controllable
           else "NOT every pattern of the recorded channels is reachable"),
        f"output Gramian ({horizon}): condition {out_rep.condition_number:.3g}, squared H2 norm of all sites "
        f"{out_rep.h2_squared:.4g}",
    ]


def _transition_table(tr, model):
    T = tr.u.shape[0]
    cols = {"step": np.arange(T), "time [s]": np.arange(T) / model.sample_rate_hz}
    for j, name in enumerate(model.input_names):
        cols[name] = tr.u[:, j]
    return pd.DataFrame(cols)


def _write_target(model, tmp, target, start, free, T, max_set_size, figures):
    tr = output_transition(model, target, horizon_steps=T, y_start=start, free_channels=free)
    ranking = rank_sites_by_output(model, target, horizon_steps=T, y_start=start, free_channels=free,
                                   max_set_size=max_set_size)
    ranking.to_frame().to_csv(tmp / "site_ranking.csv", index=False, float_format="%.10g")
    _transition_table(tr, model).to_csv(tmp / "transition.csv", index=False, float_format="%.10g")
    ok = ranking.reachable
    title = f"Least energy to produce the target pattern in {T} steps ({T / model.sample_rate_hz:g} s)"
    if ranking.n_unreachable:
        title += f"\n{ranking.n_unreachable} of {len(ranking.sets)} site sets cannot produce it (not shown)"
    if ok.any():
        fig = figures.ranking_figure([nm for nm, g in zip(ranking.names, ok) if g], ranking.energy[ok], title,
                                     "minimum input energy (sum of u², input units² x samples)")
    else:
        fig = figures.ranking_figure(list(ranking.names), ranking.residual,
                                     title + "\nno set produces it: distance left shown",
                                     "distance to the target pattern left by the closest input")
    fig.savefig(tmp / "site_ranking.png", dpi=_DPI)
    lines = []
    if free:
        lines.append(f"free channels (not held to the target): {', '.join(free)}")
    if tr.reachable:
        lines.append(f"all sites: target pattern reached in {T} steps with energy {tr.energy:.4g} "
                     f"(residual {tr.residual:.2g})")
    else:
        lines.append(f"all sites: the target pattern is NOT reachable in {T} steps (distance left {tr.residual:.3g});"
                     " a longer --horizon-steps or other sites may help")
    best = [f"{nm} ({e:.4g})" for nm, e, g in zip(ranking.names[:5], ranking.energy[:5], ranking.reachable[:5]) if g]
    lines.append("best site sets (energy): " + (", ".join(best) if best else "none reaches the target"))
    if ranking.n_unreachable:
        lines.append(f"{ranking.n_unreachable} of {len(ranking.sets)} site sets cannot reach the target "
                     "(energy inf in site_ranking.csv)")
    return lines
