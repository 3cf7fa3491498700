"""Stimulation artifacts in the recorded outputs: detection, template subtraction and interpolation.

Every function reads the stimulation onsets from the session's inputs (:func:`stimulation_onsets`: a site turning
on, ``|u|`` rising above a threshold, either polarity) and changes the **outputs only**: the inputs are never
touched. :func:`blank_artifacts` (also exported by :mod:`stimsteer.sysid.prep`) hides the outputs instead
(``Session.output_mask``): fits leave out the rows and columns that would predict a blanked output and scores skip
blanked outputs, while the inputs of those samples stay valid, so a pulse one sample long is still seen.

Detection
---------
:func:`detect_artifacts` compares, per output channel, the output power in a short window from each onset with
the power in a window just before it, both measured on the sample-to-sample changes ``y(k) − y(k − 1)`` (stationary
for ongoing activity, so the two agree without stimulation), over the onsets whose two windows lie in one trial and
are valid. A stimulation artifact is immediate, while a network's response to a pulse needs at least one sample to
travel, so a short window mostly sees the artifact; the ratio ``post / pre`` and the excess power ``post − pre``
are reported per channel, and channels above ``ratio_threshold`` are flagged.

Template subtraction
--------------------
:func:`subtract_template` fits, per output channel and per lag ``τ`` in the window, the onset-locked deviations
``y(k_i + τ) − b_i`` (``b_i`` the sample before onset ``i``) as a linear function of the onset amplitudes of every
site, ``Σ_s a_{i,s} T_s(τ)`` (least squares over the onsets), and subtracts the fitted templates at each onset. With
``scale="none"`` each site's column is 1 where it turned on (a fixed template per site). The response of the
network inside the window is partly absorbed by the template; keep the window as short as the artifact.

Interpolation
-------------
:func:`interpolate_artifacts` replaces the outputs in ``[k, k + w)`` after each onset by the straight line between
the last sample before the onset and the first sample after the window (inside the trial).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .exceptions import SessionError
from .output_mask import output_valid
from .session import Session

__all__ = ["blank_artifacts", "stimulation_onsets", "ArtifactReport", "detect_artifacts", "subtract_template",
           "interpolate_artifacts", "ARTIFACT_RATIO_THRESHOLD"]

#: Post-onset over pre-onset output power above which a channel is flagged (our own choice: without artifacts the
#: ratio is 1 ± 0.15 for white noise over ~800 onsets (tests/sysid/test_artifacts.py) and 0.9-1.2 on the demo after
#: template subtraction, while the demo's artifacts give 4-11).
ARTIFACT_RATIO_THRESHOLD = 1.5


def _check_session(session, where: str) -> None:
    if not isinstance(session, Session):
        raise SessionError(f"{where} needs a Session; got {type(session).__name__}. Load one with load_session.")


def _columns(session: Session, inputs, what: str = "artifact handling") -> list[int]:
    """The input columns whose onsets count (default all), by name."""
    if session.n_inputs == 0:
        raise SessionError(f"{what} needs at least one input channel to find stimulation onsets.")
    if inputs is None:
        return list(range(session.n_inputs))
    names = [inputs] if isinstance(inputs, str) else list(inputs)
    unknown = [n for n in names if n not in session.input_names]
    if unknown or not names:
        raise SessionError(f"inputs {unknown or names} are not input channels of this session; choose among "
                           f"{list(session.input_names)}.")
    return [session.input_names.index(n) for n in names]


def stimulation_onsets(u, *, threshold: float = 0.0) -> np.ndarray:
    """Onset flags, shape (n_samples, n_sites): ``|u|`` above ``threshold`` where the sample before was not.

    NaN counts as off; a first sample above the threshold is an onset.
    """
    u = np.asarray(u, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        above = np.abs(u) > float(threshold)
    before = np.vstack([np.zeros((1, above.shape[1]), dtype=bool), above[:-1]])
    return above & ~before


def _width(session: Session, window_s) -> int:
    try:
        window_s = float(window_s)
    except (TypeError, ValueError):
        raise SessionError(f"window_s must be a number of seconds; got {window_s!r}.") from None
    if not math.isfinite(window_s) or window_s <= 0:
        raise SessionError(f"window_s must be a positive number of seconds; got {window_s}.")
    return max(1, math.ceil(window_s * session.sample_rate_hz - 1e-9))


def _trial_of(session: Session) -> np.ndarray:
    owner = np.full(session.n_samples, -1, dtype=np.int64)
    for i, (a, b) in enumerate(session.trials):
        owner[a:b] = i
    return owner


# ==================================================================================================== detection
@dataclass(frozen=True)
class ArtifactReport:
    """Output power locked to stimulation onsets, per output channel.

    Attributes
    ----------
    channels, units : tuple of str
    pre_power, post_power : ndarray, shape (n_outputs,)
        Mean square of the sample-to-sample change ``y(k) − y(k − 1)`` before and after onsets (unit²).
    ratio : ndarray, shape (n_outputs,)
        ``post_power / pre_power``.
    flagged : tuple of str
        Channels with ``ratio > ratio_threshold``.
    n_onsets : int
        Onsets used (both windows valid and inside one trial).
    window_samples, pre_samples : int
    sample_rate_hz, ratio_threshold : float
    locked_power : ndarray, shape (pre_samples + window_samples, n_outputs)
        Mean square of the sample-to-sample change at each lag from ``−pre_samples`` to ``window_samples − 1``
        (for the figure).
    """

    channels: tuple
    units: tuple
    pre_power: np.ndarray
    post_power: np.ndarray
    ratio: np.ndarray
    flagged: tuple
    n_onsets: int
    window_samples: int
    pre_samples: int
    sample_rate_hz: float
    ratio_threshold: float
    locked_power: np.ndarray

    def warnings(self) -> list[str]:
        """One warning naming the flagged channels with their ratios, and the fix (empty when none is flagged)."""
        if not self.flagged:
            return []
        ratios = ", ".join(f"{n} {self.ratio[self.channels.index(n)]:.1f}x" for n in self.flagged)
        ms = 1e3 * self.window_samples / self.sample_rate_hz
        return [f"stimulation artifacts in {len(self.flagged)} of {len(self.channels)} output channel(s): the output "
                f"power in the {ms:.1f} ms after {self.n_onsets} stimulation onsets exceeds the pre-onset level "
                f"({ratios}; flagged above {self.ratio_threshold:g}x). Remove them before fitting: stimsteer convert "
                "with an [artifacts] table, or subtract_template / interpolate_artifacts / blank_artifacts."]

    def to_text(self) -> str:
        head = (f"artifacts (output power in {self.window_samples} sample(s) from {self.n_onsets} stimulation "
                f"onsets vs the {self.pre_samples} before; flagged above {self.ratio_threshold:g}x):")
        rows = [f"  {n}: {r:.2f}x" + ("  <- artifact" if n in self.flagged else "")
                for n, r in zip(self.channels, self.ratio)]
        return "\n".join([head] + rows)

    def to_dict(self) -> dict:
        return {"channels": list(self.channels), "ratio": self.ratio.tolist(), "pre_power": self.pre_power.tolist(),
                "post_power": self.post_power.tolist(), "flagged": list(self.flagged), "n_onsets": self.n_onsets,
                "window_samples": self.window_samples, "pre_samples": self.pre_samples,
                "ratio_threshold": self.ratio_threshold}


def _locked_sums(source, cols, threshold: float, pre: int, width: int, chunk_rows: int = 262144):
    """Sum over usable onsets of the squared first differences at each lag, and the onset count.

    Reads the source one trial at a time (in chunks that overlap by the windows), so a lazily opened file is never
    loaded whole. An onset is usable when its windows and the sample before them are valid and inside its trial.
    """
    span = pre + 1 + width
    total, count = np.zeros((pre + width, int(source.n_outputs))), 0
    lags = np.arange(-pre, width)
    for a, b in np.asarray(source.trials, dtype=np.int64):
        for c0 in range(int(a), int(b), chunk_rows):
            lo, hi = max(int(a), c0 - span), min(int(b), c0 + chunk_rows + span)
            u, y, mask = source.read(lo, hi)
            on = np.flatnonzero(stimulation_onsets(np.asarray(u)[:, cols], threshold=threshold).any(axis=1))
            k = on[(on - pre - 1 >= 0) & (on + width <= hi - lo) & (lo + on >= c0) & (lo + on < c0 + chunk_rows)]
            # a blanked output is no measurement: onsets whose windows hold one are not used
            bad = np.concatenate(([0], np.cumsum(~(np.asarray(mask, dtype=bool) & output_valid(source, lo, hi)))))
            k = k[bad[k + width] - bad[k - pre - 1] == 0]
            if k.size:
                y = np.asarray(y, dtype=np.float64)
                seg = y[k[:, None] + lags[None, :]] - y[k[:, None] + lags[None, :] - 1]
                total += (seg ** 2).sum(axis=0)
                count += int(k.size)
    return total, count


def detect_artifacts(session, *, window_s: float | None = None, pre_s: float | None = None,
                     threshold: float = 0.0, inputs=None,
                     ratio_threshold: float = ARTIFACT_RATIO_THRESHOLD) -> ArtifactReport | None:
    """Output power locked to stimulation onsets against the pre-onset level, per channel.

    Parameters
    ----------
    session : Session or an opened session file
        Anything with ``read(start, stop)``, ``trials``, names and units (read one trial at a time).
    window_s : float, optional
        Window from each onset, seconds. Default one sample or 2 ms, whichever is longer.
    pre_s : float, optional
        Window before each onset, seconds. Default 5 × the window.
    threshold : float, default 0.0
        Onset threshold on ``|u|`` in the inputs' units.
    inputs : str or sequence of str, optional
        Input channels that define onsets; default all.
    ratio_threshold : float, default :data:`ARTIFACT_RATIO_THRESHOLD`

    Returns
    -------
    ArtifactReport or None
        None when the session has no inputs or no usable onset.
    """
    if not all(hasattr(session, x) for x in ("read", "trials", "n_inputs", "output_names", "sample_rate_hz")):
        raise SessionError(f"detect_artifacts needs a Session or an opened session file; got "
                           f"{type(session).__name__}.")
    if session.n_inputs == 0:
        return None
    cols = _columns(session, inputs)
    width = _width(session, window_s if window_s is not None else max(0.002, 1.0 / session.sample_rate_hz))
    pre = _width(session, pre_s) if pre_s is not None else 5 * width
    total, count = _locked_sums(session, cols, threshold, pre, width)
    if count == 0:
        return None
    # first differences y(k+τ) − y(k+τ−1): stationary for ongoing activity, so pre and post agree without
    # stimulation (a pre-onset mean as baseline would bias the ratio by (n+1)/(n−1) even for white noise)
    locked = total / count
    pre_p, post_p = locked[:pre].mean(axis=0), locked[pre:].mean(axis=0)
    ratio = post_p / np.maximum(pre_p, np.finfo(float).tiny)
    flagged = tuple(n for n, r in zip(session.output_names, ratio) if r > ratio_threshold)
    return ArtifactReport(tuple(session.output_names), tuple(session.output_units), pre_p, post_p, ratio, flagged,
                          count, width, pre, session.sample_rate_hz, float(ratio_threshold), locked)


# ==================================================================================================== removal
def _record(session: Session, step: dict) -> dict:
    return {**session.metadata, "prep": list(session.metadata.get("prep", [])) + [step]}


def _onset_design(session: Session, cols, threshold: float, width: int, scale: str):
    if scale not in ("amplitude", "none"):
        raise SessionError(f"scale must be 'amplitude' or 'none'; got {scale!r}.")
    flags = stimulation_onsets(session.u[:, cols], threshold=threshold)
    k = np.flatnonzero(flags.any(axis=1))
    owner = _trial_of(session)
    k = k[(k >= 1) & (k + width <= session.n_samples)]
    k = k[[owner[i - 1] >= 0 and owner[i - 1] == owner[i + width - 1] for i in k]] if k.size else k
    X = np.where(flags[k], session.u[k][:, cols], 0.0) if scale == "amplitude" else flags[k].astype(float)
    return k, X


def subtract_template(session: Session, *, window_s: float, threshold: float = 0.0, inputs=None,
                      scale: str = "amplitude") -> Session:
    """Remove onset-locked artifact templates from the outputs (see the module docstring).

    Parameters
    ----------
    session : Session
    window_s : float
        Length of the template from each onset, seconds.
    threshold : float, default 0.0
    inputs : str or sequence of str, optional
    scale : {"amplitude", "none"}, default "amplitude"
        Templates scale with each site's onset amplitude (signed), or are fixed per site.

    Returns
    -------
    Session
        Outputs with the templates subtracted; inputs, mask and trials unchanged. ``metadata["prep"]`` records
        the step and the templates (shape (window, sites, outputs)).

    Raises
    ------
    SessionError
        A bad window or scale, unknown inputs, or fewer onsets than sites (the templates cannot be told apart).
    """
    _check_session(session, "subtract_template")
    cols, width = _columns(session, inputs), _width(session, window_s)
    k, X = _onset_design(session, cols, threshold, width, scale)
    if k.size < len(cols):
        raise SessionError(f"template subtraction needs at least {len(cols)} stimulation onsets (one per site) "
                           f"inside trials; found {k.size}. Use interpolate_artifacts or blank_artifacts instead.")
    y = np.array(session.y)
    lags = np.arange(width)
    dev = y[k[:, None] + lags[None, :]] - y[k - 1][:, None, :]  # (n_onsets, width, p)
    coef, *_ = np.linalg.lstsq(X, dev.reshape(k.size, -1), rcond=None)
    templates = coef.reshape(len(cols), width, -1)  # (sites, width, p)
    fitted = np.einsum("os,swp->owp", X, templates)
    np.subtract.at(y, k[:, None] + lags[None, :], fitted)
    step = {"step": "subtract_template", "window_s": float(window_s), "window_samples": width, "scale": scale,
            "threshold": float(threshold), "inputs": [session.input_names[c] for c in cols],
            "n_onsets": int(k.size), "templates": templates.transpose(1, 0, 2).tolist()}
    y.setflags(write=False)  # a new array: the session takes it without a copy
    return session.replace(y=y, metadata=_record(session, step))


def interpolate_artifacts(session: Session, *, window_s: float, threshold: float = 0.0, inputs=None) -> Session:
    """Replace the outputs in ``window_s`` from each onset by a straight line across the window.

    The line joins the last sample before the onset and the first sample after the window; a window that reaches
    a trial's end is held at the last sample before the onset. Onsets at a trial's first sample are left alone.

    Returns
    -------
    Session
        Outputs interpolated; inputs, mask and trials unchanged; ``metadata["prep"]`` records the step.
    """
    _check_session(session, "interpolate_artifacts")
    cols, width = _columns(session, inputs), _width(session, window_s)
    k = np.flatnonzero(stimulation_onsets(session.u[:, cols], threshold=threshold).any(axis=1))
    owner = _trial_of(session)
    y = np.array(session.y)
    done = 0
    for i in k:
        if i < 1 or owner[i - 1] < 0 or owner[i - 1] != owner[i]:
            continue
        end = i + width
        if end < session.n_samples and owner[end] == owner[i]:
            w = (np.arange(1, width + 1) / (width + 1))[:, None]
            y[i:end] = (1 - w) * y[i - 1] + w * y[end]
        else:
            stop = min(end, int(session.trials[owner[i]][1]))
            y[i:stop] = y[i - 1]
        done += 1
    step = {"step": "interpolate_artifacts", "window_s": float(window_s), "window_samples": width,
            "threshold": float(threshold), "inputs": [session.input_names[c] for c in cols], "n_onsets": done}
    y.setflags(write=False)  # a new array: the session takes it without a copy
    return session.replace(y=y, metadata=_record(session, step))


# ==================================================================================================== artifacts
def blank_artifacts(session: Session, *, window_s: float, onset_threshold: float = 0.0, inputs=None) -> Session:
    """Blank the recorded outputs in a window of ``window_s`` seconds starting at every stimulation onset.

    Only the outputs are blanked (``Session.output_mask``); the inputs of those samples stay valid, so a pulse
    that lasts one sample still enters every regression row and Hankel column that sees it as an input. Fits drop
    the rows and columns whose predicted outputs are blanked, and scores skip blanked outputs. The blanked outputs
    are replaced by a straight line across each blanked run (held at a trial's edge), which is what a past-output
    regressor sees there; those values are never fitted nor scored as targets.

    Parameters
    ----------
    session : Session
    window_s : float
        Length of the blanked window in seconds (> 0); it covers ``max(1, ceil(window_s · sample_rate_hz))``
        samples, starting at the onset sample itself.
    onset_threshold : float, default 0.0
        In the inputs' units. An onset is a sample where an input's magnitude ``|u|`` is above the threshold while
        the sample before it was not: a site turning on, with either polarity (cathodic-first and anodic-first
        pulses both make artifacts); a polarity switch while the site stays on is not an onset. A NaN counts as
        off; a first sample above the threshold is an onset.
    inputs : str or sequence of str, optional
        Input channels that define onsets; default all.

    Returns
    -------
    Session
        With the blanked outputs marked in ``output_mask`` and filled as above (inputs, mask and trials
        untouched); ``metadata["prep"]`` records the number of onsets and of newly blanked samples.

    Raises
    ------
    SessionError
        A non-positive window, a non-finite threshold, unknown input names, or a session without inputs.
    """
    _check_session(session, "blank_artifacts")
    try:
        window_s, onset_threshold = float(window_s), float(onset_threshold)
    except (TypeError, ValueError):
        raise SessionError("window_s and onset_threshold must be numbers.") from None
    if not math.isfinite(window_s) or window_s <= 0:
        raise SessionError(f"window_s must be a positive number of seconds; got {window_s}.")
    if not math.isfinite(onset_threshold):
        raise SessionError(f"onset_threshold must be finite; got {onset_threshold}.")
    onsets = _onsets(session.u, _columns(session, inputs, "blank_artifacts"), onset_threshold)
    width = max(1, math.ceil(window_s * session.sample_rate_hz - 1e-9))
    output_mask = np.array(session.output_mask)
    for a, b in _merged_runs(onsets, width, session.n_samples):
        output_mask[a:b] = False
    step = {"step": "blank_artifacts", "window_s": window_s, "onset_threshold": onset_threshold,
            "window_samples": width, "n_onsets": int(onsets.size),
            "n_blanked": int((session.mask & session.output_mask & ~output_mask).sum()), "blanks": "outputs only"}
    y = _bridge_blanked(session, output_mask)
    y.setflags(write=False)  # a new array: the session takes it without a copy
    return session.replace(y=y, output_mask=output_mask, metadata=_record(session, step))


_CHUNK = 1 << 16  # samples per window of the blanking steps (their temporaries stay this size)


def _onsets(u: np.ndarray, cols, threshold: float) -> np.ndarray:
    """Samples where one of the inputs ``cols`` rises above ``threshold`` in magnitude (a first sample above it
    counts; NaN counts as off), found in windows of :data:`_CHUNK` samples."""
    found, prev = [], np.zeros(len(cols), dtype=bool)
    for c0 in range(0, u.shape[0], _CHUNK):
        with np.errstate(invalid="ignore"):
            above = np.abs(u[c0:c0 + _CHUNK][:, cols]) > threshold
        before = np.vstack([prev[None, :], above[:-1]])
        found.append(np.flatnonzero((above & ~before).any(axis=1)) + c0)
        prev = above[-1]
    return np.concatenate(found) if found else np.zeros(0, dtype=np.int64)


def _merged_runs(onsets: np.ndarray, width: int, n: int) -> list:
    """The union of ``[onset, onset + width)`` (clipped to ``n``) as sorted disjoint runs."""
    runs: list = []
    for k in onsets.tolist():
        if runs and k <= runs[-1][1]:
            runs[-1][1] = max(runs[-1][1], min(n, k + width))
        else:
            runs.append([k, min(n, k + width)])
    return runs


def _good_edge(good: np.ndarray, start: int, stop: int, last: bool) -> int | None:
    """The last (or first) index of ``good`` in ``[start, stop)``, searched in windows; None when there is none."""
    blocks = range(stop, start, -_CHUNK) if last else range(start, stop, _CHUNK)
    for s in blocks:
        lo, hi = (max(start, s - _CHUNK), s) if last else (s, min(stop, s + _CHUNK))
        nz = np.flatnonzero(good[lo:hi])
        if nz.size:
            return lo + int(nz[-1] if last else nz[0])
    return None


def _bridge_blanked(session: Session, output_mask: np.ndarray) -> np.ndarray:
    """Outputs with each blanked run replaced by the straight line between its valid neighbours in the same trial
    (held at a trial's edge); samples masked as a whole are left as they are (they may be NaN).

    Done in windows of :data:`_CHUNK` samples, each widened to the nearest valid output on either side within the
    trial: the same line as across the whole trial at once, with temporaries of a window's size."""
    y = np.array(session.y)
    good_all, fill_all = session.mask & output_mask, session.mask & ~output_mask
    for a, b in session.trials:
        for c0 in range(a, b, _CHUNK):
            c1 = min(b, c0 + _CHUNK)
            f = np.flatnonzero(fill_all[c0:c1]) + c0
            if f.size == 0:
                continue
            left, right = _good_edge(good_all, a, c0, True), _good_edge(good_all, c1, b, False)
            lo, hi = (c0 if left is None else left), (c1 if right is None else right + 1)
            g = np.flatnonzero(good_all[lo:hi]) + lo
            if g.size == 0:
                continue
            for j in range(y.shape[1]):
                y[f, j] = np.interp(f, g, y[g, j])
    return y
