"""``fit --conditions`` and ``fit --trial-windows K``: how the model changes, and the files that say so.

Both use the training trials of the fit's split only; the held-out trials score the models.

* ``--conditions`` (trials labelled in the session's metadata ``"trial_conditions"``) fits one model of the method per
  condition on that condition's training trials, and writes beside the model file ``MODEL`` a folder
  ``MODEL_conditions/`` holding:

  - ``condition_<label>.h5``: each condition's model, an ordinary model file (``predict`` and ``plan`` take it);
  - ``conditions.csv``: one row per condition: its model file, training and held-out trials, and the free-run VAF
    on its held-out trials of its own model and of the pooled model (``MODEL``);
  - ``step_gains.csv``: each input-output step gain per condition with its bootstrap interval.

* ``--trial-windows K`` writes ``MODEL_trial_windows.csv``: the step gains per window of K consecutive training
  trials with their bootstrap intervals (:func:`~stimsteer.sysid.window_change_table`).

The step gain is read after ``--gain-after`` (a length: ``500ms``, ``40samples``), by default a time from the data
(:func:`~stimsteer.sysid.gain_steps_from_data`). Every path is claimed with the model file, before computing.
"""

from __future__ import annotations

import re
from pathlib import Path

from ...sysid import InvalidParameterError, SessionError, save_predictor
from ...sysid._files import atomic_dir, atomic_path

__all__: list = []

_FLOAT = "%.10g"


def change_paths(args) -> dict:
    """``{"conditions": folder, "trial_windows": csv}`` for the options given (claimed with the model file)."""
    out = Path(args.out)
    paths = {}
    if getattr(args, "conditions", False):
        paths["conditions"] = out.with_name(f"{out.stem}_conditions")
    if getattr(args, "trial_windows", None) is not None:
        paths["trial_windows"] = out.with_name(f"{out.stem}_trial_windows.csv")
    return paths


def check_conditions(args, session, train) -> None:
    """Labels present and at least two training trials per condition, before the fit (one line otherwise)."""
    from ...sysid.conditions import _groups, trial_conditions

    if not getattr(args, "conditions", False):
        return
    try:
        _groups(trial_conditions(session), 2, train)
    except SessionError as exc:
        if "too few trials" not in str(exc):
            raise
        raise SessionError(f"{exc} Counted in the {len(train)} training trials (of {session.n_trials}, with "
                           f"--test-fraction {args.test_fraction:g}); the held-out ones score the models.") from None


def gain_steps(args, session, predictors):
    """The step-gain horizon in samples and the words that say where it came from."""
    from ...sysid import gain_steps_from_data

    given = getattr(args, "gain_after", None)
    rate = float(session.sample_rate_hz)
    if given is not None:
        steps = given.steps(rate, option="--gain-after")
        return steps, f"step gain after {steps} samples ({1e3 * steps / rate:.4g} ms, --gain-after {given})"
    steps, why = gain_steps_from_data(session, predictors)
    return steps, f"step gain after {steps} samples ({1e3 * steps / rate:.4g} ms; from the data: {why})"


