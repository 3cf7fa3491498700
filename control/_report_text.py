"""The words of the benchmark report, computed from a :class:`~stimsteer.control.evaluation.BenchResult`: the one
recommendation sentence, the table of the differences that matter, the ceiling and floors beside both routes, and
the short summary (console and ``results.json``). No figure is typed in: every number comes from the result.

Reading rules (stated on the page): a difference is a paired mean over splits with its 95 % Student-t interval,
shown as computed (never clipped); below :data:`~stimsteer.control.evaluation.stats.MIN_SPLITS_TO_TELL` splits the
verdict is "too few splits to tell"; a difference smaller than the practical margin is "equivalent"; a closed loop on
a stand-in plant below :data:`~stimsteer.control.evaluation.result.STANDIN_MIN_R2` is not compared at all.
"""

from __future__ import annotations

import weakref

import numpy as np
import pandas as pd

from .evaluation import BenchResult, t_interval
from .evaluation.references import CEILING, FLOOR_MEAN, FLOOR_REST
from .evaluation.result import STANDIN_MIN_R2
from .evaluation.stats import ABSOLUTE_MARGIN, MIN_SPLITS_TO_TELL, RELATIVE_MARGIN, reading_verdict
from .evaluation.tables import best_label

__all__ = ["representatives", "difference_table", "recommendation", "achievable_table", "summarize", "fmt_interval"]

_FMT = {"r2_last": "{:.3f}", "r2_freerun": "{:.3f}", "tracking_rms": "{:.3g}", "energy_ua2": "{:.3g}",
        "fit_s": "{:.2g}", "solve_ms_median": "{:.2g}"}
_CONTROL = ("tracking_rms", "energy_ua2", "solve_ms_median")


def fmt_interval(mean, low, high, fmt: str = "{:.4g}", unit: str = "") -> str:
    """``mean [low, high] unit`` exactly as computed (a bound is never clipped to a range the quantity must lie
    in: an interval that reaches below zero says the splits disagree); ``mean`` alone for fewer than two splits."""
    if mean is None or not np.isfinite(mean):
        return "n/a"
    text = fmt.format(mean)
    if low is not None and np.isfinite(low) and np.isfinite(high):
        text += f" [{fmt.format(low)}, {fmt.format(high)}]"
    return f"{text} {unit}".rstrip()


def representatives(result: BenchResult) -> tuple[str, str]:
    """The labels that stand for the two routes: each route's best method on the training trials when the
    benchmark compared several, else its first method."""
    c = result.comparison
    best = (best_label("indirect"), best_label("direct"))
    if not c.empty and best[0] in set(c["indirect"]) and best[1] in set(c["direct"]):
        return best
    ind, dirs = result.labels("indirect"), result.labels("direct")
    return (ind[0] if ind else best[0]), (dirs[0] if dirs else best[1])


def route_name(result: BenchResult, label: str) -> str:
    """``"indirect (subspace)"``, or for a best-on-training label the methods chosen: ``"direct (hankel on 2 of 3
    splits, lsq on 1)"``."""
    route = "indirect" if label.startswith("indirect") else "direct"
    if label != best_label(route):
        return label
    t = result.tasks
    if t.empty or "inner_r2" not in t:
        return label
    parts = _chosen(t, route, result.settings.n_splits)
    return f"{route} ({', '.join(parts)})" if parts else label


# route_name is asked about 40 times per report (page, tables, summary) for the same two answers, each a group-by
# of the task table: they are kept per task table (weakly: a result that is dropped takes its entries with it)
_CHOSEN: dict = {}


def _chosen(tasks: pd.DataFrame, route: str, n_splits: int) -> tuple:
    """The methods a best-on-training label chose on ``route``, with their split counts, in words."""
    key = (id(tasks), route, n_splits)
    hit = _CHOSEN.get(key)
    if hit is not None and hit[0]() is tasks:
        return hit[1]
    base = tasks[(tasks["route"] == route) & tasks["inner_r2"].notna() & (tasks["status"] == "ok")]
    chosen = base.loc[base.groupby("split")["inner_r2"].idxmax(), "method"].value_counts()
    parts = tuple(f"{m} on {k} of {n_splits} splits" if i == 0 else f"{m} on {k}"
                  for i, (m, k) in enumerate(chosen.items()))
    ref = weakref.ref(tasks, lambda _ref, key=key: _CHOSEN.pop(key, None))
    _CHOSEN[key] = (ref, parts)
    return parts


