"""A ceiling and floors beside both routes, for a simulated session with its ground-truth plant (issue 18, item 8).

A route's R² of 0.91 or tracking error of 3.8 µV means little alone: is 0.91 near what any predictor can reach on
these noisy data, or far from it? With the plant that made the session, the benchmark can say:

* **ceiling — the true model**: the plant's own dynamics in innovation form (its steady-state Kalman predictor for
  the plant's process and measurement noise, :meth:`LinearNetworkPlant.to_state_space`), scored on the same
  held-out trials and steered by the same controller, target, limits and plant noise as the routes. It knows
  neither the drift nor the artifacts the plant adds, so a route can come out above it on a drifting session;
  the report says so when it happens.
* **floor — a mean predictor**: every output predicted by its mean over the split's training trials (R² near or
  below zero by construction); **floor — no stimulation**: the closed loop's plant run with zero input over the same
  steps and noise seed, scored against the same target (energy 0).

Each is computed once per split at the base setting (a closed loop of 100 steps and a free run): on the local pool's
workers beside the tasks, else in this process after them.
"""

from __future__ import annotations

import copy

import numpy as np
import pandas as pd

from ...sysid import StimsteerError, freerun_scores, kstep_scores
from ...sysid._records import window_stride
from .closed_loop import _channel_index, _control, _output_stats, _target
from .tasks import _cached

__all__ = ["CEILING", "FLOOR_MEAN", "FLOOR_REST", "base_tasks", "has_references", "reference_rows",
           "reference_table"]

CEILING = "ceiling: true model"
FLOOR_MEAN = "floor: mean predictor"
FLOOR_REST = "floor: no stimulation"


def reference_table(ctx, tasks, rows=None) -> pd.DataFrame:
    """Ceiling and floors per split at the base setting (empty without a ground-truth plant).

    Parameters
    ----------
    ctx : _Context
        The benchmark's context (session, plant, limits, settings).
    tasks : list of _Task
        The benchmark's tasks; the first base-setting task of each split gives its trials and loop seed.
    rows : list of list of dict, optional
        :func:`reference_rows` of each task of :func:`base_tasks`, when they were computed elsewhere (on the pool's
        workers, beside the tasks); default computed here.

    Returns
    -------
    pandas.DataFrame
        One row per split and reference: ``split``, ``reference``, ``r2_last``, ``r2_freerun`` (mean over
        channels), ``tracking_rms`` (steered channel, its unit), ``energy_ua2`` (NaN where it does not apply), ``note``.
    """
    if not has_references(ctx):
        return pd.DataFrame()
    if rows is None:
        rows = [reference_rows(ctx, task) for task in base_tasks(tasks, ctx.settings)]
    return pd.DataFrame([r for split_rows in rows for r in split_rows],
                        columns=["split", "reference", "r2_last", "r2_freerun", "tracking_rms", "energy_ua2", "note"])


def has_references(ctx) -> bool:
    """Whether the benchmark's plant gives a ceiling and floors (a ground-truth plant with its state space)."""
    return ctx.plant is not None and hasattr(ctx.plant, "to_state_space")


def reference_rows(ctx, task) -> list:
    """The ceiling and floors of one split (``task``: its first base-setting task), as rows of
    :func:`reference_table`."""
    st, session = ctx.settings, ctx.session
    train, test = session.select_trials(task.split.train), session.select_trials(task.split.test)
    rows = [{"split": task.split_index, "reference": CEILING, **_ceiling(ctx, task, train, test)}]
    r2 = _mean_predictor_r2(train, test)
    rows.append({"split": task.split_index, "reference": FLOOR_MEAN, "r2_last": r2, "r2_freerun": r2,
                 "tracking_rms": np.nan, "energy_ua2": np.nan, "note": "training mean of every output"})
    if st.control is not None:
        rows.append({"split": task.split_index, "reference": FLOOR_REST, "r2_last": np.nan, "r2_freerun": np.nan,
                     "tracking_rms": _rest_tracking(ctx, task, train), "energy_ua2": 0.0,
                     "note": "the plant with zero input, same noise seed and target"})
    return rows


def base_tasks(tasks, st) -> list:
    """The first base-setting task of each split (its trials and loop seed are the references')."""
    seen, out = set(), []
    for t in tasks:
        s = t.setting
        if s.n_train is None and s.noise_scale == 1.0 and s.horizon_steps == st.horizon_steps and \
                t.split_index not in seen:
            seen.add(t.split_index)
            out.append(t)
    return out


def _true_model(plant, past_steps: int):
    try:
        return plant.to_state_space(innovation=True).replace(past_steps=past_steps), "Kalman predictor of the plant"
    except StimsteerError:  # no measurement noise: the noise-free model is the true predictor
        return plant.to_state_space().replace(past_steps=past_steps), "noise-free model of the plant"


def _ceiling(ctx, task, train, test) -> dict:
    st, H = ctx.settings, ctx.settings.horizon_steps
    # the same plant gives every split the same model (its Kalman gain a Riccati solution, 15 ms): made once per
    # process of the run and shared (a frozen StateSpaceModel; its maps' cache then serves every split)
    model, what = _cached((ctx.token, "true model"), lambda: _true_model(ctx.plant, st.past_steps))
    ks = kstep_scores(model, test, horizon_steps=H, stride_steps=window_stride(test, st.past_steps, H,
                                                                                  st.max_windows))
    fr = freerun_scores(model, test)
    out = {"r2_last": float(ks.kstep.loc[ks.kstep["step"] == H, "r2"].mean()),
           "r2_freerun": float(fr.freerun["r2"].mean()), "tracking_rms": np.nan, "energy_ua2": np.nan,
           "note": f"{what}, without its drift and artifacts"}
    if st.control is not None:
        loop = _control(ctx, task, model, ctx.session)["loop"]
        out.update(tracking_rms=loop["tracking_rms"], energy_ua2=loop["energy_ua2"])
    return out


def _mean_predictor_r2(train, test) -> float:
    """R² (1 − SSE/SST per channel, averaged) of the training mean on the held-out trials' valid samples."""
    mean, _std = _output_stats(train)
    y = np.concatenate([test.y[s:e] for s, e in test.segments()])
    sse = np.sum((y - mean) ** 2, axis=0)
    sst = np.sum((y - y.mean(axis=0)) ** 2, axis=0)
    return float(np.mean(1.0 - sse / np.where(sst > 0, sst, np.nan)))


def _rest_tracking(ctx, task, train) -> float:
    """RMS error of the steered channel against the routes' target with the plant left at zero input.

    The plant gets the loop's seed, the same warm-up of ``past_steps`` zero inputs as the routes' loops
    (:func:`stimsteer.control.loop.run_closed_loop`), then ``n_steps`` zero inputs.
    """
    cs, st = ctx.settings.control, ctx.settings
    mean, std = _output_stats(train)
    c = _channel_index(ctx.session, cs.target_channel)
    target = _target(cs, mean, std, c, st.horizon_steps)[:cs.n_steps, c]
    plant = copy.deepcopy(ctx.plant)
    plant.reset(seed=task.loop_seed)
    zero = np.zeros(int(plant.n_inputs))
    y = np.array([np.asarray(plant.step(zero), float).reshape(-1)[c] for _ in range(st.past_steps + cs.n_steps)])
    return float(np.sqrt(np.mean((y[st.past_steps:] - target) ** 2)))