def condition_report(args, result, session, settings):
    """Per-condition models on the training trials, their step gains and held-out scores; (lines, writer)."""
    from ...sysid import condition_change_table, condition_heldout_scores, fit_per_condition
    from ...sysid.conditions import trial_conditions

    split = result.split
    labels = trial_conditions(session)
    fits = fit_per_condition(session, method=args.method, method_settings=settings, trials=split.train)
    H, how = gain_steps(args, session.select_trials(split.train), list(fits.models.values()))
    gains = condition_change_table(session, method=args.method, method_settings=settings, seed=args.seed,
                                   n_members=int(getattr(args, "bootstrap", None) or 20), horizon_steps=H,
                                   fits=fits)
    scores = condition_heldout_scores(fits, session, pooled=result.predictor, trials=split.test)
    names = _file_names(list(fits.models))
    scores.insert(1, "model_file", [names[c] for c in scores["condition"]])
    scores["train_trials"] = [" ".join(str(t) for t in fits.trials[c]) for c in scores["condition"]]
    # each model file's own scores (``predict`` draws its error band from them): its condition's held-out trials
    held = {c: [t for t in split.test if labels[t] == c] for c in fits.models}
    own = {c: _scores(m, session, held[c] or fits.trials[c], result.provenance) for c, m in fits.models.items()}
    lines = [f"model change across conditions (one model per condition fitted on its training trials, "
             f"{len(split.train)} of {session.n_trials}; {how}; 95 % bootstrap interval over each condition's "
             "training trials):", gains.to_string(index=False, float_format=lambda v: f"{v:.4g}"),
             f"per-condition models against the pooled model on the held-out trials {list(split.test)} (free-run VAF "
             "%, mean over outputs):",
             scores.drop(columns=["model_file", "train_trials"]).to_string(index=False, na_rep="none held out",
                                                                          float_format=lambda v: f"{v:.4g}")]

    def write(folder, force, provenance):
        with atomic_dir(folder, force=force) as tmp:
            for c, model in fits.models.items():
                prov = {**provenance, "route": fits.route, "method": fits.method,
                        "estimator": type(model).__name__, "settings": _jsonable(model), "condition": c,
                        "condition_trials": list(fits.trials[c]), "heldout_trials": held[c] or list(fits.trials[c]),
                        "heldout": own[c].to_dict()}
                if not held[c]:
                    prov["heldout_note"] = f"no trial of condition {c!r} was held out: scored on its training trials"
                save_predictor(model, tmp / names[c], provenance=prov)
            scores.to_csv(tmp / "conditions.csv", index=False, float_format=_FLOAT)
            gains.to_csv(tmp / "step_gains.csv", index=False, float_format=_FLOAT)
        return f"per-condition models written to {folder}: " + ", ".join(names[c] for c in fits.models) + \
            " (with conditions.csv and step_gains.csv)"

    return lines, write


def window_report(args, result, session, settings):
    """The step gains per window of training trials; (lines, writer)."""
    from ...sysid import window_change_table

    K = args.trial_windows
    step = args.window_step or K
    # the windows' models share the method and settings, hence the horizon they predict, with the fitted model
    H, how = gain_steps(args, session.select_trials(result.split.train), [result.predictor])
    table = window_change_table(session, method=args.method, method_settings=settings, window_trials=K,
                                step_trials=args.window_step, trials=result.split.train, seed=args.seed,
                                n_members=int(getattr(args, "bootstrap", None) or 20), horizon_steps=H)
    lines = [f"model change over the session ({K} consecutive training trials per window, windows {step} trial(s) "
             f"apart; {how}; 95 % bootstrap interval over each window's trials):",
             table.to_string(index=False, float_format=lambda v: f"{v:.4g}")]

    def write(path, force, provenance):
        with atomic_path(path) as tmp:
            table.to_csv(tmp, index=False, float_format=_FLOAT)
        return f"window table written to {path}"

    return lines, write


def _file_names(labels) -> dict:
    """``condition_<label>.h5`` per label, with characters other than letters, digits, ``.``, ``_`` and ``-``
    replaced by ``_`` (a number appended when two labels would share a name)."""
    names, taken = {}, set()
    for c in labels:
        base = "condition_" + (re.sub(r"[^A-Za-z0-9._-]+", "_", str(c)).strip("._") or "blank")
        name, k = f"{base}.h5", 2
        while name.lower() in taken:
            name, k = f"{base}_{k}.h5", k + 1
        taken.add(name.lower())
        names[c] = name
    return names


def _scores(model, session, trials, provenance):
    """A condition model's k-step and free-run scores on ``trials`` at the fit's horizon and stride (its model file's
    ``heldout``, which ``predict`` turns into its error band)."""
    from ...sysid.metrics import freerun_scores, kstep_scores

    sub = session.select_trials(trials)
    ks = kstep_scores(model, sub, horizon_steps=int(provenance["horizon_steps"]),
                      stride_steps=int(provenance.get("stride_steps") or 1))
    return ks.merged(freerun_scores(model, sub))


def _jsonable(model) -> dict:
    from ...sysid._records import jsonable

    return jsonable(model.get_params(deep=False))


def refuse_gain_after(args) -> None:
    """``--gain-after`` only with ``--conditions`` or ``--trial-windows``."""
    if getattr(args, "gain_after", None) is not None and not (getattr(args, "conditions", False) or
                                                             getattr(args, "trial_windows", None) is not None):
        raise InvalidParameterError("--gain-after sets when the step gains of --conditions or --trial-windows are "
                                    "read; give one of them, or drop --gain-after.")
