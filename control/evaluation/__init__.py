"""The route benchmark: both routes fitted on the same training trials, judged on the same held-out trials.

:func:`run_bench` answers, on one session, which route predicts and controls better, by how much, with how much
data and at what computational cost:

* **Splits.** ``n_splits`` seeded splits of whole trials into training and held-out trials (the same splits for
  every route). Every choice a route makes (ARX lags' ridge strength, subspace order, the direct route's ridge or
  Hankel strengths) happens inside the estimator's ``fit`` on the training trials only; the held-out trials are
  read for scoring and, for recordings, for the surrogate plant, never for fitting a route.
* **Prediction.** From past windows inside each held-out trial, every route predicts the next
  ``1 … horizon_steps`` samples; R², VAF, NRMSE and RMSE per step ahead and per channel
  (:func:`stimsteer.sysid.metrics.kstep_scores`), and free-run scores over whole held-out trials.
* **Control.** Each route's predictive controller (:mod:`stimsteer.control.mpc`) steers a plant in closed loop
  (:func:`stimsteer.control.loop.run_closed_loop`) to a pulse target on one output channel. A simulated session
  comes with its ground-truth plant; a recording gets a *surrogate plant*: a ridge ARX with twice the longest past
  window of the routes (a richer model class than either route's), fitted on the held-out trials only, driven with
  its own innovation noise (:class:`stimsteer.control.plants.InnovationPlant`). Its fit quality is scored on the
  training trials, which it never saw.
* **Sweeps.** Number of training trials (the data-length question; Krishnan & Pasqualetti 2021), noise level
  (simulated sessions only: the schedule is re-recorded from the plant with scaled noise) and horizon.
* **Statistics.** Every figure is a mean over the repeated splits with a 95 % Student-t interval
  ``mean ± t_{0.975, n−1} · s / √n`` (:func:`t_interval`); route differences are paired by split.
* **Execution.** Each (split, method, setting) is one picklable task with its own seed, run sequentially, on a local
  process pool, or on a Dask cluster; the numbers do not depend on where a task ran (BLAS is limited to one thread
  per task, results are assembled in task order).
* **Files.** None: :func:`run_bench` returns a :class:`BenchResult`; the ``stimsteer bench`` command writes the
  report (:func:`stimsteer.control.commands.bench.write_bench`).

Modules: ``settings`` (the frozen settings records), ``tasks`` (splits, grid, task records), ``task_body`` (one
task: fit, score, trace), ``closed_loop`` (plant, limits, target and loop of a task), ``execute`` (sequential,
local processes, Dask), ``tables`` (tidy tables, sweeps, paired comparisons), ``stats`` (intervals), ``result``
(:class:`BenchResult`, :func:`run_bench`).

References
----------
Krishnan V., Pasqualetti F. (2021), "On direct vs indirect data-driven predictive control", IEEE CDC.
Favoreel W., De Moor B., Gevers M. (1999), "SPC: Subspace predictive control", IFAC World Congress.
Coulson J., Lygeros J., Dörfler F. (2019), "Data-enabled predictive control: in the shallows of the DeePC", ECC.
"""

from ..plants import InnovationPlant
from .closed_loop import recorded_limits
from .result import BenchResult, run_bench
from .settings import DEFAULT_SCHEDULER_TIMEOUT_S, MIN_TRAIN_TRIALS, BenchSettings, ControlSettings, MethodSpec
from .stats import paired_verdict, t_interval
from .tables import METRICS

__all__ = [
    "MethodSpec",
    "ControlSettings",
    "BenchSettings",
    "BenchResult",
    "InnovationPlant",
    "run_bench",
    "t_interval",
    "paired_verdict",
    "recorded_limits",
    "METRICS",
    "MIN_TRAIN_TRIALS",
    "DEFAULT_SCHEDULER_TIMEOUT_S",
]
