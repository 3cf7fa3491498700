"""``stimsteer study``: many sessions and subjects, pooled verdicts, one page.

:func:`study_files` claims the output folder before any work, describes the study (a folder with one subfolder per
subject, a ``study.toml`` of our own, or a BIDS dataset), runs :func:`~stimsteer.control.study.run_study` (tasks
cached in ``--cache``, by default ``OUT.tasks`` beside the output, so a rerun computes only what is missing) and
writes, atomically::

    OUT/study.html                  verdicts, forest plots, transfer across days, cohort site ranking, sessions
    OUT/sessions/<subject>__<session>.html   each session's held-out scores in every analysis
    OUT/results.json                summary lines, verdicts, provenance
    OUT/tables/<name>.csv|.parquet  every table of StudyResult.tables()
    OUT/figures/<name>.png          the figures of the page
"""

from __future__ import annotations

import dataclasses
import json
import sys
from pathlib import Path

from ...sysid import InvalidParameterError, StimsteerError
from ...sysid._claims import claim_output
from ...sysid._files import atomic_dir
from ...sysid._progress import progress_wanted
from ...sysid._records import jsonable
from ...sysid.caution import CAUTION
from ._common import add_window_options
from ..figures.study import study_figures
from ..study import ANALYSES, OFFSETS, StudyResult, StudySettings, describe_study, run_study
from ..study.table import study_file_settings
from ..study.report import session_page, session_page_name, study_html, summary_lines

__all__ = ["add_parser", "run", "study_files", "write_study", "study_settings"]

_CLI_FIELDS = {"past": "past_steps", "horizon": "horizon_steps", "splits": "n_splits", "seed": "seed",
               "min_trials": "min_trials", "offsets": "offsets", "max_retries": "max_retries"}


def add_parser(subparsers) -> None:
    p = subparsers.add_parser(
        "study", help="fit and compare both routes over many sessions and subjects, with pooled verdicts",
        description="Run a study: per-session fits, transfer across days and subjects, site ranking, and "
        "random-effects verdicts over subjects. STUDY is a folder with one subfolder per subject holding its "
        "session files (in recording order by name), a study.toml naming sessions, subjects, groups and settings, "
        "or a BIDS dataset. " + CAUTION)
    p.add_argument("study", help="study folder, or study file (.toml)")
    p.add_argument("--out", required=True, help="output folder (new or empty; --force replaces it whole)")
    p.add_argument("--force", action="store_true")
    p.add_argument("--cache", help="folder of completed tasks (default OUT.tasks beside --out)")
    p.add_argument("--no-cache", action="store_true", help="compute every task, keep nothing")
    p.add_argument("--scheduler", help="Dask scheduler address, e.g. tcp://127.0.0.1:8786 (default: local)")
    p.add_argument("--workers", type=int, help="local processes (default: all cores; 1 = this process)")
    p.add_argument("--methods", help="comma-separated route/method, e.g. indirect/subspace,direct/lsq")
    p.add_argument("--channels", help="comma-separated common subset of channel names (inputs and outputs)")
    p.add_argument("--analyses", help=f"comma-separated subset of {','.join(ANALYSES)}")
    add_window_options(p, past="past window of every method", horizon="prediction horizon",
                       default="a study may mix rates, so give samples, e.g. 40samples; default: the study's")
    p.add_argument("--splits", type=int, help="seeded trial splits per session")
    p.add_argument("--seed", type=int)
    p.add_argument("--min-trials", type=int, help="sessions with fewer trials are excluded by name")
    p.add_argument("--offsets", choices=OFFSETS, help="session-level output offsets: remove (default) or none")
    p.add_argument("--max-retries", type=int, help="resubmissions of tasks whose worker died (default 2)")
    p.add_argument("--quick", action="store_true", help="small settings for a first look")
    p.add_argument("--no-control", action="store_true", help="score prediction only: no closed loop per session "
                   "(by default each per-session fit steers a surrogate plant of its session, as `bench` does)")
    p.add_argument("--limits", metavar="LIMITS.toml", help="declared stimulation limits of the closed loops (the "
                   "limits file of `plan` and `bench`, matched to every session's inputs by name); default: the "
                   "input range recorded on each split's training trials")
    p.add_argument("--description", metavar="TOML", help="for a BIDS dataset: how each recording becomes a session "
                   "(outputs, pulses, trials; as for `stimsteer convert`); converted files go to OUT.sessions")
    p.add_argument("--no-progress", action="store_true", help="no progress bar (shown on a terminal only, as for "
                   "every command; STIMSTEER_PROGRESS=0/1 hides or forces it)")


