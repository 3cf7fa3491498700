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
from ...sysid._progress import progress
from ...sysid.network import (output_controllability, output_transition, rank_sites_by_output,
                              site_output_controllability)
from ...sysid.network.controllability import average_controllability_values, modal_controllability_values
from ...sysid.network.outputs import site_output_gramians, site_sets
from ...sysid.network.responses import SETTLE_FRACTION, mode_times
from ...sysid.network.systems import minimal_realisation

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


def _summary_table(model, kal, out, horizon, minimal=None, impulse_steps=None):
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
        ("minimal_states", model.n_states if minimal is None else minimal.n_states),
        ("kalman_rank_computed_on", "the map's nodes" if minimal is None else "the minimal realisation"),
        ("impulse_response_steps", impulse_steps),
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
    # W_S is the sum of the single-site Gramians (solved together, sharing A's powers), then sums
    single = site_output_gramians(model, gramian_steps)
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
        Transition horizon; default twice the states of the minimal realisation (of the map's nodes).
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
    units = _units(model, input_units, output_units)
    T, minimal, kal, out_rep, sites, steps, lines, state, pairs, h = _numbers(
        model, horizon_steps, gramian_steps, max_set_size, state_figures, impulse_steps)
    order = np.argsort(-sites.h2_squared, kind="stable")
    out = Path(out_dir)
    from ..figures import network as figures  # matplotlib is loaded only when a figure is drawn

    names = ["controllability.csv", "gramian_spectrum.csv", "gramian_spectrum.png", "site_controllability.csv",
             "site_sets.csv", "impulse_responses.csv", "impulse_responses.png", "site_ranking.png"]
    with atomic_dir(out, force=force) as tmp:
        _summary_table(model, kal, out_rep, gramian_steps, minimal, steps).to_csv(tmp / "controllability.csv",
                                                                                  index=False)
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
                                   f"squared H2 norm ({figures.squared_response_unit(units)})",
                                   ).savefig(tmp / "site_ranking.png", dpi=_DPI)
        else:
            lines += _write_target(model, tmp, target, start, free_channels, T, max_set_size, figures,
                                   _energy_unit(units))
            names += ["site_ranking.csv", "transition.csv"]
        for name, table in (extra_tables or {}).items():
            table.to_csv(tmp / name, index=False, float_format="%.10g")
            names.append(name)
    return NetworkOutputs(files={name: out / name for name in names}, lines=tuple(lines))


def _numbers(model, horizon_steps, gramian_steps, max_set_size, state_figures, impulse_steps):
    """What :func:`write_network_outputs` writes, computed stage by stage behind a progress bar (a ridge ARX at
    past 100 ms, 2,297 states: about 30 s, most of it the poles and the minimal realisation)."""
    with progress(6, "network figures", unit="stage") as bar:
        _check_horizons(model, horizon_steps, gramian_steps)  # the model's poles
        bar.update()
        # a fitted model's states are a construction (ARX: one per lag): the Kalman test runs on its minimal
        # realisation (the infinite-horizon one whatever --gramian-steps: a horizon shorter than the states would
        # hide reachable ones; an unstable model is balanced as A / c, the same reachable and observable states)
        minimal = None if is_network_map(model) else minimal_realisation(model)[0]
        bar.update()
        T = _check_horizons(model if minimal is None else minimal, horizon_steps, gramian_steps)
        kal = controllability(model if minimal is None else minimal, horizon_steps=gramian_steps)
        # what is seen through the channels is the same on the minimal realisation (to its printed bound, which
        # holds for the infinite-horizon Gramians of a stable model), in fewer states: a ridge ARX at past 100 ms of
        # 3 sites and 20 channels has 2,297 states, its minimal realisation 922. A finite Gramian horizon: the model.
        seen = model if minimal is None or gramian_steps is not None else minimal
        out_rep = output_controllability(seen, horizon_steps=gramian_steps)
        sites = site_output_controllability(seen, horizon_steps=gramian_steps)
        bar.update()
        modes = mode_times(model if minimal is None else minimal)
        steps = modes.settle_steps if impulse_steps is None else int(impulse_steps)
        lines = _summary_lines(model, kal, out_rep, minimal) + _mode_lines(modes, steps, impulse_steps is None)
        state = _state_table(model, gramian_steps, lines) if (state_figures or is_network_map(model)) else None
        bar.update()
        pairs = _pair_table(seen, gramian_steps, max_set_size)
        bar.update()
        h = impulse_responses(seen, steps)
        bar.update()
    return T, minimal, kal, out_rep, sites, steps, lines, state, pairs, h


