"""The study's entry point and result: :func:`run_study` runs every task (or takes it from the cache) and returns a
:class:`StudyResult` of tidy tables; it writes nothing but the task cache (``stimsteer study`` writes the page).
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from ...sysid import InvalidParameterError, LimitsError, StimsteerError
from ...sysid._records import jsonable, versions
from .analysis import effects_table, loop_table, site_tables, task_table, transfer_table, verdicts_table
from .execute import TaskCache, execute_tasks
from .grid import study_tasks
from .settings import StudySettings
from .table import StudyTable, describe_study

__all__ = ["StudyResult", "run_study"]


@dataclass(frozen=True)
class StudyResult:
    """Everything a study found, as tidy tables, with its provenance.

    Attributes
    ----------
    settings : StudySettings
    table : StudyTable
        The sessions (subject, session, order, condition, group, file, content hash, ...) and the exclusions.
    tasks : pandas.DataFrame
        One row per task: ``analysis`` (``sessions``, ``days``, ``subjects``), subject, session, order, method,
        split, ``status``, held-out ``r2_mean`` (k-step R² over steps 1…H and channels), ``r2_step1``, ``r2_last``,
        ``nrmse_mean``, ``n_train_trials``, ``fit_s``, ``cached``; per-session tasks that steered add the closed
        loop's ``tracking_rms``, ``energy_ua2``, ``violations``, ``n_fallback``, ``surrogate_r2`` (:mod:`~.loop`).
    effects : pandas.DataFrame
        Per comparison and subject: the mean paired difference (of R²; relative, for the closed loop) and its
        variance (see :mod:`stimsteer.control.study.analysis`).
    verdicts : pandas.DataFrame
        Per comparison: the DerSimonian–Laird pooled difference, its 95 % interval, tau, I², the margin, the verdict.
    transfer : pandas.DataFrame
        Per session order and method: same-day vs earlier-days R² on the same held-out trials.
    sites : pandas.DataFrame
        Per subject and site (indirect methods with a state-space form): impulse-response energy and rank.
    cohort_sites : pandas.DataFrame
        Per site: mean rank across subjects, its spread, the cohort rank and Kendall's W of the agreement.
    closed_loop : pandas.DataFrame
        Per method and subject: the per-session closed loops' mean tracking error and energy, the loops run, the
        limit violations and fallbacks (:func:`~.analysis.loop_table`); empty when the study did not steer.
    notes : tuple of str
        What could not be run, and why.
    provenance : dict
    """

    settings: StudySettings
    table: StudyTable
    tasks: pd.DataFrame
    effects: pd.DataFrame
    verdicts: pd.DataFrame
    transfer: pd.DataFrame
    sites: pd.DataFrame
    cohort_sites: pd.DataFrame
    notes: tuple
    provenance: dict
    closed_loop: pd.DataFrame = None

    def tables(self) -> dict:
        """Every table by name (``sessions``, ``excluded``, ``tasks``, ``effects``, ``verdicts``, ``transfer``,
        ``sites``, ``cohort_sites``, ``closed_loop``)."""
        return {"sessions": self.table.sessions, "excluded": self.table.excluded, "tasks": self.tasks,
                "effects": self.effects, "verdicts": self.verdicts, "transfer": self.transfer, "sites": self.sites,
                "cohort_sites": self.cohort_sites,
                "closed_loop": pd.DataFrame() if self.closed_loop is None else self.closed_loop}

    @property
    def n_computed(self) -> int:
        """Tasks this run computed (the others came from the cache)."""
        return int(self.provenance["execution"]["n_computed"])


def run_study(study, settings: StudySettings | None = None, *, cache=None, scheduler: str | None = None,
              n_workers: int | None = None, progress: bool = False) -> StudyResult:
    """Run a study's analyses: per-session fits, transfer across days and subjects, site ranking, pooled verdicts.

    Parameters
    ----------
    study : StudyTable, str or Path
        A table from :func:`describe_study`, or a folder / study file to describe (with the settings' channels and
        minimum trials).
    settings : StudySettings, optional
        Default ``StudySettings()``.
    cache : str, Path or TaskCache, optional
        Folder of completed tasks: those found there are not computed again; new results are added. A study
        described here keeps what its session files hold there too (:func:`describe_study`).
    scheduler : str, optional
        Address of a Dask scheduler (``tcp://127.0.0.1:8786``); default local processes.
    n_workers : int, optional
        Local processes (default all cores; 1 runs in this process). Ignored with ``scheduler``.
    progress : bool, default False

    Returns
    -------
    StudyResult
        The same settings and data give the same numbers locally, on Dask, from the cache or not (only the timings
        ``fit_s``, ``control_s``, ``total_s`` and ``cpu_s`` differ).

    Raises
    ------
    InvalidParameterError
        Bad settings or worker count.
    LimitsError
        Declared limits (``settings.limits``) that do not match a session's inputs (the session and channels named).
    SessionError
        Bad study description (see :func:`describe_study`), or pooled analyses over different channel sets.
    StimsteerError
        A method that failed on every task; workers that kept dying; an unreachable scheduler.
    """
    st = StudySettings() if settings is None else settings
    if not isinstance(st, StudySettings):
        raise InvalidParameterError(f"settings must be a StudySettings; got {type(st).__name__}.")
    cache = cache if cache is None or isinstance(cache, TaskCache) else TaskCache(cache)
    table = study if isinstance(study, StudyTable) else describe_study(
        study, min_trials=st.min_trials, channels=st.channels, cache=None if cache is None else cache.folder)
    check_limits(table, st)
    tasks, notes = study_tasks(table, st)
    started, t0 = datetime.now(timezone.utc).isoformat(timespec="seconds"), time.perf_counter()
    cached = {t.key for t in tasks if cache is not None and cache.get(t.key) is not None}
    results, execution = execute_tasks(st, tasks, cache=cache, scheduler=scheduler, n_workers=n_workers,
                                       progress=progress)
    frame = task_table(tasks, results, table, st, cached)
    _check_methods(frame)
    effects = effects_table(frame, st)
    sites, cohort, _w = site_tables(_site_rows(tasks, results, st))
    return StudyResult(
        settings=st, table=table, tasks=frame, effects=effects, verdicts=verdicts_table(effects, st),
        transfer=transfer_table(frame), sites=sites, cohort_sites=cohort, notes=tuple(notes),
        closed_loop=loop_table(frame),
        provenance=jsonable({"tool": "stimsteer study", "study": table.name, "source": table.source,
                             "settings": st.to_dict(), "execution": execution, "started_utc": started,
                             "limits_source": "recorded input range of each split's training trials"
                             if st.limits is None else "declared (StudySettings.limits)",
                             "wall_time_s": time.perf_counter() - t0, "versions": versions(extra=("dask",)),
                             "cache": None if cache is None else str(Path(cache.folder)),
                             "n_failed_tasks": int((frame["status"] == "failed").sum()),
                             "interval": "DerSimonian-Laird random effects over subjects, 95 % normal interval"}),
    )


def check_limits(table: StudyTable, st: StudySettings) -> None:
    """Refuse declared limits that do not match a session's inputs (by name, after the common channel subset).

    Raises
    ------
    LimitsError
        Naming the first session that does not match, its inputs and the limits' inputs.
    """
    if st.limits is None:
        return
    for r in table.sessions.itertuples():
        inputs, outputs = ([c for c in names.split("|") if st.channels is None or c in st.channels]
                           for names in (r.input_names, r.output_names))
        try:
            st.limits.aligned(inputs, outputs)
        except LimitsError as exc:
            raise LimitsError(f"the declared limits do not match session {r.subject}/{r.session} (inputs {inputs}, "
                              f"outputs {outputs}): {exc}") from None


def _check_methods(frame: pd.DataFrame) -> None:
    within = frame[frame["analysis"] == "sessions"]
    for label, g in within.groupby("label"):
        if (g["status"] == "failed").all():
            raise StimsteerError(f"{label} failed on every session of the study; first error: {g['error'].iloc[0]}")


def _site_rows(tasks, results, st) -> pd.DataFrame:
    rows = []
    for t in tasks:
        res = results[t.key]
        if t.kind != "sessions" or not res.get("site_energy"):
            continue
        for site, energy in zip(res["sites"], res["site_energy"]):
            rows.append({"label": st.methods[t.method_index].label, "subject": t.subject, "session": t.session,
                         "split": t.split, "site": site, "energy": energy})
    return pd.DataFrame(rows)
