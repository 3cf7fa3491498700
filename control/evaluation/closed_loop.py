"""The closed-loop part of a task: the plant it runs on, the limits and target, the controller and the loop's figures.

A simulated session comes with its ground-truth plant (re-recorded with scaled noise for the noise sweep); a
recording gets a *surrogate plant*: a ridge ARX with twice the longest past window of the routes (a richer model
class than either route's), fitted on the held-out trials only and driven with its own innovation noise
(:class:`~stimsteer.control.plants.InnovationPlant`); its fit quality is scored on the training trials, which it
never saw. Without declared limits the controllers stay inside the recorded input range (:func:`recorded_limits`).
"""

from __future__ import annotations

import copy
import time

import numpy as np
import pandas as pd

from ...sysid import InvalidParameterError, Session, SessionError, StimsteerError, freerun_scores, kstep_scores
from ...sysid._records import window_stride
from ..limits import StimLimits
from ..loop import run_closed_loop
from ..mpc import controller_for
from ..plants import InnovationPlant, record_session
from .settings import BenchSettings, ControlSettings, MethodSpec, _is_int
from .tasks import _cached, _Context, _fit, _Task

__all__ = ["recorded_limits", "steer", "fit_surrogate", "surrogate_spec"]

_NOISE_KEYS = ("process_noise_std", "measurement_noise_std", "drift_amplitude", "drift_step_std")


def _check_plant(plant, session) -> None:
    for attr in ("n_inputs", "n_outputs", "reset", "step"):
        if not hasattr(plant, attr):
            raise InvalidParameterError(f"the plant lacks {attr!r}; give an object with the plant interface (see "
                                        "stimsteer.control.plants), e.g. load_plant('demo_plant.h5').")
    if (int(plant.n_inputs), int(plant.n_outputs)) != (session.n_inputs, session.n_outputs):
        raise SessionError(f"the plant has {plant.n_inputs} inputs and {plant.n_outputs} outputs; the session "
                           f"{session.n_inputs} and {session.n_outputs}. Give the plant that recorded this session.")
    rate = getattr(plant, "sample_rate_hz", session.sample_rate_hz)
    if abs(float(rate) - session.sample_rate_hz) > 1e-9 * session.sample_rate_hz:
        raise SessionError(f"the plant runs at {float(rate):g} Hz but the session at {session.sample_rate_hz:g} Hz; "
                           "give the plant that recorded this session.")


def _scaled_plant(plant, scale: float):
    if not hasattr(plant, "with_params"):
        raise StimsteerError(f"the noise sweep re-records the session from the plant with scaled noise, which "
                             f"needs a plant with with_params(...); {type(plant).__name__} has none. Pass "
                             "noise_scales=() to skip the sweep.")
    params = plant.get_params()
    changes = {k: np.asarray(params[k], np.float64) * scale for k in _NOISE_KEYS if k in params}
    return plant.with_params(**changes)


def _rerecord(session: Session, plant, scale: float) -> Session:
    """The session's schedule played again through the plant with its noise scaled by ``scale``."""
    u = np.where(session.mask[:, None], session.u, 0.0)
    start = str(session.metadata.get("trial_start", "continue"))
    rec = record_session(_scaled_plant(plant, scale), u, trials=session.trials,
                         trial_start=start if start in ("continue", "rest") else "continue",
                         input_units=session.input_units, output_units=session.output_units,
                         metadata={**session.metadata, "noise_scale": float(scale)})
    return rec.replace(mask=session.mask, input_names=session.input_names, output_names=session.output_names)


def recorded_limits(session: Session) -> StimLimits:
    """Amplitude limits equal to the range of the recorded inputs (widened to include zero), no slew or budget.

    Used when no limits are declared: the controllers then stay inside the range the routes were fitted on.
    """
    lo, hi = np.zeros(session.n_inputs), np.zeros(session.n_inputs)
    for s, e in session.segments():
        u = session.u[s:e]
        lo, hi = np.minimum(lo, u.min(axis=0)), np.maximum(hi, u.max(axis=0))
    return StimLimits(amplitude_min_ua=lo, amplitude_max_ua=hi, input_names=session.input_names)


