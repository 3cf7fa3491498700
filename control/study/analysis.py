"""The study's tables: task results in one tidy table, per-subject effects, pooled verdicts, transfer, sites.

Three comparisons, each a per-subject effect pooled across subjects (:func:`~.pooling.random_effects`):

* ``route``: direct − indirect held-out R², paired by (session, split), for every indirect/direct pair of methods;
* ``days``: R² of a model fitted on the subject's earlier sessions − R² of the same method fitted on the later
  session itself, on the same held-out trials of the later session (paired by session, split);
* ``subjects``: R² of the model pooled over the other subjects − R² of the subject's own model, same held-out
  trials (paired by session, split);
* ``loop_tracking`` and ``loop_energy`` (when the study steers, :mod:`~.loop`): the closed-loop tracking error and
  input energy of the direct route relative to the indirect one, ``(direct − indirect) / indirect`` per (session,
  split), for every indirect/direct pair of methods. Relative, so subjects recorded in different units or scales
  pool alike, and the practical margin is the single-session benchmark's relative one (``margin_rel`` of the
  reference, i.e. ``margin_rel`` on this scale). Limit violations are counted, not pooled (:func:`loop_table`).

A subject's effect is the mean of its paired differences and its variance the squared standard error of that mean
(sample variance / number of pairs). Splits of one session share trials, so that variance is optimistic within a
subject; the random-effects spread tau² absorbs what varies between subjects. A subject with fewer than two pairs
cannot give a variance and is left out of that comparison by name.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from ..evaluation import t_interval
from .loop import LOOP_SCORES
from .pooling import kendall_w, margin_verdict, random_effects
from .settings import StudySettings

__all__ = ["task_table", "effects_table", "verdicts_table", "transfer_table", "site_tables", "loop_table"]

_SCORES = ["r2_mean", "r2_step1", "r2_last", "nrmse_mean", "n_train_trials", "n_test_trials", "fit_s", "total_s",
           "cpu_s", *LOOP_SCORES]
#: Closed-loop comparisons: the task column compared and what it is.
_LOOP = {"loop_tracking": ("tracking_rms", "closed-loop tracking error"),
         "loop_energy": ("energy_ua2", "closed-loop input energy")}


def task_table(tasks, results: dict, table, st: StudySettings, cached: set) -> pd.DataFrame:
    """One row per task: keys, status, scores (``cached`` says whether this run took it from the cache)."""
    meta = table.sessions.set_index(["subject", "session"])
    rows = []
    for t in tasks:
        res, spec = results[t.key], st.methods[t.method_index]
        m = meta.loc[(t.subject, t.session)]
        row = {"analysis": t.kind, "subject": t.subject, "session": t.session, "order": int(m["order"]),
               "condition": m["condition"], "group": m["group"], "label": spec.label, "route": spec.route,
               "method": spec.method, "split": t.split, "status": "failed" if "error" in res else "ok",
               "error": res.get("error", ""), "key": t.key, "cached": t.key in cached,
               "warnings": " | ".join(res.get("warnings", []))}
        row.update({k: res.get(k, math.nan) for k in _SCORES})
        rows.append(row)
    return pd.DataFrame(rows)


def _pairs(a: pd.DataFrame, b: pd.DataFrame, value: str = "r2_mean") -> pd.DataFrame:
    """Rows of ``a`` and ``b`` matched by (subject, session, split): columns ``subject, a, b`` (of ``value``)."""
    keys = ["subject", "session", "split"]
    m = a[keys + [value]].merge(b[keys + [value]], on=keys, suffixes=("_a", "_b"))
    return m.rename(columns={f"{value}_a": "a", f"{value}_b": "b"}).dropna(subset=["a", "b"])


def _comparisons(ok: pd.DataFrame, st: StudySettings):
    """(comparison, label, description, pairs of new and reference) for every comparison the tasks allow."""
    within = ok[ok["analysis"] == "sessions"]
    ind = [m.label for m in st.methods if m.route == "indirect"]
    dirs = [m.label for m in st.methods if m.route == "direct"]
    for a in ind:
        for b in dirs:
            yield ("route", f"{b} vs {a}", f"{b} − {a}",
                   _pairs(within[within["label"] == b], within[within["label"] == a]))
    for kind, text in (("days", "earlier days − same day"), ("subjects", "other subjects − own")):
        part = ok[ok["analysis"] == kind]
        for label in sorted(part["label"].unique()):
            yield (kind, label, f"{label}: {text}", _pairs(part[part["label"] == label],
                                                           within[within["label"] == label]))
    for comparison, (value, text) in _LOOP.items():
        if value not in within or within[value].isna().all():
            continue
        for a in ind:
            for b in dirs:
                yield (comparison, f"{b} vs {a}", f"{text}: ({b} − {a}) / {a}",
                       _pairs(within[within["label"] == b], within[within["label"] == a], value))


def _differences(comparison: str, pairs: pd.DataFrame) -> np.ndarray:
    """Paired differences: of R² as they are; closed-loop figures relative to the reference (NaN where it is 0)."""
    a, b = pairs["a"].to_numpy(dtype=np.float64), pairs["b"].to_numpy(dtype=np.float64)
    if comparison not in _LOOP:
        return a - b
    with np.errstate(divide="ignore", invalid="ignore"):
        d = (a - b) / np.abs(b)
    return d[np.isfinite(d)]


def effects_table(tasks: pd.DataFrame, st: StudySettings) -> pd.DataFrame:
    """Per comparison and subject: ``effect`` (mean paired difference: of R², or relative for the closed loop),
    ``variance``, ``n_pairs``, ``reference`` (mean of the reference's figure; ``reference_r2`` for R²) and
    ``pooled`` (False with a ``note`` when left out)."""
    ok = tasks[tasks["status"] == "ok"]
    rows = []
    for comparison, label, text, pairs in _comparisons(ok, st):
        for subject, g in pairs.groupby("subject", sort=True):
            d = _differences(comparison, g)
            var = float(np.var(d, ddof=1) / d.size) if d.size > 1 else math.nan
            note = "" if d.size > 1 and var > 0 else f"{d.size} paired value(s) with no spread: no variance"
            ref = float(g["b"].mean())
            rows.append({"comparison": comparison, "label": label, "description": text, "subject": subject,
                         "effect": float(d.mean()) if d.size else math.nan, "variance": var,
                         "se": math.sqrt(var) if var >= 0 else math.nan, "n_pairs": int(d.size), "reference": ref,
                         "reference_r2": math.nan if comparison in _LOOP else ref, "pooled": not note, "note": note})
    return pd.DataFrame(rows, columns=["comparison", "label", "description", "subject", "effect", "variance", "se",
                                       "n_pairs", "reference", "reference_r2", "pooled", "note"])


_WORDS = {"route": ("direct better", "indirect better"), "days": ("transfer gains", "transfer loses"),
          "subjects": ("pooled better", "own model better"),
          "loop_tracking": ("indirect tracks better", "direct tracks better"),
          "loop_energy": ("direct uses more energy", "indirect uses more energy")}


def verdicts_table(effects: pd.DataFrame, st: StudySettings) -> pd.DataFrame:
    """Per comparison: the DerSimonian–Laird pooled difference, its 95 % interval, the between-subject spread
    (tau, I²), the practical margin and the verdict (:func:`~.pooling.margin_verdict`)."""
    rows = []
    for (comparison, label), g in effects.groupby(["comparison", "label"], sort=False):
        use = g[g["pooled"]]
        left_out = ", ".join(g.loc[~g["pooled"], "subject"])
        margin = (float(st.margin_rel) if comparison in _LOOP  # relative differences: margin_rel of the reference
                  else st.margin(float(use["reference_r2"].mean()) if len(use) else math.nan))
        row = {"comparison": comparison, "label": label, "description": g["description"].iloc[0],
               "n_subjects": len(use), "left_out": left_out, "margin": margin}
        if len(use) >= 2:
            re = random_effects(use["effect"], use["variance"])
            row.update(re.to_dict())
            row["verdict"] = margin_verdict(re.ci_low, re.ci_high, margin, *_WORDS[comparison])
        else:
            row.update(estimate=float(use["effect"].mean()) if len(use) else math.nan, verdict="too few subjects")
        rows.append(row)
    cols = ["comparison", "label", "description", "n_subjects", "estimate", "se", "ci_low", "ci_high", "tau", "tau2",
            "i2", "q", "margin", "verdict", "left_out"]
    return pd.DataFrame(rows).reindex(columns=cols)


def transfer_table(tasks: pd.DataFrame) -> pd.DataFrame:
    """Per session order and method: R² of the same-day model and of the earlier-days model on the same held-out
    trials, mean over subjects and splits with its 95 % t-interval over subjects."""
    ok = tasks[(tasks["status"] == "ok") & tasks["analysis"].isin(["sessions", "days"])]
    later = ok[ok["analysis"] == "days"][["subject", "session"]].drop_duplicates()
    part = ok.merge(later, on=["subject", "session"])
    rows = []
    for (order, label, kind), g in part.groupby(["order", "label", "analysis"], sort=True):
        per_subject = g.groupby("subject")["r2_mean"].mean()
        mean, lo, hi = t_interval(per_subject)
        rows.append({"order": int(order), "label": label, "model": "same day" if kind == "sessions" else "earlier days",
                     "n_subjects": int(per_subject.size), "r2_mean": mean, "ci_low": lo, "ci_high": hi})
    return pd.DataFrame(rows, columns=["order", "label", "model", "n_subjects", "r2_mean", "ci_low", "ci_high"])


def site_tables(tasks_with_sites: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame, float]:
    """Per subject and site: mean impulse-response energy over sessions and splits, and its rank (1 = most
    effective); the cohort table (mean rank per site, across subjects); Kendall's W across subjects."""
    if tasks_with_sites.empty:
        return pd.DataFrame(), pd.DataFrame(), math.nan
    per = tasks_with_sites.groupby(["label", "subject", "site"], sort=True)["energy"].mean().reset_index()
    per["rank"] = per.groupby(["label", "subject"])["energy"].rank(ascending=False, method="average")
    cohort = per.groupby(["label", "site"])["rank"].agg(["mean", "std", "count"]).reset_index()
    cohort = cohort.rename(columns={"mean": "mean_rank", "std": "rank_sd", "count": "n_subjects"})
    cohort["cohort_rank"] = cohort.groupby("label")["mean_rank"].rank(method="min")
    w_values = {}
    for label, g in per.groupby("label"):
        wide = g.pivot(index="subject", columns="site", values="energy").dropna()
        w_values[label] = kendall_w(wide.to_numpy()) if wide.shape[0] >= 2 and wide.shape[1] >= 2 else math.nan
    cohort["kendall_w"] = cohort["label"].map(w_values)
    first = next(iter(w_values.values()), math.nan)
    return per, cohort.sort_values(["label", "cohort_rank"], ignore_index=True), first


def loop_table(tasks: pd.DataFrame) -> pd.DataFrame:
    """Per method and subject, the per-session closed loops: mean tracking error and input energy over sessions and
    splits, the loops run, the samples beyond a limit (``violations``, summed; 0 is the only acceptable count) and
    the fallbacks to a safe input."""
    cols = ["label", "route", "method", "subject", "n_loops", "tracking_rms", "energy_ua2", "violations",
            "n_fallback", "surrogate_r2"]
    ok = tasks[(tasks["status"] == "ok") & (tasks["analysis"] == "sessions")]
    if "tracking_rms" not in ok or ok["tracking_rms"].isna().all():
        return pd.DataFrame(columns=cols)
    ok = ok[ok["tracking_rms"].notna()]
    g = ok.groupby(["label", "route", "method", "subject"], sort=True)
    out = g.agg(n_loops=("tracking_rms", "size"), tracking_rms=("tracking_rms", "mean"),
                energy_ua2=("energy_ua2", "mean"), violations=("violations", "sum"),
                n_fallback=("n_fallback", "sum"), surrogate_r2=("surrogate_r2", "mean")).reset_index()
    out[["violations", "n_fallback"]] = out[["violations", "n_fallback"]].astype(int)
    return out[cols]
