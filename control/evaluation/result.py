"""The benchmark's entry point and result: :func:`run_bench` runs the grid of tasks and returns a
:class:`BenchResult` (tidy tables with their provenance); it writes nothing (the ``stimsteer bench`` command writes
the report: :func:`stimsteer.control.commands.bench.write_bench`).
"""

from __future__ import annotations

import hashlib
import json
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Mapping

import pandas as pd

from ...sysid import InvalidParameterError, Session, SessionError, StimsteerError
from ...sysid._records import jsonable, session_record, versions
from ..limits import StimLimits
from .closed_loop import _check_plant, _surrogate_spec
from .execute import _execute, check_scheduler_address
from .references import reference_table
from .settings import BenchSettings
from .tables import _KEYS, _assemble, _columns, _comparison, _sweep_members, _sweeps, _with_best
from .tasks import _check_trials, _Context, _grid, _splits, _tasks

__all__ = ["BenchResult", "run_bench", "STANDIN_MIN_R2"]

#: A closed loop on a stand-in (surrogate) plant is compared only when the stand-in's own free-run R² on the trials
#: it never saw reaches this: below it, the stand-in misses too much of the recording for a controller's tracking on
#: it to say anything about the recording (issue 18: a stand-in of R² 0.29 still named winners). Our own threshold.
STANDIN_MIN_R2 = 0.5

#: Packages a benchmark's provenance records besides the core ones; Dask's when the tasks ran on a cluster.
_BENCH_PACKAGES = ("tqdm", "threadpoolctl")
_DASK_PACKAGES = ("dask", "distributed")