def _channel_index(session, channel) -> int:
    if channel is None:
        return 0
    names = list(session.output_names)
    if isinstance(channel, str):
        if channel not in names:
            raise InvalidParameterError(f"target channel {channel!r} is not an output of the session; outputs: "
                                        f"{names}.")
        return names.index(channel)
    if not _is_int(channel) or not 0 <= int(channel) < len(names):
        raise InvalidParameterError(f"target channel index {channel!r} is out of range for {len(names)} outputs.")
    return int(channel)


_TRAINING: dict = {}  # (session id, training trials) -> (session, training part, output mean, output std)
_TRAINING_KEEP = 8  # a bench's splits and training sizes: the tasks of one method after another share them


def _training_part(session: Session, train_trials) -> tuple:
    """The session's training trials as a session, and their outputs' mean and standard deviation (:func:`_output_stats`).

    Kept for the next closed-loop tasks on the same trials (every route and setting of a split): a session's arrays
    are read-only, and the session is held with its entry, so that its id stays its own.
    """
    trials = np.asarray(train_trials)
    key = (id(session), trials.dtype.str, trials.shape, trials.tobytes())
    hit = _TRAINING.get(key)
    if hit is not None and hit[0] is session:
        return hit[1:]
    full = session.select_trials(train_trials)
    if len(_TRAINING) >= _TRAINING_KEEP:
        _TRAINING.pop(next(iter(_TRAINING)))
    _TRAINING[key] = entry = (session, full, *_output_stats(full))
    return entry[1:]


def _output_stats(train: Session) -> tuple[np.ndarray, np.ndarray]:
    ys = np.concatenate([train.y[s:e] for s, e in train.segments()])
    std = ys.std(axis=0)
    return ys.mean(axis=0), np.where(std > 0, std, 1.0)


def _target(ctrl: ControlSettings, mean, std, c: int, horizon: int) -> np.ndarray:
    """Pulse target, shape (n_steps + horizon − 1, n_outputs): training mean, plus the pulse on channel ``c``."""
    n = ctrl.n_steps + horizon - 1
    target = np.tile(mean, (n, 1))
    a, b = (int(round(f * ctrl.n_steps)) for f in ctrl.pulse_fraction)
    target[a:b, c] += ctrl.target_level_std * std[c]
    return target



def _controller(predictor, limits, horizon: int, weight, input_weight):
    """The route's predictive controller (:func:`stimsteer.control.mpc.controller_for`), in the outputs' units."""
    return controller_for(predictor, limits, horizon_steps=horizon, output_weight=weight, input_weight=input_weight)


def _surrogate_spec(st: BenchSettings) -> MethodSpec:
    return surrogate_spec(st.methods, st.past_steps)


def surrogate_spec(methods, past_steps: int) -> MethodSpec:
    """The surrogate plant's method: ridge ARX with twice the longest past window of ``methods``."""
    longest = max(int(m.settings.get("past_steps", past_steps)) for m in methods)
    return MethodSpec("indirect", "arx", {"past_steps": 2 * longest})


def fit_surrogate(test: Session, train: Session, spec: MethodSpec, past_steps: int, horizon_steps: int,
                  max_windows: int):
    """A surrogate plant fitted on the held-out trials ``test``, and its quality scored on ``train`` (unseen by it).

    Returns
    -------
    plant : InnovationPlant
        Driven by the ARX's own innovation noise (seed 0).
    quality : dict
        What the surrogate is and how well it predicts the training trials (k-step and free-run R²).
    """
    est = _fit(spec, test, past_steps, horizon_steps)
    model = est.state_space_model()  # the ARX realisation, its resting output in info
    H = horizon_steps
    ks = kstep_scores(est, train, horizon_steps=H, stride_steps=window_stride(train, est.past_steps_, H, max_windows))
    fr = freerun_scores(est, train)
    quality = {"surrogate": f"ridge ARX, {est.output_lags} output and input lags, fitted on held-out trials",
               "alpha": est.alpha_, "r2_kstep_mean": float(ks.kstep["r2"].mean()),
               "r2_last": float(ks.kstep.loc[ks.kstep["step"] == H, "r2"].mean()),
               "r2_freerun": float(fr.freerun["r2"].mean()), "scored_on": "training trials (unseen by it)"}
    return InnovationPlant(model, output_offset=model.info.get("output_offset"), seed=0), quality


