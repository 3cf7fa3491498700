"""Studies: many sessions and subjects, one question at a time, resumable, locally or on a Dask cluster.

A lab's questions are about a cohort, not one recording: does a model fitted on Monday predict Thursday; does the
direct route win for most subjects or only for some; which stimulation site is best across the cohort.

* **Description** (:mod:`~.table`): a folder of session files (one subfolder per subject), a study file of our own
  (``study.toml``: sessions, subjects, groups, settings) or a BIDS dataset, turned into a study table (subject,
  session, condition, file, content hash). Sessions are read lazily, on the worker that uses them.
* **Analyses** (:mod:`~.tasks`, :mod:`~.grid`): per-session fits of every method with held-out scores and the
  single-session benchmark's closed loop on a surrogate plant of the session (:mod:`~.loop`), inside declared limits
  (``StudySettings.limits``, ``stimsteer study --limits``) or the recorded input range; across days
  (fit on a subject's earlier sessions, score on the later one, session offsets removed explicitly); across
  subjects (leave one subject out: the pooled model against the subject's own); site ranking per subject and its
  agreement across the cohort.
* **Pooled verdicts** (:mod:`~.pooling`, :mod:`~.analysis`): per-subject differences combined by DerSimonian &
  Laird's random-effects model, with the between-subject spread stated, judged against the practical margin.
* **Execution** (:mod:`~.execute`): one task per (analysis, subject, session, method, split), sent in batches of
  one (analysis, session); local processes or a Dask cluster, the same numbers either way; completed tasks cached
  by content hash; dead workers retried. :mod:`~.cluster`: a Dask cluster whose background work is turned down.
* **Report** (:mod:`~.report`): one page with the verdicts, forest plots, transfer across days and the cohort's
  site ranking, linked per-session pages, and every table as CSV and Parquet.

References
----------
DerSimonian R., Laird N. (1986), "Meta-analysis in clinical trials", Controlled Clinical Trials 7:177–188.
"""

from .analysis import effects_table, verdicts_table
from .cluster import CLUSTER_CONFIG, local_cluster
from .execute import TaskCache, execute_tasks
from .grid import study_tasks
from .pooling import RandomEffects, kendall_w, margin_verdict, random_effects
from .result import StudyResult, run_study
from .settings import ANALYSES, OFFSETS, StudySettings, parse_method
from .table import STUDY_FILE, StudyTable, describe_study
from .tasks import CACHE_VERSION, SessionRef, StudyTask, run_task

__all__ = [
    "ANALYSES", "OFFSETS", "CLUSTER_CONFIG", "local_cluster", "STUDY_FILE", "CACHE_VERSION", "StudySettings", "StudyTable", "StudyResult", "StudyTask",
    "SessionRef", "TaskCache", "RandomEffects", "describe_study", "run_study", "study_tasks", "execute_tasks",
    "run_task", "random_effects", "margin_verdict", "kendall_w", "effects_table", "verdicts_table", "parse_method",
]
