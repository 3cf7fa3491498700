"""The closed-loop part of the per-session analysis: each per-session fit steers its session's surrogate plant.

This is the single-session benchmark's closed-loop task (:func:`stimsteer.control.evaluation.closed_loop.steer`)
run once per (session, method, split), with its surrogate plant (:func:`~stimsteer.control.evaluation.closed_loop.
fit_surrogate`: a ridge ARX of twice the methods' longest past window, fitted on the split's held-out trials of the
session, so the route steers a plant built from trials it never saw), inside the study's declared limits
(``StudySettings.limits``, matched to the session's inputs by name) or, as the benchmark does without declared
limits, amplitude limits equal to the input range recorded on the training trials. The target is a pulse of
``target_level_std`` standard deviations on the target channel, above its training mean. The session is the one the
route was fitted on: centred on its training trials' mean output when the study removes offsets.

The surrogate of a (session, split) is fitted once per process and shared by the methods of that split (it depends
on neither), so the numbers do not depend on which worker ran a task.
"""

from __future__ import annotations

import copy
import hashlib
import json

from ...sysid import Session
from ..evaluation.closed_loop import fit_surrogate, steer, surrogate_spec
from .settings import StudySettings

__all__ = ["session_loop", "LOOP_SCORES"]

#: The closed-loop figures a per-session task adds (NaN when the study has no closed loop).
LOOP_SCORES = ["tracking_rms", "tracking_rms_all", "energy_ua2", "violations", "n_fallback", "surrogate_r2",
               "control_s"]

_SURROGATES: dict = {}


def _surrogate(st: StudySettings, content_hash: str, split: int, split_obj, session: Session):
    token = hashlib.sha256(json.dumps(st.task_dict(), sort_keys=True, default=str).encode()).hexdigest()
    key = (content_hash, int(split), token)
    if _SURROGATES.get("session") != content_hash:
        _SURROGATES.clear()  # surrogates of one session at a time
        _SURROGATES["session"] = content_hash
    if key not in _SURROGATES:
        _SURROGATES[key] = fit_surrogate(session.select_trials(split_obj.test), session.select_trials(split_obj.train),
                                         surrogate_spec(st.methods, st.past_steps), st.past_steps, st.horizon_steps,
                                         st.max_windows)
    return _SURROGATES[key]


def session_loop(st: StudySettings, task, predictor, session: Session, split_obj, loop_seed: int) -> dict:
    """Steer the surrogate plant of ``task``'s session and split with ``predictor``; the figures of
    :data:`LOOP_SCORES` (``violations``: samples beyond any declared limit, summed over the kinds of limit)."""
    plant, quality = _surrogate(st, task.test.content_hash, task.split, split_obj, session)
    res = steer(predictor, session, split_obj.train, copy.deepcopy(plant), quality, control=st.control,
                horizon_steps=st.horizon_steps, limits=st.limits, loop_seed=loop_seed)
    loop = res["loop"]
    return {"tracking_rms": loop["tracking_rms"], "tracking_rms_all": loop["tracking_rms_all"],
            "energy_ua2": loop["energy_ua2"],
            "violations": int(sum(v for k, v in loop.items() if k.startswith("violations_"))),
            "n_fallback": loop["n_fallback"], "surrogate_r2": quality["r2_kstep_mean"],
            "control_s": res["control_s"]}