def _questions(result: BenchResult) -> list:
    H = result.settings.horizon_steps
    ms = 1e3 * H / result.provenance["session"]["sample_rate_hz"]
    unit = result.steered_unit
    return [("r2_last", f"prediction {H} steps ({ms:.0f} ms) ahead", "R²", ""),
            ("r2_freerun", "free run over whole held-out trials", "R²", ""),
            ("tracking_rms", f"closed-loop tracking of {_steered(result)}", "RMS error", unit),
            ("energy_ua2", "stimulation energy of those loops", "Σu²", "µA²"),
            ("fit_s", "fit time", "wall time", "s")]


def _steered(result: BenchResult) -> str:
    loop = result.traces.get("closed_loop", pd.DataFrame())
    return str(loop["channel"].iloc[0]) if not loop.empty else "the steered output"


def _base(result: BenchResult, metric: str, label: str):
    s = result.sweeps
    row = s[(s["sweep"] == "base") & (s["metric"] == metric) & (s["label"] == label)]
    return None if row.empty else row.iloc[0]


def _pair(result: BenchResult, metric: str, a: str, b: str):
    c = result.comparison
    if c.empty:
        return None
    row = c[(c["sweep"] == "base") & (c["metric"] == metric) & (c["indirect"] == a) & (c["direct"] == b)]
    return None if row.empty else row.iloc[0]


def _margin_text(metric: str, reference) -> str:
    if metric.startswith("r2"):
        return f"|ΔR²| < {ABSOLUTE_MARGIN:g}"
    return f"< {100 * RELATIVE_MARGIN:g} % of the value" + (f" ({RELATIVE_MARGIN * abs(reference):.2g})"
                                                            if reference is not None and np.isfinite(reference)
                                                            else "")


def difference_table(result: BenchResult) -> pd.DataFrame:
    """The differences that matter, direct − indirect at the base setting, one row per question.

    Columns ``question``, ``measure``, ``indirect``, ``direct`` (mean [95 % interval] over splits),
    ``direct − indirect`` (paired), ``practical margin``, ``splits``, ``verdict`` (:func:`reading_verdict`, or why
    a comparison is withheld); the ``metric`` and ``better`` of each row are kept in ``attrs``.
    """
    a, b = representatives(result)
    rows, keys = [], []
    for metric, question, measure, unit in _questions(result):
        ra, rb, pair = _base(result, metric, a), _base(result, metric, b), _pair(result, metric, a, b)
        if ra is None or rb is None:
            continue
        fmt = _FMT.get(metric, "{:.4g}")
        withheld = result.control_withheld if metric in _CONTROL else ""
        n = int(pair["n"]) if pair is not None else int(ra["n"])
        verdict = "withheld: stand-in plant below the quality needed" if withheld else \
            reading_verdict(pair["better"], n) if pair is not None else "not paired"
        dfmt = "{:.2g}" if metric.startswith("r2") else fmt  # small R² differences keep their digits, not -0.000
        diff = "" if pair is None else fmt_interval(pair["mean_difference"], pair["ci_low"], pair["ci_high"], dfmt)
        shown = (lambda r: fmt_interval(r["mean"], r["ci_low"], r["ci_high"], fmt)) if not withheld else \
            (lambda r: "withheld")
        diff = "withheld" if withheld else diff
        rows.append({"question": question, "measure": f"{measure} [{unit}]" if unit else measure,
                     "indirect": shown(ra), "direct": shown(rb),
                     "direct − indirect": diff, "practical margin": _margin_text(metric, ra["mean"]),
                     "splits": n, "verdict": verdict})
        keys.append((metric, "withheld" if withheld else (pair["better"] if pair is not None else ""), n))
    table = pd.DataFrame(rows)
    table.attrs["keys"] = keys
    return table


def _use_phrase(result, metric, use, a, b) -> str:
    """One clause of the recommendation for one use (prediction or control), with its deciding figures."""
    ra, rb, pair = _base(result, metric, a), _base(result, metric, b), _pair(result, metric, a, b)
    if ra is None or rb is None or pair is None:
        return ""
    fmt = _FMT[metric]
    unit = result.steered_unit if metric == "tracking_rms" else ""
    name = "R²" if metric.startswith("r2") else "RMS tracking error"
    figures = f"{name} {fmt.format(ra['mean'])} indirect vs {fmt.format(rb['mean'])} direct{' ' + unit if unit else ''}"
    diff = fmt_interval(pair["mean_difference"], pair["ci_low"], pair["ci_high"],
                        "{:.2g}" if metric.startswith("r2") else fmt, unit)
    if pair["better"] in ("direct", "indirect"):
        who = route_name(result, b if pair["better"] == "direct" else a)
        return f"the {who} route for {use} ({figures}; difference {diff})"
    why = "within the practical margin" if pair["better"] == "equivalent" else \
        "the interval of the difference contains 0"
    return f"either route for {use} ({figures}; difference {diff}, {why})"