def _surrogate(ctx: _Context, task: _Task, session: Session):
    """Ridge ARX of twice the routes' longest past window fitted on the held-out trials, and its quality."""
    def make():
        st = ctx.settings
        return fit_surrogate(session.select_trials(task.split.test), session.select_trials(task.split.train),
                             _surrogate_spec(st), st.past_steps, st.horizon_steps, st.max_windows)

    return _cached((ctx.token, "surrogate", task.split_index), make)


def _plant_for(ctx: _Context, task: _Task, session: Session):
    if ctx.plant is None:
        plant, quality = _surrogate(ctx, task, session)
        return copy.deepcopy(plant), quality
    scale = task.setting.noise_scale
    return copy.deepcopy(ctx.plant if scale == 1.0 else _scaled_plant(ctx.plant, scale)), None


def _control(ctx: _Context, task: _Task, predictor, session: Session) -> dict:
    plant, quality = _plant_for(ctx, task, session)
    return steer(predictor, session, task.split.train, plant, quality, control=ctx.settings.control,
                 horizon_steps=task.setting.horizon_steps, limits=ctx.limits, loop_seed=task.loop_seed,
                 keep_traces=task.keep_traces)


def steer(predictor, session: Session, train_trials, plant, quality, *, control: ControlSettings,
          horizon_steps: int, limits=None, loop_seed: int = 0, keep_traces: bool = False) -> dict:
    """The closed-loop task of one fitted route: track a pulse on the plant, under the limits.

    The target and, without declared ``limits``, the amplitude limits (:func:`recorded_limits`) come from the
    session's training trials ``train_trials``. ``plant`` is used as given (pass a copy to keep the original).

    Returns
    -------
    dict
        ``loop`` (:func:`_loop_row`: tracking error, energy, limit use, violations, fallbacks, solve times),
        ``control_s``, ``surrogate`` (``quality``, as given), ``limits``, and ``loop_trace`` with ``keep_traces``.
    """
    cs, H = control, int(horizon_steps)
    full_train, mean, std = _training_part(session, train_trials)
    limits = limits if limits is not None else recorded_limits(full_train)
    c = _channel_index(session, cs.target_channel)
    target = _target(cs, mean, std, c, H)
    weight = np.full(session.n_outputs, cs.other_output_weight)
    weight[c] = 1.0
    controller = _controller(predictor, limits, H, weight, cs.input_weight)
    t0 = time.perf_counter()
    loop = run_closed_loop(controller, plant, n_steps=cs.n_steps, target=target, seed=loop_seed)
    control_s = time.perf_counter() - t0
    out = {"loop": _loop_row(loop, c, limits), "control_s": control_s, "surrogate": quality,
           "limits": limits.to_dict()}
    if keep_traces:
        out["loop_trace"] = _loop_trace(loop, c, session)
    return out


def _loop_row(loop, c: int, limits) -> dict:
    times = np.asarray(loop.solve_time_s) * 1e3
    # the first plan also sets the controller up (the state estimate's map, the condensed prediction matrices:
    # seconds for a model of thousands of states), which a live run does in its warm-up: reported on its own
    steady = times[1:] if times.size > 1 else times
    return {
        "tracking_rms": float(loop.rms_tracking_error[c]),
        "tracking_rms_all": float(np.sqrt(np.mean(np.asarray(loop.tracking_error) ** 2))),
        "energy_ua2": float(loop.energy_ua2),
        **{f"use_{k}": float(v) for k, v in loop.limit_use.items()},
        **{f"violations_{k}": int(v) for k, v in loop.violations.items()},
        "n_fallback": int(loop.n_fallback),
        "solve_ms_median": float(np.median(steady)), "solve_ms_p95": float(np.percentile(steady, 95)),
        "solve_ms_max": float(np.max(steady)), "solve_ms_first": float(times[0]),
    }


def _loop_trace(loop, c: int, session: Session) -> pd.DataFrame:
    n = loop.n_steps
    time_s = np.arange(n) / session.sample_rate_hz
    frames = [pd.DataFrame({"time_s": time_s, "signal": "output", "channel": session.output_names[c],
                            "value": np.asarray(loop.outputs)[:, c]}),
              pd.DataFrame({"time_s": time_s, "signal": "target", "channel": session.output_names[c],
                            "value": np.asarray(loop.targets)[:, c]})]
    for i, name in enumerate(session.input_names):
        frames.append(pd.DataFrame({"time_s": time_s, "signal": "input", "channel": name,
                                    "value": np.asarray(loop.inputs)[:, i]}))
    return pd.concat(frames, ignore_index=True)