@dataclass(frozen=True)
class BenchResult:
    """Everything a benchmark run found, as tidy tables (one row per observation), with its provenance.

    Attributes
    ----------
    settings : BenchSettings
    splits : tuple of TrialSplit
        The seeded splits (training and held-out trial indices, seed), the same for every route.
    prediction : pandas.DataFrame
        Per task, step ahead and channel: ``mode`` (``kstep``; ``freerun`` with ``step`` 0), ``r2``, ``vaf`` (%),
        ``nrmse``, ``rmse`` (channel unit), ``n_samples``; keys ``task, split, label, route, method,
        n_train_trials, noise_scale, horizon_steps``.
    control : pandas.DataFrame
        Per task: ``tracking_rms`` (steered channel, its unit), ``tracking_rms_all``, ``energy_ua2`` (Σ u², µA²),
        ``use_<limit>`` (share of steps a hard limit was binding), ``violations_<limit>``, ``n_fallback``,
        ``solve_ms_median``/``_p95``/``_max`` (per step after the first, ms), ``solve_ms_first`` (the first step,
        which also sets the controller up), ``plant``.
    sweeps : pandas.DataFrame
        Per sweep (``base``, ``train_trials``, ``noise_scale``, ``horizon_steps``), value, method and metric:
        ``n`` splits, ``mean`` and the 95 % t-interval ``ci_low``, ``ci_high``.
    comparison : pandas.DataFrame
        Paired differences direct − indirect per sweep point and metric with their t-interval and ``better``
        (``direct``, ``indirect`` or ``neither`` when the interval contains 0).
    timings : pandas.DataFrame
        Per task: ``fit_s``, ``predict_s``, ``predict_ms_per_window``, ``control_s``, ``solve_ms_median``,
        ``total_s`` (seconds unless named ms).
    fits : pandas.DataFrame
        Per task: what the estimator selected on its training trials (``selection``), a ``fingerprint`` of all
        fitted values, warnings.
    tasks : pandas.DataFrame
        One row per task with every scalar figure and its status (``ok`` or ``failed`` with ``error``).
    surrogate : pandas.DataFrame
        Recordings only: per split, the surrogate plant and its fit quality on the trials it did not see.
    traces : dict of str to pandas.DataFrame
        ``prediction`` (recorded vs H-step predictions on a held-out trial) and ``closed_loop`` (outputs, target,
        inputs) of the first split at the base setting.
    limits : dict
        The limits of the first split's closed loops (:meth:`StimLimits.to_dict`) and their ``source``.
    plant : str
        ``"ground truth"`` or ``"surrogate"``.
    provenance : dict
        Session hash and description, settings, seed, splits, execution, package versions, time.
    references : pandas.DataFrame
        Simulated sessions with their plant only (else empty): per split, the ceiling (the true model's
        predictions and controller) and the floors (a mean predictor; no stimulation) at the base setting
        (:mod:`~stimsteer.control.evaluation.references`).
    """

    settings: BenchSettings
    splits: tuple
    prediction: pd.DataFrame
    control: pd.DataFrame
    sweeps: pd.DataFrame
    comparison: pd.DataFrame
    timings: pd.DataFrame
    fits: pd.DataFrame
    tasks: pd.DataFrame
    surrogate: pd.DataFrame
    traces: Mapping
    limits: Mapping
    plant: str
    provenance: Mapping
    references: pd.DataFrame = field(default_factory=pd.DataFrame)

    def tables(self) -> dict:
        """The result tables by name (what the report writes as CSV and JSON)."""
        return {"prediction": self.prediction, "control": self.control, "sweeps": self.sweeps,
                "comparison": self.comparison, "timings": self.timings, "fits": self.fits, "tasks": self.tasks,
                "surrogate": self.surrogate, "traces_prediction": self.traces.get("prediction", pd.DataFrame()),
                "traces_closed_loop": self.traces.get("closed_loop", pd.DataFrame()), "references": self.references}

    @property
    def failures(self) -> pd.DataFrame:
        """Tasks that raised a toolkit error (e.g. too few training trials for a method), with the message."""
        if self.tasks.empty or "status" not in self.tasks:
            return pd.DataFrame()
        return self.tasks.loc[self.tasks["status"] == "failed", [*_KEYS, "error"]]


    def labels(self, route: str) -> list:
        """The labels of the compared methods of ``route`` (``"indirect"`` or ``"direct"``), in settings order."""
        return [m.label for m in self.settings.methods if m.route == route]

    def output_unit(self, channel: str) -> str:
        """The unit of a recorded output channel (``"a.u."`` when the session did not give one)."""
        s = self.provenance["session"]
        return dict(zip(s["output_names"], s["output_units"])).get(channel, "a.u.")

    def standin_r2(self) -> float:
        """The stand-in plant's mean free-run R² on the trials it never saw (NaN with a ground-truth plant)."""
        if self.surrogate.empty or "r2_freerun" not in self.surrogate:
            return float("nan")
        return float(self.surrogate["r2_freerun"].mean())

    @property
    def control_withheld(self) -> str:
        """Why the closed-loop comparison is withheld (a stand-in below :data:`STANDIN_MIN_R2`), or ``""``."""
        if self.control.empty or self.plant != "surrogate":
            return ""
        r2 = self.standin_r2()
        if r2 >= STANDIN_MIN_R2:
            return ""
        if not r2 == r2:  # NaN: the stand-in's own quality could not be scored
            return ("the closed loops ran on a stand-in plant whose own quality on the trials it never saw could not "
                    "be scored, so its tracking says nothing certain about the recording")
        return (f"the closed loops ran on a stand-in plant fitted to the recording, whose own free-run R² on the "
                f"trials it never saw is {r2:.2f}, below {STANDIN_MIN_R2:g}: a controller's tracking on it says too "
                "little about the recording to compare the routes")

    @property
    def steered_unit(self) -> str:
        """The unit of the output channel the closed loops steered (``"a.u."`` without closed loops)."""
        loop = self.traces.get("closed_loop", pd.DataFrame())
        return self.output_unit(loop["channel"].iloc[0]) if not loop.empty else "a.u."


def _plant_text(st: BenchSettings, plant) -> str:
    if plant is not None:
        return f"ground truth: {type(plant).__name__}"
    lags = _surrogate_spec(st).settings["past_steps"]
    return f"surrogate: ridge ARX with {lags} output and input lags, fitted on each split's held-out trials"