def recommendation(result: BenchResult) -> str:
    """The one sentence at the top of the report: which route to use for what, with the deciding figures."""
    a, b = representatives(result)
    n = result.settings.n_splits
    H = result.settings.horizon_steps
    control = not result.control.empty
    withheld = result.control_withheld
    if n < MIN_SPLITS_TO_TELL:
        parts = [_figures_only(result, "r2_last", a, b, f"R² {H} steps ahead")]
        if control and not withheld:
            parts.append(_figures_only(result, "tracking_rms", a, b, "closed-loop RMS tracking error"))
        figures = "; ".join(p for p in parts if p)
        return (f"No route can be recommended yet: {n} split(s) are too few to tell (this report needs at least "
                f"{MIN_SPLITS_TO_TELL}); on these splits {figures}. Rerun the benchmark with at least "
                f"{MIN_SPLITS_TO_TELL} splits before choosing." + (f" {_withheld_short(result)}" if withheld else ""))
    parts = [_use_phrase(result, "r2_last", f"prediction {H} steps ahead", a, b)]
    if control and not withheld:
        parts.append(_use_phrase(result, "tracking_rms", "closed-loop control", a, b))
    text = "Use " + "; and ".join(p for p in parts if p) + "."
    if withheld:
        text += f" {_withheld_short(result)}"
    return text


def _withheld_short(result: BenchResult) -> str:
    r2 = result.standin_r2()
    quality = f"its own free-run R² {r2:.2f} is below {STANDIN_MIN_R2:g}" if np.isfinite(r2) else \
        "its own quality could not be scored"
    return f"No recommendation for control: the closed loops ran on a stand-in plant and {quality}."


def _figures_only(result, metric, a, b, what) -> str:
    ra, rb = _base(result, metric, a), _base(result, metric, b)
    if ra is None or rb is None:
        return ""
    fmt = _FMT[metric]
    unit = f" {result.steered_unit}" if metric == "tracking_rms" else ""
    return (f"{what} {fmt.format(ra['mean'])}{unit} for {route_name(result, a)} and {fmt.format(rb['mean'])}{unit} "
            f"for {route_name(result, b)}")


def achievable_table(result: BenchResult) -> pd.DataFrame:
    """Floor, both routes and ceiling side by side (simulated sessions with their plant; else empty).

    Rows: R² at the horizon, free-run R², closed-loop tracking error, stimulation energy; columns: the floor (a mean
    predictor for prediction, no stimulation for control), the two routes, the ceiling (the true model), and the
    share of the way from floor to ceiling each route gets, ``(route − floor) / (ceiling − floor)``.
    """
    refs = result.references
    if refs is None or refs.empty:
        return pd.DataFrame()
    a, b = representatives(result)
    H = result.settings.horizon_steps
    unit = result.steered_unit
    rows = []
    for metric, what, floor in (("r2_last", f"R², {H} steps ahead", FLOOR_MEAN),
                                ("r2_freerun", "R², free run", FLOOR_MEAN),
                                ("tracking_rms", f"RMS tracking error [{unit}]", FLOOR_REST),
                                ("energy_ua2", "stimulation energy [µA²]", FLOOR_REST)):
        ra, rb = _base(result, metric, a), _base(result, metric, b)
        lo = t_interval(refs.loc[refs["reference"] == floor, metric])
        hi = t_interval(refs.loc[refs["reference"] == CEILING, metric])
        if ra is None or rb is None or not np.isfinite(hi[0]):
            continue
        fmt = _FMT[metric]
        row = {"measure": what, "floor": f"{fmt_interval(*lo, fmt)} ({floor.split(': ')[1]})",
               route_name(result, a): fmt_interval(ra["mean"], ra["ci_low"], ra["ci_high"], fmt),
               route_name(result, b): fmt_interval(rb["mean"], rb["ci_low"], rb["ci_high"], fmt),
               "ceiling (true model)": fmt_interval(*hi, fmt)}
        if metric != "energy_ua2" and np.isfinite(lo[0]) and abs(hi[0] - lo[0]) > 0:
            share = [(r["mean"] - lo[0]) / (hi[0] - lo[0]) for r in (ra, rb)]
            row["share of floor → ceiling"] = f"indirect {100 * share[0]:.0f} %, direct {100 * share[1]:.0f} %"
        rows.append(row)
    return pd.DataFrame(rows)