def _summary_lines(model, kal, out_rep, minimal=None):
    n = model.n_states
    where = MAP_NODES if is_network_map(model) else COORDINATE_FREE
    norm = (model.info.get("network_map") or {}).get("normalisation", "none")
    horizon = "infinite horizon" if out_rep.horizon_steps is None else f"{out_rep.horizon_steps} steps"
    lines = [f"model: {n} states, {model.n_inputs} sites, {model.n_outputs} channels, spectral radius "
             f"{model.spectral_radius:.4f} ({where}; normalisation: {norm})"]
    if minimal is None:
        lines.append(f"Kalman rank {kal.rank} of {n} (the map's nodes): "
                     + ("controllable" if kal.is_controllable else "NOT controllable from these sites"))
    else:
        rec = minimal.info["minimal_realisation"]
        c, bound = rec.get("scaled_by", 1.0), rec["impulse_error_bound"]
        of = "" if c == 1.0 else f" of A / {c:.4g} (the model is unstable; a scalar factor on A moves no state in or " \
            "out of reach or sight)"
        exact = " (to rounding)" if bound == 0 else ""  # the companion form: the same recursion on fewer states
        moves = f"the impulse responses by at most {bound:.2g}{exact}" if c == 1.0 else \
            f"sample k of the impulse responses by at most {bound:.2g} x {c:.4g}^(k-1)"
        lines.append(
            f"minimal realisation: {minimal.n_states} of {n} states (balanced truncation of the Hankel singular values"
            f"{of} below {rec['rtol']:g} of the largest; the removed states are ones no site reaches or no channel "
            f"sees, to within that tolerance, and change {moves})")
        lines.append(f"Kalman rank {kal.rank} of {minimal.n_states}, on the minimal realisation: "
                     + ("controllable" if kal.is_controllable else "NOT controllable from these sites"))
    lines += [
        f"output rank {out_rep.output_rank} of {out_rep.n_channels}: "
        + ("every pattern of the recorded channels can be produced (given enough steps)"
           if out_rep.is_output_controllable else "NOT every pattern of the recorded channels can be produced"),
        f"output Gramian ({horizon}): condition {out_rep.condition_number:.3g}, squared H2 norm of all sites "
        f"{out_rep.h2_squared:.4g}",
    ]
    return lines


def _mode_lines(modes, steps, automatic):
    """The impulse-response length and why, then the slow or unstable modes with their time constants."""
    rate = modes.sample_rate_hz
    shown = f"impulse responses: {steps} samples ({steps / rate:.4g} s)"
    if not automatic:
        line = shown + " as asked"
    elif modes.capped and modes.magnitudes.size and modes.magnitudes[0] >= 1.0:
        line = shown + ": the model has an unstable mode and never settles (3 x states shown, at least 20)"
    elif modes.capped:
        slowest = float(modes.time_constants_s[0])
        line = (shown + f": capped at {steps} samples; the slowest mode (time constant {slowest:.4g} s) needs "
                f"{np.log(1 / SETTLE_FRACTION) * slowest:.4g} s to decay to {SETTLE_FRACTION:.0%}")
    else:
        line = shown + f", until the slowest mode has decayed to {SETTLE_FRACTION:.0%}"
    return [line] + modes.slow_lines()


def _energy_unit(units) -> str:
    """The unit of a minimum energy (sum of squared inputs over samples)."""
    if units is None:
        return "input units² x samples"
    kinds = sorted(set(units[0]))
    return f"{kinds[0]}² x samples" if len(kinds) == 1 else "input units² x samples"


def _transition_table(tr, model):
    T = tr.u.shape[0]
    cols = {"step": np.arange(T), "time [s]": np.arange(T) / model.sample_rate_hz}
    for j, name in enumerate(model.input_names):
        cols[name] = tr.u[:, j]
    return pd.DataFrame(cols)


def _write_target(model, tmp, target, start, free, T, max_set_size, figures, unit="input units² x samples"):
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
                                     f"minimum input energy (sum of u², {unit})")
    else:
        fig = figures.ranking_figure(list(ranking.names), ranking.residual,
                                     title + "\nno set produces it: distance left shown",
                                     "distance to the target pattern left by the closest input")
    fig.savefig(tmp / "site_ranking.png", dpi=_DPI)
    lines = []
    if free:
        lines.append(f"free channels (not held to the target): {', '.join(free)}")
    # one statement of reachability: the least-energy transition over every site decides it, in T steps
    secs = f"{T} steps ({T / model.sample_rate_hz:.4g} s)"
    if tr.reachable:
        lines.append(f"target: REACHABLE with every site in {secs}, least energy {tr.energy:.4g} {unit} "
                     f"({tr.energy / model.sample_rate_hz:.4g} {unit.replace('samples', 's')}); distance left "
                     f"{tr.residual:.2g}")
    else:
        lines.append(f"target: NOT reachable with every site in {secs}: the closest input leaves a distance of "
                     f"{tr.residual:.3g} (output units); a longer --horizon or other sites may help")
    best = [f"{nm} ({e:.4g})" for nm, e, g in zip(ranking.names[:5], ranking.energy[:5], ranking.reachable[:5]) if g]
    lines.append(f"best site sets (least energy, {unit}): " + (", ".join(best) if best else
                                                                "none reaches the target"))
    if ranking.n_unreachable:
        lines.append(f"{ranking.n_unreachable} of {len(ranking.sets)} site sets cannot reach the target in {secs} "
                     "(energy inf in site_ranking.csv)")
    return lines