def _provenance(session, st, splits, plant, limits, execution, started, wall_s, source, n_failed) -> dict:
    extra = _BENCH_PACKAGES + (_DASK_PACKAGES if execution.get("mode") == "dask" else ())
    return jsonable({
        "tool": "stimsteer bench", "session": session_record(session), "settings": st.to_dict(), "seed": st.seed,
        "splits": [s.as_dict() for s in splits],
        "plant": _plant_text(st, plant),
        "limits_source": "declared" if limits is not None else "recorded input range of each split's training trials",
        "execution": execution, "versions": versions(extra=extra), "started_utc": started,
        "wall_time_s": wall_s, "n_failed_tasks": n_failed, "source": dict(source or {}),
        "interval": "95 % Student-t interval over splits: mean ± t(0.975, n−1)·s/√n; differences paired by split",
    })


def _as_session(session) -> Session:
    if isinstance(session, Session):
        return session
    if hasattr(session, "to_session"):
        return session.to_session()
    raise SessionError(f"run_bench needs a stimsteer Session (load it with stimsteer.sysid.io.load_session); got "
                       f"{type(session).__name__}.")


def _check_base(st: BenchSettings, tasks: pd.DataFrame) -> None:
    base = tasks[tasks["full_train"] & (tasks["noise_scale"] == 1.0) & (tasks["horizon_steps"] == st.horizon_steps)]
    for label, g in base.groupby("label"):
        if (g["status"] == "failed").all():
            raise StimsteerError(f"{label} failed on every split of the benchmark; first error: {g['error'].iloc[0]}")


def _token(session: Session, st: BenchSettings, plant) -> str:
    text = json.dumps([session.content_hash(), st.to_dict(), repr(plant)], sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]



def run_bench(session, settings: BenchSettings | None = None, *, plant=None, limits: StimLimits | None = None,
              scheduler: str | None = None, n_workers: int | None = None, progress: bool = True,
              source: Mapping | None = None) -> BenchResult:
    """Benchmark both routes on the same held-out trials: prediction, closed-loop control, sweeps, compute time.

    Parameters
    ----------
    session : Session
        The recording (or simulated session). Never modified.
    settings : BenchSettings, optional
        Default ``BenchSettings()``; ``BenchSettings.quick()`` for a fast look.
    plant : plant, optional
        The ground-truth plant of a simulated session (e.g. ``load_plant("demo_plant.h5")``): closed loops run on it
        and the noise sweep re-records from it. Without it, closed loops run on a surrogate fitted on the held-out
        trials and there is no noise sweep.
    limits : StimLimits, optional
        Declared stimulation limits; default the recorded input range of each split's training trials.
    scheduler : str, optional
        Address of a Dask scheduler (``tcp://host:8786``) to run the tasks on; default local.
    n_workers : int, optional
        Local processes; default all available cores; 1 runs in this process. Ignored with ``scheduler``.
    progress : bool, default True
        Show a progress bar on stderr.
    source : mapping, optional
        Extra provenance (e.g. the session and plant file names).

    Returns
    -------
    BenchResult
        Nothing is written: :func:`stimsteer.control.commands.bench.write_bench` writes the report folder.

    Raises
    ------
    InvalidParameterError
        Bad settings, limits that are not a :class:`StimLimits`, ``n_workers`` below 1, an object without the plant
        interface.
    SessionError
        Fewer trials than a split needs (the message says how many), trials too short for the windows, a plant
        that does not match the session.
    LimitsError
        Limits declared for other inputs than the session's.
    StimsteerError
        An unreachable Dask scheduler (after ``settings.scheduler_timeout_s``) or a method that failed on every
        split.

    Notes
    -----
    The same ``settings`` (seed included) give the same numbers sequentially, on local processes or on Dask; only
    the timing columns differ.
    """
    st = BenchSettings() if settings is None else settings
    if not isinstance(st, BenchSettings):
        raise InvalidParameterError(f"settings must be a BenchSettings; got {type(st).__name__}.")
    if scheduler:  # a typo in the address is refused before any work
        check_scheduler_address(scheduler)
    session = _as_session(session)
    if plant is not None:
        _check_plant(plant, session)
    if limits is not None and not isinstance(limits, StimLimits):
        raise InvalidParameterError(f"limits must be a StimLimits (see stimsteer.control.limits.load_limits); got "
                                    f"{type(limits).__name__}.")
    if limits is not None:
        limits.aligned(session.input_names, session.output_names)  # LimitsError now, not in every task
    n_train = _check_trials(session, st)
    splits = _splits(session, st)
    tasks = _tasks(st, splits, _grid(st, n_train, simulated=plant is not None))
    ctx = _Context(_token(session, st, plant), session, plant, limits, st)
    started, t0 = datetime.now(timezone.utc).isoformat(timespec="seconds"), time.perf_counter()
    results, execution, ref_rows = _execute(ctx, tasks, scheduler, n_workers, progress)
    return _result(st, session, plant, limits, splits, tasks, results, execution, started,
                   time.perf_counter() - t0, source, lambda: _references(ctx, tasks, ref_rows))


