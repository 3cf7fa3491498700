"""The study page: verdicts in words, forest plots, transfer across days, the cohort's site ranking, the sessions
with their own pages linked, and the provenance (HTML, figures inline as base64 PNG).
"""

from __future__ import annotations

import base64
import html
import json
import math

import pandas as pd

from ...sysid.caution import CAUTION

__all__ = ["summary_lines", "study_html", "session_page", "session_page_name"]

_MEANING = {
    "direct better": "the direct route predicts better, beyond the practical margin",
    "indirect better": "the indirect route predicts better, beyond the practical margin",
    "transfer gains": "a model from earlier days predicts the later session better than the same day's own",
    "transfer loses": "a model from earlier days predicts the later session worse, beyond the margin",
    "pooled better": "the model pooled over other subjects predicts better than the subject's own",
    "own model better": "the subject's own model predicts better than one pooled over the other subjects",
    "equivalent": "the whole interval lies inside the practical margin: no difference that matters",
    "small": "the interval excludes zero but not the practical margin: a difference too small to matter",
    "undecided": "the interval reaches beyond the margin and contains zero: more subjects needed",
    "too few subjects": "fewer than two subjects could be pooled",
    "indirect tracks better": "steering with the direct route leaves a larger tracking error, beyond the margin",
    "direct tracks better": "steering with the direct route leaves a smaller tracking error, beyond the margin",
    "direct uses more energy": "the direct route's loops use more input energy, beyond the margin",
    "indirect uses more energy": "the direct route's loops use less input energy, beyond the margin",
}
_LOOP_TEXT = ("Closed loop, per session (the single-session benchmark's task: each fit tracks a pulse on a surrogate "
              "plant fitted on the session's held-out trials, inside the input range recorded on its training "
              "trials)")


def _f(v, fmt="+.3g") -> str:
    return "n/a" if v is None or (isinstance(v, float) and not math.isfinite(v)) else format(v, fmt)


def summary_lines(result) -> list:
    """The verdicts in words, one line each, then the notes and exclusions."""
    lines = [f"Study {result.table.name}: {len(result.table.sessions)} sessions of {len(result.table.subjects)} "
             f"subjects; {len(result.tasks)} tasks ({result.provenance['execution']['n_cached']} from the cache)."]
    for r in result.verdicts.itertuples():
        what = "pooled relative difference" if r.comparison.startswith("loop") else "pooled difference of held-out R²"
        lines.append(
            f"{r.description}: {what} {_f(r.estimate)} [95 % {_f(r.ci_low)}, "
            f"{_f(r.ci_high)}] over {r.n_subjects} subjects; between-subject spread tau {_f(r.tau, '.2g')} "
            f"(I² {_f(100 * r.i2 if isinstance(r.i2, float) else math.nan, '.0f')} %); "
            f"margin ±{_f(r.margin, '.2g')}: "
            f"{r.verdict} ({_MEANING.get(r.verdict, '')}).")
        if r.left_out:
            lines.append(f"  left out of this comparison: {r.left_out} (no within-subject variance).")
    if not result.cohort_sites.empty:
        c = result.cohort_sites
        first = c[c["label"] == c["label"].iloc[0]]
        lines.append(f"Cohort site ranking ({first['label'].iloc[0]}): "
                     + ", ".join(f"{s} (mean rank {m:.2f})" for s, m in zip(first["site"], first["mean_rank"]))
                     + f"; agreement across subjects, Kendall's W = {first['kendall_w'].iloc[0]:.2f}.")
    lines += _loop_lines(result)
    lines += list(result.notes)
    for r in result.table.excluded.itertuples():
        lines.append(f"Excluded: {r.subject}/{r.session} ({r.reason}).")
    failed = result.tasks[result.tasks["status"] == "failed"]
    if len(failed):
        lines.append(f"{len(failed)} task(s) failed; see the tasks table (first: {failed['error'].iloc[0]}).")
    return lines


def _loop_lines(result) -> list:
    loops = result.closed_loop
    if loops is None or loops.empty:
        return []
    parts = []
    for label, g in loops.groupby("label", sort=True):
        parts.append(f"{label}: tracking error {g['tracking_rms'].mean():.3g}, energy {g['energy_ua2'].mean():.4g} "
                     f"(mean over subjects), {int(g['violations'].sum())} limit violations and "
                     f"{int(g['n_fallback'].sum())} fallbacks in {int(g['n_loops'].sum())} loops")
    return [f"{_LOOP_TEXT}: " + "; ".join(parts) + "."]


def session_page_name(subject: str, session: str) -> str:
    """File name of a session's page, inside ``sessions/``."""
    safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in f"{subject}__{session}")
    return f"{safe}.html"


