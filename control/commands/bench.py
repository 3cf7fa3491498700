"""``stimsteer bench``: the file workflow of the route benchmark.

:func:`bench_files` claims the output folder before any work (a folder holding another run is refused at once),
loads the session, the plant and the limits, runs :func:`~stimsteer.control.evaluation.run_bench` (which writes
nothing) and writes the report with :func:`write_bench`, atomically: a reader never sees a half-written folder and
a failure leaves nothing behind::

    DIR/report.html          summary, caution, figures (base64 PNG inside the page), key table, provenance
    DIR/results.json         summary, caution, provenance, limits and every table (records)
    DIR/tables/<name>.csv    every table of :meth:`BenchResult.tables`
    DIR/figures/<name>.png   the figures of the page, as files
"""

from __future__ import annotations

import json
import sys
from dataclasses import dataclass
from pathlib import Path

from ...sysid import StimsteerError, load_session
from ...sysid._files import atomic_dir
from ...sysid._progress import progress_wanted
from ...sysid.caution import CAUTION
from ..evaluation import BenchResult, BenchSettings, run_bench
from ..evaluation.execute import _available_cores, check_scheduler_address
from ..figures import bench as bench_figures
from ..limits import load_limits
from ..plants import load_plant
from ..report import REPORT_FILE, RESULTS_FILE, bench_run_id, report_html, results_json, summarize
from ...sysid.window_defaults import resolve_windows
from ._common import add_channel_options, add_window_options, claimed, selection

__all__ = ["BenchRun", "add_parser", "bench_files", "check_out_dir", "method_specs", "run", "write_bench"]


@dataclass(frozen=True)
class BenchRun:
    """What :func:`bench_files` did: the result, its summary lines and the files written.

    Attributes
    ----------
    result : BenchResult
    lines : list of str
        The report's summary (:func:`stimsteer.control.report.summarize`).
    files : dict of str to Path
        As returned by :func:`write_bench`.
    notes : tuple of str
        How the windows were chosen when they came from the data.
    """

    result: BenchResult
    lines: list
    files: dict
    notes: tuple = ()

    @property
    def report(self) -> Path:
        """The HTML page."""
        return self.files["report"]


def check_out_dir(out_dir, *, force: bool = False) -> Path:
    """Refuse an output folder that exists and holds files (another run), unless ``force``.

    Raises
    ------
    StimsteerError
        The path is a file, or a non-empty folder without ``force`` (the message names the run found there).
    """
    path = Path(out_dir)
    if path.exists() and not path.is_dir():
        raise StimsteerError(f"output folder {path} exists and is a file; choose another --out.")
    if path.is_dir() and any(path.iterdir()) and not force:
        run = ""
        marker = path / RESULTS_FILE
        if marker.is_file():
            try:
                run = f" (benchmark run {json.loads(marker.read_text())['run_id']})"
            except (ValueError, KeyError, OSError):
                run = ""
        raise StimsteerError(f"output folder {path} already holds another run{run}; choose a new --out or pass "
                             "--force to replace it whole (runs are never mixed).")
    return path


def write_bench(result: BenchResult, out_dir, *, force: bool = False, lines: list | None = None,
                processes: int | None = None) -> dict:
    """Write the report folder atomically: HTML page, results JSON, CSV tables, PNG figures.

    Parameters
    ----------
    result : BenchResult
    out_dir : str or Path
        Must be new or empty, unless ``force`` (then it is replaced whole: runs are never mixed).
    force : bool, default False
    lines : list of str, optional
        The summary (:func:`stimsteer.control.report.summarize` of ``result``) when the caller already has it.
    processes : int, optional
        Processes that draw the figures side by side, this one included (default: the available cores); the
        figures are the same PNGs however many draw them.

    Returns
    -------
    dict of str to Path
        ``report``, ``results``, and one entry per table (``table:<name>``) and figure (``figure:<name>``).

    Raises
    ------
    StimsteerError
        ``result`` is not a BenchResult; ``out_dir`` is a file, or holds another run and ``force`` is False.
    """
    return _write(result, out_dir, force=force, lines=lines, processes=processes)[0]


