"""The study page's figures, drawn from a :class:`~stimsteer.control.study.StudyResult`.

matplotlib's object API only (``Figure()``; no pyplot, no backend switch, no global ``rcParams``).
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

__all__ = ["forest_figure", "transfer_figure", "sites_figure", "study_figures"]

_DPI = 110
_TEXT, _TITLE = 9, 10
_SUBJECT, _POOLED, _MARGIN = "#1d5f99", "#c4561b", "#e9e9e9"
_Z = 1.959963984540054  # normal 97.5 % quantile: the per-subject and pooled intervals are normal ones


def _axes(fig, *args):
    ax = fig.add_subplot(*args)
    ax.spines[["top", "right"]].set_visible(False)
    ax.tick_params(labelsize=_TEXT)
    return ax


def forest_figure(effects: pd.DataFrame, verdict: pd.Series) -> Figure:
    """Per-subject differences (of held-out R², or relative closed-loop figures) with 95 % intervals, the pooled
    estimate (diamond) and the margin.

    Parameters
    ----------
    effects : pandas.DataFrame
        Rows of :attr:`StudyResult.effects` of one comparison (``subject``, ``effect``, ``se``, ``pooled``).
    verdict : pandas.Series
        The matching row of :attr:`StudyResult.verdicts`.
    """
    g = effects.sort_values("subject", ascending=False).reset_index(drop=True)
    n = len(g)
    fig = Figure(figsize=(6.4, 1.6 + 0.28 * n), dpi=_DPI)
    ax = _axes(fig, 1, 1, 1)
    m = float(verdict["margin"])
    ax.axvspan(-m, m, color=_MARGIN, zorder=0, label=f"practical margin ±{m:.2g}")
    ax.axvline(0.0, color="#555555", linewidth=0.8)
    y = np.arange(n) + 2
    se = np.nan_to_num(g["se"].to_numpy(dtype=float))
    ax.errorbar(g["effect"], y, xerr=_Z * se, fmt="s", color=_SUBJECT, markersize=4, capsize=2, linewidth=1,
                label="subject: mean paired difference ± 95 %")
    est, lo, hi = (float(verdict.get(k, np.nan)) for k in ("estimate", "ci_low", "ci_high"))
    if np.isfinite(lo):
        ax.fill([lo, est, hi, est], [0.5, 0.85, 0.5, 0.15], color=_POOLED,
                label=f"pooled (DerSimonian–Laird): {est:+.3g} [{lo:+.3g}, {hi:+.3g}]")
    ax.set_yticks([0.5, *y], ["pooled", *g["subject"]], fontsize=_TEXT)
    what = ("relative difference" if str(verdict["comparison"]).startswith("loop")
            else "difference of held-out k-step R²")
    ax.set_xlabel(f"{what} ({verdict['description']}), dimensionless", fontsize=_TEXT)
    tau = float(verdict.get("tau", np.nan))
    ax.set_title(f"{verdict['description']}: {verdict['verdict']} (between-subject spread tau = {tau:.2g})",
                 fontsize=_TITLE)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    fig.subplots_adjust(left=0.14, right=0.62)
    return fig


def transfer_figure(transfer: pd.DataFrame) -> Figure:
    """Held-out R² of the later sessions: same-day model vs model fitted on the earlier days, per method."""
    fig = Figure(figsize=(6.4, 3.6), dpi=_DPI)
    ax = _axes(fig, 1, 1, 1)
    for i, ((label, model), g) in enumerate(transfer.groupby(["label", "model"], sort=True)):
        x = g["order"].to_numpy(dtype=float) + (0.06 if model == "earlier days" else -0.06)
        err = np.vstack([g["r2_mean"] - g["ci_low"], g["ci_high"] - g["r2_mean"]])
        ax.errorbar(x, g["r2_mean"], yerr=np.nan_to_num(err), marker="o" if model == "same day" else "^",
                    linestyle="-" if model == "same day" else "--", capsize=2, label=f"{label}, {model}")
    ax.set_xticks(sorted(transfer["order"].unique()))
    ax.set_xlabel("session (recording order), count", fontsize=_TEXT)
    ax.set_ylabel("held-out k-step R², dimensionless", fontsize=_TEXT)
    ax.set_title("Transfer across days: mean over subjects with 95 % t-interval", fontsize=_TITLE)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    fig.subplots_adjust(right=0.6, bottom=0.15)
    return fig


def sites_figure(sites: pd.DataFrame, cohort: pd.DataFrame) -> Figure:
    """Rank of each stimulation site per subject (1 = largest impulse-response energy), cohort order."""
    label = sorted(sites["label"].unique())[0]
    per = sites[sites["label"] == label]
    order = cohort[cohort["label"] == label].sort_values("cohort_rank")["site"].tolist()
    wide = per.pivot(index="subject", columns="site", values="rank").reindex(columns=order)
    fig = Figure(figsize=(max(5.0, 2.4 + 0.7 * len(order)), 1.8 + 0.25 * len(wide)), dpi=_DPI)
    ax = _axes(fig, 1, 1, 1)
    im = ax.imshow(wide.to_numpy(dtype=float), cmap="viridis_r", aspect="auto")
    ax.set_xticks(range(len(order)), order, fontsize=_TEXT)
    ax.set_yticks(range(len(wide)), wide.index, fontsize=_TEXT)
    ax.set_xlabel("stimulation site (cohort order)", fontsize=_TEXT)
    w = float(cohort.loc[cohort["label"] == label, "kendall_w"].iloc[0])
    ax.set_title(f"Site rank per subject ({label})\nagreement across subjects: Kendall's W = {w:.2f}",
                 fontsize=_TITLE)
    fig.colorbar(im, ax=ax).set_label("rank (1 = most output energy)", fontsize=_TEXT)
    return fig


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue()


def study_figures(result) -> dict:
    """Every figure of the study page as PNG bytes, by name (``forest_<comparison>_<n>``, ``transfer``,
    ``sites``)."""
    out = {}
    for i, row in result.verdicts.iterrows():
        part = result.effects[(result.effects["comparison"] == row["comparison"])
                              & (result.effects["label"] == row["label"])]
        if len(part):
            out[f"forest_{row['comparison']}_{i}"] = _png(forest_figure(part, row))
    if not result.transfer.empty:
        out["transfer"] = _png(transfer_figure(result.transfer))
    if not result.sites.empty:
        out["sites"] = _png(sites_figure(result.sites, result.cohort_sites))
    return out