def _table(frame: pd.DataFrame, escape: bool = True) -> str:
    return frame.to_html(index=False, float_format=lambda v: f"{v:.4g}", border=0, escape=escape, na_rep="")


def _img(png: bytes, alt: str) -> str:
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode()}">'


_STYLE = ("body{font-family:sans-serif;max-width:1100px;margin:1em auto;font-size:14px}"
          "table{border-collapse:collapse;font-size:12px}td,th{padding:2px 6px;border-bottom:1px solid #ddd}"
          ".caution{background:#fff4e0;padding:.5em;border-left:4px solid #c4561b}")


def study_html(result, figures: dict, lines: list) -> str:
    """The study page (figures are PNG bytes by name, as :func:`stimsteer.control.figures.study.study_figures`)."""
    esc = html.escape
    parts = [f"<!doctype html><html><head><meta charset='utf-8'><title>Study {esc(result.table.name)}</title>"
             f"<style>{_STYLE}</style></head><body><h1>Study {esc(result.table.name)}</h1>",
             f"<p class='caution'>{esc(CAUTION)}</p>", "<h2>Verdict</h2><ul>"]
    parts += [f"<li>{esc(s)}</li>" for s in lines] + ["</ul>", _table(result.verdicts), "<h2>Forest plots</h2>"]
    parts += [_img(png, name) for name, png in figures.items() if name.startswith("forest")]
    parts.append("<h2>Transfer across days</h2>")
    if "transfer" in figures:
        parts += [_img(figures["transfer"], "transfer"), _table(result.transfer)]
    parts.append("<h2>Cohort site ranking</h2>")
    if "sites" in figures:
        parts += [_img(figures["sites"], "sites"), _table(result.cohort_sites)]
    if result.closed_loop is not None and not result.closed_loop.empty:
        parts += [f"<h2>Closed loop</h2><p>{esc(_LOOP_TEXT)}. Tracking error and energy are means over each "
                  "subject's sessions and splits, in the outputs' and inputs' units; violations and fallbacks are "
                  "counts.</p>", _table(result.closed_loop)]
    sessions = result.table.sessions[["subject", "session", "order", "condition", "group", "content_hash"]].copy()
    sessions["page"] = [f"<a href='sessions/{session_page_name(a, b)}'>{esc(a)}/{esc(b)}</a>"
                        for a, b in zip(sessions["subject"], sessions["session"])]
    sessions["content_hash"] = sessions["content_hash"].str[:12]
    for c in ("subject", "session", "condition", "group"):
        sessions[c] = sessions[c].map(lambda v: esc(str(v)))
    parts += ["<h2>Sessions</h2>", _table(sessions, escape=False)]
    if len(result.table.excluded):
        parts += ["<h2>Excluded</h2>", _table(result.table.excluded)]
    parts += ["<h2>Tables</h2><p>Every table is in <code>tables/</code> as CSV and Parquet.</p>",
              "<h2>Provenance</h2><pre>", esc(json.dumps(result.provenance, indent=1, default=str)), "</pre>",
              "</body></html>"]
    return "\n".join(parts)


def session_page(result, subject: str, session: str) -> str:
    """A session's own page: its row of the study table and its held-out scores in every analysis."""
    esc = html.escape
    rows = result.tasks[(result.tasks["subject"] == subject) & (result.tasks["session"] == session)]
    cols = ["analysis", "label", "split", "status", "r2_mean", "r2_step1", "r2_last", "nrmse_mean",
            "n_train_trials", "n_test_trials", "tracking_rms", "energy_ua2", "violations", "fit_s", "error"]
    meta = result.table.sessions[(result.table.sessions["subject"] == subject)
                                 & (result.table.sessions["session"] == session)]
    return "\n".join([
        f"<!doctype html><html><head><meta charset='utf-8'><title>{esc(subject)}/{esc(session)}</title>"
        f"<style>{_STYLE}</style></head><body><p><a href='../study.html'>study page</a></p>",
        f"<h1>Session {esc(subject)}/{esc(session)}</h1><p class='caution'>{esc(CAUTION)}</p>",
        _table(meta.T.reset_index().rename(columns={"index": "field"})),
        "<h2>Held-out scores</h2><p>sessions: fitted on this session's training trials; days: fitted on the "
        "subject's earlier sessions; subjects: fitted on the other subjects. Same held-out trials in each. "
        "Closed loop (sessions only): tracking error, energy and limit violations on the surrogate plant.</p>",
        _table(rows[[c for c in cols if c in rows.columns]]), "</body></html>"])