def _write(result, out_dir, *, force: bool, lines, processes) -> tuple[dict, list]:
    """:func:`write_bench`, and the summary lines (computed while the figures' helpers draw when not given)."""
    if not isinstance(result, BenchResult):
        raise StimsteerError(f"write_bench needs a BenchResult from run_bench; got {type(result).__name__}.")
    final = check_out_dir(out_dir, force=force)
    files = {}
    processes = _available_cores() if processes is None else processes
    with bench_figures.drawing(result, processes) as drawing, atomic_dir(final, force=force) as tmp:
        lines = summarize(result) if lines is None else lines
        run_id = bench_run_id(result)
        (tmp / "tables").mkdir()
        (tmp / "figures").mkdir()
        for name, table in result.tables().items():
            table.to_csv(tmp / "tables" / f"{name}.csv", index=False)
            files[f"table:{name}"] = final / "tables" / f"{name}.csv"
        (tmp / RESULTS_FILE).write_text(results_json(result, lines, run_id), encoding="utf-8")
        figures = drawing.collect()  # this process joins the helpers once its own part is written
        for name, png in figures.items():
            (tmp / "figures" / f"{name}.png").write_bytes(png)
            files[f"figure:{name}"] = final / "figures" / f"{name}.png"
        (tmp / REPORT_FILE).write_text(report_html(result, figures, lines, run_id), encoding="utf-8")
    files["report"], files["results"] = final / REPORT_FILE, final / RESULTS_FILE
    return files, lines


def bench_files(session_path, out_dir, *, plant_path=None, limits_path=None, seed: int = 0, quick: bool = False,
                scheduler: str | None = None, n_workers: int | None = None, force: bool = False,
                progress: bool = False, past=None, horizon=None, methods=None, channels=None) -> BenchRun:
    """Benchmark the routes on a session file and write the report folder (what ``stimsteer bench`` does).

    Parameters
    ----------
    session_path : str or Path
        Session file (our HDF5 layout, CSV/Parquet table, or NWB).
    out_dir : str or Path
        Report folder; claimed before any work (new or empty, or ``force``): a second run on it is refused at once,
        and what a killed run left beside it is removed (:func:`stimsteer.sysid._claims.claim_output`).
    plant_path, limits_path : str or Path, optional
        Ground-truth plant file of a simulated session; declared limits (TOML).
    seed : int, default 0
        Master seed of splits, subsets and plant noise.
    quick : bool, default False
        :meth:`BenchSettings.quick` instead of the default settings.
    scheduler, n_workers, progress
        As :func:`~stimsteer.control.evaluation.run_bench`.
    past, horizon : str, WindowLength or int, optional
        Past window and horizon of every method (``"100ms"``, ``"40samples"``, or samples); default from the data
        (:func:`stimsteer.sysid.window_defaults.default_windows`), the same rule every command uses.
    methods : sequence of str, optional
        Methods compared, ``"arx"`` or ``"indirect/arx"``; at least one per route (default every registered one).
    channels : dict, optional
        :meth:`Session.select` arguments (``inputs``, ``outputs``, ``drop``).
    force : bool, default False
        Replace an existing ``out_dir`` whole.

    Returns
    -------
    BenchRun

    Raises
    ------
    StimsteerError
        As :func:`check_out_dir`, the loaders and :func:`~stimsteer.control.evaluation.run_bench`; nothing is
        written then.
    """
    if scheduler:
        check_scheduler_address(scheduler)
    check_out_dir(out_dir, force=force)
    with claimed(out_dir, force=force, command="bench"):  # a second run on this folder is refused at once
        session = load_session(session_path)
        session = session.select(**channels) if channels else session
        plant = None if plant_path is None else load_plant(plant_path)
        limits = None if limits_path is None else load_limits(limits_path)
        past_steps, horizon_steps, note = resolve_windows(session, past, horizon)
        chosen = {} if methods is None else {"methods": method_specs(methods)}
        settings = (BenchSettings.quick if quick else BenchSettings)(seed=seed, past_steps=past_steps,
                                                                     horizon_steps=horizon_steps, **chosen)
        source = {"session_file": str(session_path), "plant_file": None if plant_path is None else str(plant_path),
                  "limits_file": None if limits_path is None else str(limits_path)}
        result = run_bench(session, settings, plant=plant, limits=limits, scheduler=scheduler, n_workers=n_workers,
                           progress=progress, source=source)
        files, lines = _write(result, out_dir, force=force, lines=None, processes=n_workers)
    return BenchRun(result=result, lines=lines, files=files, notes=(note,) if note else ())