def _split(text):
    return None if text is None else tuple(s.strip() for s in str(text).split(",") if s.strip())


def _study_window(opt, value):
    """A window option in samples (a study may mix rates, so a time would mean different samples per session)."""
    if not hasattr(value, "unit"):
        return value
    if value.unit != "samples":
        raise InvalidParameterError(f"--{opt} {value}: a study may mix sample rates, so give its windows in samples "
                                    f"(e.g. --{opt} 40samples).")
    return int(value.value)


def study_settings(file_settings: dict, args) -> StudySettings:
    """Defaults, then the study file's ``[settings]``, then the command-line options given."""
    known = {f.name for f in dataclasses.fields(StudySettings)}
    unknown = sorted(set(file_settings) - known)
    if unknown:
        raise InvalidParameterError(f"the study file's [settings] has unknown keys {unknown}; known: {sorted(known)}.")
    values = dict(file_settings)
    for opt, name in _CLI_FIELDS.items():
        if getattr(args, opt, None) is not None:
            values[name] = _study_window(opt, getattr(args, opt))
    for opt in ("methods", "channels", "analyses"):
        if getattr(args, opt, None) is not None:
            values[opt] = _split(getattr(args, opt))
    if getattr(args, "no_control", False):
        values["control"] = None
    if getattr(args, "limits", None) is not None:
        values["limits"] = str(args.limits)
    for name in ("methods", "channels", "analyses"):
        if name in values and isinstance(values[name], list):
            values[name] = tuple(values[name])
    return StudySettings.quick(**values) if getattr(args, "quick", False) else StudySettings(**values)


def write_study(result: StudyResult, out_dir, *, force: bool = False) -> dict:
    """Write the study folder atomically (module docstring); return the paths written by name."""
    if not isinstance(result, StudyResult):
        raise StimsteerError(f"write_study needs a StudyResult from run_study; got {type(result).__name__}.")
    final, lines = Path(out_dir), summary_lines(result)
    figures = study_figures(result)
    files = {}
    with atomic_dir(final, force=force) as tmp:
        for sub in ("tables", "figures", "sessions"):
            (tmp / sub).mkdir()
        for name, table in result.tables().items():
            table.to_csv(tmp / "tables" / f"{name}.csv", index=False)
            table.to_parquet(tmp / "tables" / f"{name}.parquet", index=False)
            files[f"table:{name}"] = final / "tables" / f"{name}.csv"
        for name, png in figures.items():
            (tmp / "figures" / f"{name}.png").write_bytes(png)
            files[f"figure:{name}"] = final / "figures" / f"{name}.png"
        for r in result.table.sessions.itertuples():
            page = session_page_name(r.subject, r.session)
            (tmp / "sessions" / page).write_text(session_page(result, r.subject, r.session), encoding="utf-8")
        record = {"caution": CAUTION, "summary": lines, "verdicts": result.verdicts.to_dict("records"),
                  "provenance": result.provenance}
        (tmp / "results.json").write_text(json.dumps(jsonable(record), indent=1), encoding="utf-8")
        (tmp / "study.html").write_text(study_html(result, figures, lines), encoding="utf-8")
    files["report"], files["results"] = final / "study.html", final / "results.json"
    return files


def study_files(args) -> tuple[StudyResult, dict]:
    """Claim ``--out``, describe and run the study, write the folder."""
    out = Path(args.out)
    with claim_output(out, force=args.force):
        file_settings = study_file_settings(args.study)
        st = study_settings(file_settings, args)
        cache = None if args.no_cache else (args.cache or out.parent / f"{out.name}.tasks")
        table = describe_study(args.study, channels=st.channels, min_trials=st.min_trials,
                               description=args.description, convert_dir=out.parent / f"{out.name}.sessions",
                               cache=cache)  # a rerun reads again only the session files that changed
        result = run_study(table, st, cache=cache, scheduler=args.scheduler, n_workers=args.workers,
                           progress=not args.no_progress and progress_wanted())
        if st.limits is not None:
            src = getattr(args, "limits", None) or file_settings.get("limits")
            result.provenance["limits_file"] = str(src) if isinstance(src, (str, Path)) else "the study file"
        return result, write_study(result, out, force=args.force)


def run(args) -> int:
    result, files = study_files(args)
    for line in summary_lines(result):
        print(line)
    ex = result.provenance["execution"]
    print(f"{ex['n_computed']} task(s) computed, {ex['n_cached']} from the cache ({ex['mode']}, "
          f"{ex['n_workers']} worker(s)); page: {files['report']}")
    sys.stdout.flush()
    return 0