def _references(ctx, tasks, rows=None) -> pd.DataFrame:
    """Floor and ceiling of a simulated session (:func:`~.references.reference_table`, from ``rows`` when the
    pool computed them); empty when they cannot be computed (the routes' results stand without them)."""
    if ctx.plant is None:
        return pd.DataFrame()
    try:
        return reference_table(ctx, tasks, rows)
    except StimsteerError:
        return pd.DataFrame()


def _control_table(ok: pd.DataFrame, st: BenchSettings, plant) -> pd.DataFrame:
    if st.control is None:
        return pd.DataFrame()
    if "tracking_rms" in ok.columns:  # only each route's representative runs the closed loop (task_body)
        ok = ok[ok["tracking_rms"].notna()]
    cols = [*_KEYS, "tracking_rms", "tracking_rms_all", "energy_ua2"] + \
        [c for c in ok.columns if c.startswith(("use_", "violations_"))] + \
        ["n_fallback", "solve_ms_median", "solve_ms_p95", "solve_ms_max", "solve_ms_first"]
    control = _columns(ok, cols)
    if not control.empty:
        control["plant"] = "ground truth" if plant is not None else "surrogate"
    return control


def _result(st, session, plant, limits, splits, tasks, results, execution, started, wall_s, source,
            refs) -> BenchResult:
    parts = _assemble(st, tasks, results)
    table = parts["tasks"]
    _check_base(st, table)
    refs = refs()  # after the check: a setting every route failed on is reported as such, not by the references
    ok = table[table["status"] == "ok"]
    best = _with_best(table, st)  # the rows of each route's best method, once for the sweeps and the comparison
    members = _sweep_members(best, st)
    lim = dict(parts["limits"] or {})
    lim["source"] = "declared" if limits is not None else "recorded input range (training trials)"
    return BenchResult(
        settings=st, splits=tuple(splits), prediction=parts["prediction"], control=_control_table(ok, st, plant),
        sweeps=_sweeps(table, st, best, members), comparison=_comparison(table, st, best, members),
        timings=_columns(ok, [*_KEYS, "fit_s", "predict_s", "n_windows", "predict_ms_per_window", "control_s",
                              "solve_ms_median", "solve_ms_p95", "total_s"]),
        fits=_columns(table, [*_KEYS, "status", "selection", "fingerprint", "fit_s", "warnings"]),
        tasks=table, surrogate=parts["surrogate"],
        traces={"prediction": parts["traces_prediction"], "closed_loop": parts["traces_loop"]}, limits=lim,
        plant="ground truth" if plant is not None else "surrogate",
        provenance=_provenance(session, st, splits, plant, limits, execution, started, wall_s, source,
                               int((table["status"] == "failed").sum())),
        references=refs,
    )