def method_specs(names) -> tuple:
    """``MethodSpec`` of each name (``"arx"``, or ``"indirect/arx"`` when a name is registered on both routes).

    Raises
    ------
    StimsteerError
        An unknown or ambiguous name (the message lists the registered ones), or a route left without a method.
    """
    from ...sysid import METHODS, InvalidParameterError
    from ..evaluation import MethodSpec

    known = sorted(f"{r}/{m}" for r, m in METHODS)
    specs = []
    for name in (names.split(",") if isinstance(names, str) else names):
        name = str(name).strip()
        route, _, method = name.rpartition("/")
        hits = [(r, m) for r, m in METHODS if m == method and (not route or r == route)]
        if len(hits) != 1:
            why = "is registered on both routes; write route/method" if hits else "is not a registered method"
            raise InvalidParameterError(f"--methods: {name!r} {why}; the methods are {', '.join(known)}.")
        specs.append(MethodSpec(*hits[0]))
    missing = sorted({r for r, _ in METHODS} - {s.route for s in specs})
    if missing:
        raise InvalidParameterError(f"--methods must name at least one method of each route; none of the "
                                    f"{' and '.join(missing)} route (its methods: "
                                    f"{', '.join(k for k in known if k.split('/')[0] in missing)}).")
    return tuple(specs)


# ---------------------------------------------------------------------------------------------------- command line
def add_parser(sub) -> None:
    """Declare ``stimsteer bench`` and its options."""
    p = sub.add_parser("bench", help="benchmark the indirect and direct routes on the same held-out trials "
                       "(prediction, closed-loop control, data-length, noise and horizon sweeps) and write a report")
    p.add_argument("session", help="session file (our HDF5 layout, CSV/Parquet table, or NWB)")
    p.add_argument("--out", required=True, help="output folder for the report (must be new or empty, unless --force)")
    p.add_argument("--scheduler", metavar="ADDR",
                   help="run the tasks on a Dask cluster, e.g. tcp://host:8786 (needs the dist extra); default: the "
                   "local cores")
    p.add_argument("--limits", metavar="LIMITS.toml",
                   help="declared stimulation limits (TOML); default: the recorded input range of the training trials")
    p.add_argument("--plant", metavar="PLANT.h5",
                   help="ground-truth plant of a simulated session: closed loops run on it and the noise sweep "
                   "re-records from it (default: a surrogate plant fitted on the held-out trials)")
    p.add_argument("--seed", type=int, default=0, help="master seed of splits, subsets and plant noise (default 0)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local worker processes (default: all available cores; 1 runs in this process)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder whole")
    p.add_argument("--quick", action="store_true", help="a fast look: 2 splits, one point per sweep, short loops")
    p.add_argument("--methods", metavar="NAMES", help="methods compared, comma-separated, at least one per route "
                   "(e.g. 'arx,hankel' or 'indirect/subspace,direct/lsq'; default every registered method)")
    add_window_options(p, past="past window of every method", horizon="prediction and control horizon")
    add_channel_options(p)


def run(args) -> int:
    """Run ``stimsteer bench`` from parsed arguments."""
    if args.workers is not None and args.workers < 1:
        raise StimsteerError(f"--workers must be at least 1; got {args.workers}.")
    done = bench_files(args.session, args.out, plant_path=args.plant, limits_path=args.limits, seed=args.seed,
                      quick=args.quick, scheduler=args.scheduler, n_workers=args.workers, force=args.force,
                      progress=progress_wanted(), past=args.past, horizon=args.horizon, methods=args.methods,
                      channels=selection(args))
    for note in done.notes:
        print(note)
    print("\n".join(f"- {line}" for line in done.lines))
    print(f"report written to {done.report}")
    print(CAUTION)
    return 0