def _achievable_line(result: BenchResult) -> str:
    table = achievable_table(result)
    if table.empty:
        return ""
    parts = []
    for _, r in table.iterrows():
        share = f"; {r['share of floor → ceiling']} of the way" if isinstance(r.get("share of floor → ceiling"),
                                                                         str) else ""
        parts.append(f"{r['measure']}: floor {r['floor'].split(' [')[0].split(' (')[0]}, ceiling "
                     f"{r['ceiling (true model)'].split(' [')[0]}{share}")
    above = any(isinstance(r.get("share of floor → ceiling"), str) and _over_100(r["share of floor → ceiling"])
                for _, r in table.iterrows())
    why = (" A share above 100 % means a route also fits what the true model leaves out of its dynamics "
           "(recorded stimulation artifacts, drift) or the luck of few splits, not that it knows the network better "
           "than the plant does."
           if above else "")
    return ("Against what is achievable on this simulated session (floor: mean predictor or no stimulation; "
            "ceiling: the true model's predictor and controller): " + "; ".join(parts) + "." + why)


def _over_100(share_text: str) -> bool:
    """Whether a 'share of floor → ceiling' cell ('indirect 106 %, direct 97 %') holds a share above 100 %."""
    import re

    return any(float(v) > 100 for v in re.findall(r"(-?\d+(?:\.\d+)?) %", share_text))


def summarize(result: BenchResult) -> list[str]:
    """The report's short summary, each line computed from the result's tables.

    Returns
    -------
    list of str
        The recommendation; the stand-in plant's quality (recordings); the data; one line per difference that
        matters (both routes, the paired difference, the verdict); floor and ceiling (simulated sessions); the
        limits; the reading rules.
    """
    st = result.settings
    lines = [f"Recommendation: {recommendation(result)}"]
    if result.plant == "surrogate" and not result.control.empty:
        lines.append(_standin_line(result))
    elif not result.control.empty:
        lines.append("Closed loops ran on the session's ground-truth plant (a simulated session).")
    p = result.provenance["session"]
    n_test = len(result.splits[0].test)
    lines.append(f"Data: {p['n_trials']} trials at {p['sample_rate_hz']:g} Hz, {len(p['input_names'])} input(s), "
                 f"{len(p['output_names'])} output(s); {st.n_splits} seeded split(s) of whole trials, each holding "
                 f"out {n_test} trial(s) that no route saw while fitting or choosing its settings.")
    a, b = representatives(result)
    for _, r in difference_table(result).iterrows():
        lines.append(f"{r['question'][0].upper()}{r['question'][1:]} ({r['measure']}): {route_name(result, a)} "
                     f"{r['indirect']}, {route_name(result, b)} {r['direct']}; direct − indirect "
                     f"{r['direct − indirect']}: {r['verdict']}.")
    lines.append(_achievable_line(result))
    if not result.control.empty:
        lines.append(_safety_line(result))
    if not result.failures.empty:
        lines.append(f"{len(result.failures)} task(s) failed and are left out of the figures (see tables/tasks.csv); "
                     f"first: {result.failures['error'].iloc[0]}")
    lines.append(f"Reading: 95 % Student-t intervals over the {st.n_splits} split(s), shown as computed (not "
                 f"clipped); differences paired by split; 'too few splits to tell' below {MIN_SPLITS_TO_TELL} "
                 f"splits; 'equivalent' below the practical margin (|ΔR²| {ABSOLUTE_MARGIN:g}, else "
                 f"{100 * RELATIVE_MARGIN:g} % of the value).")
    return [ln for ln in lines if ln]


def _standin_line(result: BenchResult) -> str:
    q = result.surrogate
    what = str(result.provenance["plant"]).split(": ", 1)[-1]
    m, lo, hi = t_interval(q["r2_freerun"]) if not q.empty else (float("nan"),) * 3
    text = (f"Closed loops ran on a stand-in plant ({what}); its own free-run R² on the trials it never saw: "
            f"{fmt_interval(m, lo, hi, '{:.2f}')} (comparisons need at least {STANDIN_MIN_R2:g}).")
    if result.control_withheld:
        text += " The control comparison is withheld."
    return text


def _safety_line(result: BenchResult) -> str:
    c = result.control
    hard = [k for k in c.columns if k.startswith("violations_") and k != "violations_output_bounds"]
    n_bad = int(c[hard].to_numpy().sum()) if hard else 0
    use = [k for k in c.columns if k.startswith("use_")]
    busiest = max(use, key=lambda k: float(c[k].mean())) if use else None
    text = (f"Limits ({result.limits.get('source', '')}): {n_bad} hard-limit violation(s) over {len(c)} closed "
            f"loops of {result.settings.control.n_steps} steps")
    if busiest is not None and float(c[busiest].mean()) > 0:
        text += (f"; the most used limit was {busiest[4:].replace('_', ' ')} (binding on "
                 f"{100 * float(c[busiest].mean()):.1f} % of steps on average)")
    return text + f"; {int(c['n_fallback'].sum())} plan(s) fell back to the safe input."
