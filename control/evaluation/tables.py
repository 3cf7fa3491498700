"""The benchmark's tables: task results assembled into tidy tables, summarised over splits, routes compared in pairs.

Every sweep (``base``, ``train_trials``, ``noise_scale``, ``horizon_steps``) is summarised by the mean and the 95 %
Student-t interval over splits (:func:`~.stats.t_interval`); route differences ``direct − indirect`` are paired by
split (:func:`~.stats.paired_verdict`).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from .settings import BenchSettings
from .stats import paired_verdict, practical_margin, t_interval
from .tasks import _Task

__all__ = ["METRICS"]

#: Task-level figures summarised over splits: name -> True when higher is better.
METRICS = {
    "r2_mean": True, "r2_step1": True, "r2_last": True, "vaf_mean": True, "r2_freerun": True,
    "tracking_rms": False, "energy_ua2": False, "fit_s": False, "predict_ms_per_window": False,
    "solve_ms_median": False,
}
_KEYS = ["task", "split", "label", "route", "method", "n_train_trials", "noise_scale", "horizon_steps"]


def _keys(st: BenchSettings, task: _Task) -> dict:
    spec = st.methods[task.method_index]
    return {"task": task.index, "split": task.split_index, "label": spec.label, "route": spec.route,
            "method": spec.method, "n_train_trials": len(task.train), "noise_scale": task.setting.noise_scale,
            "horizon_steps": task.setting.horizon_steps}


def _task_row(st: BenchSettings, task: _Task, res: dict) -> dict:
    status = "failed" if "error" in res else "skipped" if "skipped" in res else "ok"
    row = {**_keys(st, task), "status": status, "error": res.get("error", res.get("skipped", "")),
           "full_train": task.setting.n_train is None, "warnings": " | ".join(res.get("warnings", [])),
           "total_s": res["total_s"]}
    if status != "ok":
        return row
    ks, fr = _arrays(res["kstep"]), _arrays(res["freerun"])
    step, r2 = ks["step"], np.asarray(ks["r2"], np.float64)
    H = task.setting.horizon_steps
    row.update(selection=res["selection"], fingerprint=res["fingerprint"], fit_s=res["fit_s"],
               predict_s=res["predict_s"], n_windows=res["n_windows"],
               predict_ms_per_window=1e3 * res["predict_s"] / max(res["n_windows"], 1),
               r2_mean=_mean(r2), r2_step1=_mean(r2[step == 1]), r2_last=_mean(r2[step == H]),
               vaf_mean=_mean(np.asarray(ks["vaf"], np.float64)), r2_freerun=_mean(np.asarray(fr["r2"], np.float64)),
               vaf_freerun=_mean(np.asarray(fr["vaf"], np.float64)))
    if "inner_r2" in res:
        row["inner_r2"] = res["inner_r2"]
    if "loop" in res:
        row.update(res["loop"], control_s=res["control_s"])
    return row


def _mean(values: np.ndarray) -> float:
    """The mean of the values that are not NaN (NaN when none is), as pandas' ``Series.mean`` computes it (NaNs
    summed as zeros, the sum divided by the count: the same number to the last bit)."""
    missing = np.isnan(values)
    count = values.size - int(missing.sum())
    return float(np.where(missing, 0.0, values).sum() / count) if count else math.nan


def best_label(route: str) -> str:
    """The label of a route represented by its best method on the training trials."""
    return f"{route} (best on training)"


def _with_best(tasks: pd.DataFrame, st: BenchSettings) -> pd.DataFrame:
    """The task rows plus, for each route with several methods, the rows of its best method per split.

    The best method of a split is the one with the highest ``inner_r2`` (mean k-step R² of a fit on part of the
    split's training trials, scored on the rest; nested, the held-out trials untouched); its rows at every setting
    of that split are repeated under :func:`best_label`, with ``chosen`` naming the method. Only that method's
    tasks run the closed loop, so the closed-loop figures of a route are those of its best method.
    """
    if "inner_r2" not in tasks.columns:
        return tasks
    # as arrays: pandas' grouping and boolean masks of string columns took 20 of its 29 ms (profiled)
    split, label = tasks["split"].to_numpy(), tasks["label"].to_numpy(dtype=object)
    inner, is_ok = tasks["inner_r2"].to_numpy(dtype=np.float64), tasks["status"].to_numpy(dtype=object) == "ok"
    extra = []
    for (at_split, route), at in _group_rows(tasks[is_ok & ~np.isnan(inner)], ["split", "route"]):
        rows = np.flatnonzero(is_ok & ~np.isnan(inner))[at]
        if len(set(label[rows])) < 2:
            continue
        chosen = label[rows[np.argmax(inner[rows])]]  # the first of the highest, as idxmax
        same = np.flatnonzero((split == at_split) & (label == chosen) & is_ok)
        extra.append(tasks.iloc[same].assign(label=best_label(route), method="best", chosen=chosen))
    return pd.concat([tasks, *extra], ignore_index=True) if extra else tasks


_PREDICTION_VALUES = ("r2", "vaf", "nrmse", "rmse")


def _prediction_table(parts) -> pd.DataFrame:
    """Every ok task's k-step rows then its free-run rows (``step`` 0), under its keys, in task order: the frame of
    ``pd.concat`` of each task's ``kstep.assign(mode="kstep")`` and ``freerun.assign(mode="freerun", step=0)`` with
    the keys assigned, built from the columns' arrays at once (per-task pandas calls took 2.3 s of 3.0 s of the
    demo's assembly, profiled)."""
    if not parts:
        return pd.DataFrame()
    counts, mode_counts = [], []
    cols: dict = {k: [] for k in ("step", "channel", *_PREDICTION_VALUES, "n_samples")}
    for _keys_, res in parts:
        ks, fr = _arrays(res["kstep"]), _arrays(res["freerun"])
        n_k, n_f = len(ks["step"]), len(fr["channel"])
        counts.append(n_k + n_f)
        mode_counts += [n_k, n_f]
        cols["step"] += [np.asarray(ks["step"], np.int64), np.zeros(n_f, np.int64)]
        for k in ("channel", *_PREDICTION_VALUES, "n_samples"):
            cols[k] += [ks[k], fr[k]]
    # a task's keys repeated over its rows: text as the string column pandas infers, taken from one value per task
    # (not inferred from a value per row: 12 of the table's 26 ms), a number in its NumPy type
    keys = {k: _repeated([kk[k] for kk, _ in parts], np.repeat(np.arange(len(parts)), counts)) for k in _KEYS}
    mode = _repeated(["kstep", "freerun"], np.repeat(np.tile([0, 1], len(parts)), mode_counts))
    values = {k: np.concatenate(v) for k, v in cols.items()}
    values["channel"] = pd.Series(values["channel"], dtype=object)  # as the scores' tables hold it
    return pd.DataFrame({**keys, "mode": mode, **values})


def _repeated(values: list, at: np.ndarray):
    """``values[at]`` as a frame's column: text as the string column pandas infers from it, else a NumPy array."""
    if isinstance(values[0], str):
        return pd.array(values, dtype=pd.Series(values[:1]).dtype).take(at)
    return np.asarray(values)[at]


def _arrays(table) -> dict:
    """The columns of a scores table as arrays (by name), each read once (a column read from a frame by name
    costs ~40 µs; the assembly read 17 per task), or ``table`` itself when it is such a dict already."""
    if not isinstance(table, pd.DataFrame):
        return table
    return {name: column.to_numpy() for name, column in table.items()}


def _assemble(st: BenchSettings, tasks, results) -> dict:
    rows, pred, traces_p, traces_l, surrogate = [], [], [], [], {}
    limits = None
    for task, res in zip(tasks, results):
        keys = _keys(st, task)
        if "error" in res or "skipped" in res:
            rows.append(_task_row(st, task, res))
            continue
        arrays = {"kstep": _arrays(res["kstep"]), "freerun": _arrays(res["freerun"])}
        rows.append(_task_row(st, task, {**res, **arrays}))
        pred.append((keys, arrays))
        if res.get("prediction_trace") is not None and not res["prediction_trace"].empty:
            traces_p.append(res["prediction_trace"].assign(label=keys["label"], route=keys["route"]))
        if res.get("loop_trace") is not None:
            traces_l.append(res["loop_trace"].assign(label=keys["label"], route=keys["route"]))
            limits = res["limits"]
        if res.get("surrogate") is not None:
            surrogate.setdefault(task.split_index, {"split": task.split_index, **res["surrogate"]})
    task_table = pd.DataFrame(rows)
    return {"tasks": task_table, "prediction": _prediction_table(pred), "traces_prediction": _concat(traces_p),
            "traces_loop": _concat(traces_l), "surrogate": pd.DataFrame(list(surrogate.values())),
            "limits": limits}


def _concat(frames) -> pd.DataFrame:
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()


def _columns(table: pd.DataFrame, names) -> pd.DataFrame:
    return table[[c for c in names if c in table.columns]].copy()


def _sweep_members(tasks: pd.DataFrame, st: BenchSettings) -> dict:
    """Rows of the task table belonging to each sweep (the base point belongs to every sweep)."""
    ok = tasks[tasks["status"] == "ok"]
    full, quiet, h0 = ok["full_train"], ok["noise_scale"] == 1.0, ok["horizon_steps"] == st.horizon_steps
    members = {"base": (ok[full & quiet & h0], None),
               "train_trials": (ok[quiet & h0], "n_train_trials"),
               "noise_scale": (ok[full & h0], "noise_scale"),
               "horizon_steps": (ok[full & quiet], "horizon_steps")}
    return {k: v for k, v in members.items() if k == "base" or v[0][v[1]].nunique() > 1}


def _sweeps(tasks: pd.DataFrame, st: BenchSettings, with_best: pd.DataFrame | None = None,
            members: dict | None = None) -> pd.DataFrame:
    """Mean and interval of every metric per sweep, point and label (``with_best``: :func:`_with_best` of
    ``tasks`` when the caller has it; ``members``: :func:`_sweep_members` of it)."""
    tasks = _with_best(tasks, st) if with_best is None else with_best
    members = _sweep_members(tasks, st) if members is None else members
    metrics = [m for m in METRICS if m in tasks.columns]
    rows = []
    for sweep, (sub, col) in members.items():
        values = sub[metrics].to_numpy(dtype=np.float64)  # a column per metric; each group's rows taken from it
        for key, at in _group_rows(sub, ["label", "route", "method"] + ([col] if col else [])):
            for metric, v in zip(metrics, values[at].T):
                mean, lo, hi = t_interval(v)
                rows.append({"sweep": sweep, "value": float(key[3]) if col else math.nan, "label": key[0],
                             "route": key[1], "method": key[2], "metric": metric,
                             "n": int(np.count_nonzero(~np.isnan(v))), "mean": mean, "ci_low": lo, "ci_high": hi})
    return pd.DataFrame(rows, columns=["sweep", "value", "label", "route", "method", "metric", "n", "mean",
                                       "ci_low", "ci_high"])


def _group_rows(frame: pd.DataFrame, keys: list) -> list:
    """``(key, positions)`` of each group of ``frame`` by the columns ``keys``, as ``frame.groupby(keys,
    sort=True)`` iterates them (keys in sorted order, rows in frame order, groups with a missing key left out),
    with the rows as positions: the groups' frames cost a quarter of the benchmark's assembly (profiled)."""
    cols = [frame[k].to_numpy(dtype=object) for k in keys]
    groups: dict = {}
    for i, key in enumerate(zip(*cols)):
        if not any(v is None or (isinstance(v, float) and v != v) for v in key):
            groups.setdefault(key, []).append(i)
    return [(key, np.asarray(groups[key], dtype=np.intp)) for key in sorted(groups)]


def _comparison(tasks: pd.DataFrame, st: BenchSettings, with_best: pd.DataFrame | None = None,
                members: dict | None = None) -> pd.DataFrame:
    """Paired (same split, same setting) differences direct − indirect for every pair of methods, and for the
    routes represented by their best method on the training trials (when a route has several)."""
    tasks = _with_best(tasks, st) if with_best is None else with_best
    members = _sweep_members(tasks, st) if members is None else members
    ind = [m.label for m in st.methods if m.route == "indirect"]
    dirs = [m.label for m in st.methods if m.route == "direct"]
    if set(tasks["label"]) >= {best_label("indirect"), best_label("direct")}:
        ind, dirs = ind + [best_label("indirect")], dirs + [best_label("direct")]
    rows = []
    for sweep, (sub, col) in members.items():
        metrics = [m for m in METRICS if m in sub.columns]
        split, label = sub["split"].to_numpy(), sub["label"].to_numpy(dtype=object)
        values = sub[metrics].to_numpy(dtype=np.float64)
        points = None if col is None else sub[col].to_numpy()
        for value in ([None] if col is None else sorted(sub[col].unique())):
            at = slice(None) if col is None else points == value  # the part's rows, as arrays (no frame per part)
            wides = _wides_of(split[at], label[at], values[at], metrics)
            if wides is None:
                wides = _wides_grouped(sub if col is None else sub[at], metrics)
            for a in ind:
                for b in dirs:
                    rows += _paired(wides, a, b, sweep, value)
    return pd.DataFrame(rows, columns=["sweep", "value", "indirect", "direct", "metric", "n", "mean_difference",
                                       "ci_low", "ci_high", "better"])


def _wides(part: pd.DataFrame) -> dict:
    """Each metric's mean per split and label, as ``{metric: {label: values by split}}`` (once per part, not per
    pair): the columns ``pivot_table`` gives metric by metric (a label without any value left out)."""
    metrics = [m for m in METRICS if m in part.columns]
    wides = _wides_of(part["split"].to_numpy(), part["label"].to_numpy(dtype=object),
                      part[metrics].to_numpy(dtype=np.float64), metrics)
    return _wides_grouped(part, metrics) if wides is None else wides


def _wides_of(split: np.ndarray, label: np.ndarray, values: np.ndarray, metrics: list) -> dict | None:
    """:func:`_wides` of a part given as arrays (``values``: a column per metric); None when a (split, label) pair
    has several rows (then its mean is pandas' grouped mean, :func:`_wides_grouped`).

    In the benchmark's tables a pair has one row (one task per split, label and setting): its "mean" is that row's
    value, placed by array indexing (pandas' grouping and unstacking, and a frame per part, took 0.3 s of the
    demo's assembly, profiled)."""
    splits, s_at = np.unique(split, return_inverse=True)
    labels = sorted(set(label))
    if any(not isinstance(v, str) for v in labels):
        return None
    l_at = np.searchsorted(np.asarray(labels, dtype=object), label) if labels else np.zeros(0, np.intp)
    cell = s_at.reshape(-1) * len(labels) + l_at
    if np.unique(cell).size != cell.size:
        return None
    wide = np.full((len(metrics), splits.size * len(labels)), np.nan)
    wide[:, cell] = values.T
    wide = wide.reshape(len(metrics), splits.size, len(labels))
    out = {m: {} for m in metrics}
    for i, metric in enumerate(metrics):
        for j, name in enumerate(labels):
            if not np.all(np.isnan(wide[i, :, j])):
                out[metric][name] = wide[i, :, j].copy()
    return out


def _wides_grouped(part: pd.DataFrame, metrics: list) -> dict:
    wide = part.groupby(["split", "label"], sort=True)[metrics].mean().unstack("label")
    values = wide.to_numpy(dtype=np.float64)
    out = {m: {} for m in metrics}
    for j, (metric, label) in enumerate(wide.columns):
        if not np.all(np.isnan(values[:, j])):
            out[metric][label] = values[:, j]
    return out


def _paired(wides, a, b, sweep, value) -> list:
    rows = []
    for metric, higher in METRICS.items():
        if metric not in wides:
            continue
        wide = wides[metric]
        if a not in wide or b not in wide:
            continue
        d = wide[b] - wide[a]
        d = d[~np.isnan(d)]
        ref = wide[a][~np.isnan(wide[a])]
        margin = practical_margin(metric, float(ref.mean()))
        mean, lo, hi, better = paired_verdict(d, higher, margin)
        rows.append({"sweep": sweep, "value": math.nan if value is None else float(value), "indirect": a,
                     "direct": b, "metric": metric, "n": int(d.size), "mean_difference": mean, "ci_low": lo,
                     "ci_high": hi, "better": better})
    return rows
