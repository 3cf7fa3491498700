"""Preparation of sessions before identification: detrend, filter, resample, standardise, blank artifacts.

Every function takes a :class:`~stimsteer.sysid.session.Session` and returns a new one (the input is never
modified); each appends a record of what it did to ``metadata["prep"]``, so a fitted model can say how its data
were prepared. Only valid samples inside trials are used to estimate anything (trends, scales), and filtering runs
per valid segment, so nothing leaks across a trial boundary or through a masked artifact.
"""

from __future__ import annotations

import math
import warnings
from fractions import Fraction

import numpy as np

from ._base import BaseEstimator, check_fitted
from .exceptions import SessionError, StimsteerWarning
from .session import Session
from .artifacts import blank_artifacts  # blanking lives with the other artifact tools; re-exported here
from ._lazy import lazy_module

signal = lazy_module("scipy.signal")  # imported at its first use (sysid/_lazy.py)

__all__ = ["detrend", "filter_session", "resample_session", "SessionScaler", "blank_artifacts", "BLANK_INFLUENCE_TOLERANCE"]

_SIGNALS = {"inputs": ("u",), "outputs": ("y",), "both": ("u", "y")}


def _check_session(session, where: str) -> None:
    if not isinstance(session, Session):
        raise SessionError(f"{where} needs a Session; got {type(session).__name__}. Load one with load_session.")


def _which(signals: str) -> tuple[str, ...]:
    if signals not in _SIGNALS:
        raise SessionError(f"signals must be one of {sorted(_SIGNALS)}; got {signals!r}.")
    return _SIGNALS[signals]


def _record(session: Session, step: dict) -> dict:
    prep = list(session.metadata.get("prep", []))
    return {**session.metadata, "prep": prep + [step]}


# ==================================================================================================== detrend
def _trend(seg: np.ndarray, valid: np.ndarray, kind: str) -> np.ndarray:
    if kind == "constant":
        return np.broadcast_to(seg[valid].mean(axis=0), seg.shape)
    t = np.arange(seg.shape[0], dtype=np.float64)
    t -= t[valid].mean()  # centring keeps the 2-column least-squares problem well conditioned
    design = np.column_stack([np.ones_like(t), t])
    coef, *_ = np.linalg.lstsq(design[valid], seg[valid], rcond=None)
    return design @ coef


def detrend(session: Session, *, kind: str = "linear", signals: str = "outputs") -> Session:
    """Remove a constant or a straight line from each trial, fitted on the trial's valid samples only.

    Parameters
    ----------
    session : Session
    kind : {"linear", "constant"}, default "linear"
        ``"constant"`` subtracts the per-channel mean of the valid samples of each trial; ``"linear"`` subtracts
        the least-squares line ``a + b t`` fitted to them.
    signals : {"outputs", "inputs", "both"}, default "outputs"

    Returns
    -------
    Session
        Trial samples (masked ones included, NaN stays NaN) have the trend removed; samples outside trials are
        unchanged.

    Raises
    ------
    SessionError
        Unknown ``kind`` or ``signals``; a trial with a single valid sample under ``kind="linear"``.

    Notes
    -----
    Per trial and channel, ``x̃_k = x_k − (a + b k)`` with ``(a, b) = argmin Σ_{k valid} (x_k − a − b k)²``.
    A trial without valid samples is left as it is (nothing downstream reads it).
    """
    _check_session(session, "detrend")
    if kind not in ("constant", "linear"):
        raise SessionError(f"kind must be 'constant' or 'linear'; got {kind!r}.")
    which = _which(signals)
    arrays = {k: np.array(getattr(session, k)) for k in which}
    for w in session.iter_trials():
        valid = np.flatnonzero(w.mask)
        if valid.size == 0:
            continue
        if kind == "linear" and valid.size < 2:
            raise SessionError(
                f"trial {w.index} [{w.start}, {w.stop}) has 1 valid sample; a linear trend needs at least 2. "
                "Use kind='constant' or drop the trial with select_trials."
            )
        for k in which:
            seg = arrays[k][w.start:w.stop]
            arrays[k][w.start:w.stop] = seg - _trend(seg, valid, kind)
    step = {"step": "detrend", "kind": kind, "signals": signals}
    return session.replace(**arrays, metadata=_record(session, step))


# ==================================================================================================== filter
def _design_filter(kind: str, cutoff_hz, order: int, rate: float) -> np.ndarray:
    nyquist = rate / 2.0
    if kind not in ("lowpass", "highpass", "bandpass"):
        raise SessionError(f"kind must be 'lowpass', 'highpass' or 'bandpass'; got {kind!r}.")
    if not isinstance(order, (int, np.integer)) or isinstance(order, bool) or order < 1:
        raise SessionError(f"order must be a positive whole number; got {order!r}.")
    cut = np.atleast_1d(np.asarray(cutoff_hz, dtype=np.float64))
    need = 2 if kind == "bandpass" else 1
    if cut.shape != (need,):
        raise SessionError(f"a {kind} filter needs {need} cut-off frequenc{'ies' if need == 2 else 'y'} in Hz; "
                           f"got {cutoff_hz!r}.")
    if not (np.all(np.isfinite(cut)) and np.all(cut > 0) and np.all(cut < nyquist)):
        raise SessionError(f"cut-off frequencies must lie strictly between 0 and the Nyquist frequency "
                           f"{nyquist:g} Hz; got {cut.tolist()} Hz.")
    if need == 2 and not cut[0] < cut[1]:
        raise SessionError(f"a bandpass needs low < high; got {cut.tolist()} Hz.")
    return signal.butter(order, cut if need == 2 else cut[0], btype=kind, fs=rate, output="sos")


def _padlen(sos: np.ndarray) -> int:
    # the default edge padding of scipy.signal.sosfiltfilt (3 x the number of filter taps)
    ntaps = 2 * sos.shape[0] + 1 - min(int((sos[:, 2] == 0).sum()), int((sos[:, 5] == 0).sum()))
    return 3 * ntaps


def filter_session(session: Session, *, kind: str, cutoff_hz, order: int = 4, signals: str = "outputs",
                   short_segments: str = "error") -> Session:
    """Zero-phase Butterworth filtering, run separately on every valid in-trial segment.

    Parameters
    ----------
    session : Session
    kind : {"lowpass", "highpass", "bandpass"}
    cutoff_hz : float or (float, float)
        Cut-off frequency in Hz (``(low, high)`` for a bandpass), strictly between 0 and ``sample_rate_hz / 2``.
    order : int, default 4
        Butterworth order of one pass; the forward-backward result has twice the attenuation in dB.
    signals : {"outputs", "inputs", "both"}, default "outputs"
    short_segments : {"error", "mask"}, default "error"
        A segment no longer than the filter's edge padding cannot be filtered: raise, or mark it invalid.

    Returns
    -------
    Session
        Filtered valid segments; masked samples and samples outside trials are unchanged.

    Raises
    ------
    SessionError
        Bad filter settings, or (with ``short_segments="error"``) a segment too short to filter.

    Notes
    -----
    The filter is ``scipy.signal.butter(order, cutoff_hz, btype=kind, fs=sample_rate_hz, output="sos")`` applied
    with ``scipy.signal.sosfiltfilt`` (forward then backward, so the phase cancels and the magnitude response is
    squared); its edge padding is ``3 (2 n_sections + 1)`` samples, so a segment must be longer than that.

    References
    ----------
    Gustafsson F. (1996), Determining the initial states in forward-backward filtering, IEEE Trans. Signal
    Processing 44(4):988-992.
    """
    _check_session(session, "filter_session")
    if short_segments not in ("error", "mask"):
        raise SessionError(f"short_segments must be 'error' or 'mask'; got {short_segments!r}.")
    sos = _design_filter(kind, cutoff_hz, order, session.sample_rate_hz)
    padlen = _padlen(sos)
    arrays = {k: np.array(getattr(session, k)) for k in _which(signals)}
    mask = np.array(session.mask)
    for a, b in session.segments():
        if b - a <= padlen:
            if short_segments == "mask":
                mask[a:b] = False
                continue
            raise SessionError(
                f"valid segment [{a}, {b}) has {b - a} samples; an order-{order} {kind} filter needs more than "
                f"{padlen}. Lower the order, blank fewer samples, or pass short_segments='mask' to drop such "
                "segments."
            )
        for k, arr in arrays.items():
            arr[a:b] = signal.sosfiltfilt(sos, arr[a:b], axis=0, padlen=padlen)
    step = {"step": "filter", "kind": kind, "cutoff_hz": np.atleast_1d(cutoff_hz).astype(float).tolist(),
            "order": int(order), "signals": signals, "n_masked_short": int((session.mask & ~mask).sum())}
    return session.replace(**arrays, mask=mask, metadata=_record(session, step))


# ==================================================================================================== resample
def _ratio(rate: float, target_rate_hz, max_denominator: int) -> tuple[int, int]:
    try:
        target = float(target_rate_hz)
    except (TypeError, ValueError):
        raise SessionError(f"target_rate_hz must be a number in Hz; got {target_rate_hz!r}.") from None
    if not math.isfinite(target) or target <= 0:
        raise SessionError(f"target_rate_hz must be positive and finite; got {target}.")
    frac = Fraction(target / rate).limit_denominator(int(max_denominator))
    up, down = frac.numerator, frac.denominator
    if up == 0 or abs(rate * up / down - target) > 1e-9 * target:
        raise SessionError(
            f"cannot resample {rate:g} Hz to {target:g} Hz by a ratio up/down with down <= {max_denominator}; the "
            "nearest is off by more than 1e-9. Raise max_denominator or choose a target rate with a simpler ratio."
        )
    return up, down


def _fill_masked(x: np.ndarray, valid: np.ndarray) -> np.ndarray:
    # linear interpolation across masked samples keeps NaNs and jumps out of the anti-aliasing filter
    if valid.all():
        return x
    if not valid.any():
        return np.zeros_like(x)
    k = np.arange(x.shape[0])
    return np.column_stack([np.interp(k, k[valid], x[valid, j]) for j in range(x.shape[1])]) \
        if x.shape[1] else x


def _resampled_mask(valid: np.ndarray, n_new: int, up: int, down: int) -> np.ndarray:
    # new sample j sits at original position j*down/up; resample_poly's filter reaches 10*max(up, down)/up
    # original samples to either side; the new sample is valid only if every original sample it reaches is
    reach = 10.0 * max(up, down) / up
    n = valid.size
    bad = np.concatenate(([0], np.cumsum(~valid)))
    pos = np.arange(n_new) * down / up
    lo = np.clip(np.floor(pos - reach).astype(np.int64), 0, n)
    hi = np.clip(np.ceil(pos + reach).astype(np.int64) + 1, 0, n)
    return bad[hi] - bad[lo] == 0


#: A resampled output is blanked when the blanked source samples carry more than this fraction of the
#: anti-aliasing filter's absolute weight at that sample (see :func:`resample_session`).
BLANK_INFLUENCE_TOLERANCE = 0.01


def _blank_influence(blanked: np.ndarray, n_new: int, up: int, down: int) -> np.ndarray:
    """Per new sample: the share of the anti-aliasing filter's absolute weight, ``Σ_blanked |h| / Σ |h|``, that
    falls on blanked source samples (the filter of ``resample_poly``'s default design, taken in absolute value)."""
    rate = max(up, down)
    h = np.abs(signal.firwin(2 * 10 * rate + 1, 1.0 / rate, window=("kaiser", 5.0)))
    num = signal.resample_poly(blanked.astype(np.float64), up, down, window=h)[:n_new]
    den = signal.resample_poly(np.ones(blanked.size), up, down, window=h)[:n_new]
    return num / den


def resample_session(session: Session, *, target_rate_hz: float, max_denominator: int = 1000) -> Session:
    """Change the sampling rate by a rational factor, trial by trial, with an anti-aliasing filter.

    Parameters
    ----------
    session : Session
    target_rate_hz : float
        New rate in Hz; ``target / sample_rate_hz`` must be a fraction ``up / down`` with ``down <=
        max_denominator`` (to 1e-9 relative).
    max_denominator : int, default 1000

    Returns
    -------
    Session
        At the new rate. Trial ``[a, b)`` becomes ``[ceil(a r), ceil(b r))`` with ``r = up / down``, its first
        new sample being the trial's first original sample (the onset moves by less than one new sample). A new
        sample is valid only if every original sample the filter reaches is valid. Samples outside trials are
        NaN and invalid. A blanked output (``output_mask``) stays blanked only where it really moves the new
        sample: where the blanked samples carry more than :data:`BLANK_INFLUENCE_TOLERANCE` (1 %) of the filter's
        absolute weight (see Notes).

    Raises
    ------
    SessionError
        A bad target rate, a ratio that needs too large a denominator, or a trial shorter than one new sample.

    Notes
    -----
    Each trial is resampled by ``scipy.signal.resample_poly(x, up, down, padtype="line")``: upsampling by ``up``,
    a Kaiser-windowed FIR low-pass at ``min(1/up, 1/down)`` of the Nyquist frequency of the upsampled signal (the
    anti-aliasing filter, delay-compensated so it adds no phase lag), then keeping every ``down``-th sample.
    Masked samples are linearly interpolated before filtering and stay masked afterwards. Blanked outputs are
    interpolated the same way (a straight line across each blank, as the regressions see past outputs), so the
    artifact never enters the filter; a new sample ``j`` is then blanked when ``Σ_{k blanked} |h_jk| > 0.01 ·
    Σ_k |h_jk|``, ``h_jk`` the filter's weight on source sample ``k``. Elsewhere the blanked samples' true values
    could move it by at most 1 % of their largest departure from that straight line (times ``Σ|h| / |Σh|``,
    1.0–1.3 for this filter). Before, every new sample the filter reached (``10·max(up, down)/up`` source samples
    either side) was blanked: a 2-sample blank at 1 kHz → 500 Hz hid 21 new samples.
    """
    _check_session(session, "resample_session")
    up, down = _ratio(session.sample_rate_hz, target_rate_hz, max_denominator)
    n_new = -(-session.n_samples * up // down)
    u = np.full((n_new, session.n_inputs), np.nan)
    y = np.full((n_new, session.n_outputs), np.nan)
    mask = np.zeros(n_new, dtype=bool)
    output_mask = np.ones(n_new, dtype=bool)
    trials = []
    for w in session.iter_trials():
        a2, b2 = -(-w.start * up // down), -(-w.stop * up // down)
        if b2 <= a2:
            raise SessionError(f"trial {w.index} [{w.start}, {w.stop}) is shorter than one sample at "
                               f"{float(target_rate_hz):g} Hz; drop it with select_trials or resample less.")
        shown = session.output_mask[w.start:w.stop]
        for out, x, valid in ((u, w.u, w.mask), (y, w.y, w.mask & shown)):
            if x.shape[1]:
                out[a2:b2] = signal.resample_poly(_fill_masked(x, valid), up, down, axis=0,
                                                  padtype="line")[: b2 - a2]
        mask[a2:b2] = _resampled_mask(w.mask, b2 - a2, up, down)
        if not shown.all():
            output_mask[a2:b2] = _blank_influence(~shown, b2 - a2, up, down) <= BLANK_INFLUENCE_TOLERANCE
        trials.append((a2, b2))
    step = {"step": "resample", "from_hz": session.sample_rate_hz, "to_hz": session.sample_rate_hz * up / down,
            "up": int(up), "down": int(down)}
    if not session.output_mask.all():
        step["blanked_outputs"] = ("interpolated across each blank before filtering; blanked where the blank holds "
                                   f"more than {BLANK_INFLUENCE_TOLERANCE:g} of the filter's absolute weight")
    return session.replace(u=u, y=y, mask=mask, output_mask=output_mask, trials=trials,
                           sample_rate_hz=session.sample_rate_hz * up / down,
                           metadata=_record(session, step))


# ==================================================================================================== scaler
class SessionScaler(BaseEstimator):
    """Per-channel standardisation fitted on a session's valid in-trial samples, with an exact inverse.

    Parameters
    ----------
    with_mean : bool, default True
        Subtract the channel mean.
    with_scale : bool, default True
        Divide by the channel standard deviation (population, ``ddof=0``).

    Attributes
    ----------
    mean_ : ndarray, shape (n_inputs + n_outputs,)
        Channel means, inputs first then outputs, in the channel units (zeros if ``with_mean=False``).
    scale_ : ndarray, shape (n_inputs + n_outputs,)
        Channel standard deviations in the channel units; 1 for a channel with zero variance (and if
        ``with_scale=False``).
    n_inputs_, n_outputs_ : int
    input_names_, output_names_, input_units_, output_units_ : tuple of str
        The channels the scaler was fitted on; a transformed session must have the same names.
    constant_channels_ : tuple of str
        Channels with zero variance at the valid samples (reported with a :class:`StimsteerWarning`).

    Notes
    -----
    ``z = (x − mean_) / scale_`` and ``x = z · scale_ + mean_``. A scaled session's units read ``sd(<unit>)``
    (standard deviations of the original channel); :meth:`inverse_transform` restores the physical units, so plans
    and predictions made in scaled units come back in µA, mV, ...

    Examples
    --------
    >>> s = Session(u=[[1.0], [3.0]], y=[[10.0], [30.0]], sample_rate_hz=1.0, input_units=["uA"])
    >>> sc = SessionScaler().fit(s)
    >>> sc.transform(s).u.ravel().tolist(), sc.transform(s).input_units
    ([-1.0, 1.0], ('sd(uA)',))
    >>> sc.inverse_transform_outputs([[1.0]]).tolist()
    [[30.0]]
    """

    def __init__(self, *, with_mean: bool = True, with_scale: bool = True):
        self.with_mean = with_mean
        self.with_scale = with_scale

    def fit(self, session: Session) -> "SessionScaler":
        """Estimate ``mean_`` and ``scale_`` from the valid samples inside trials; returns ``self``."""
        _check_session(session, "SessionScaler.fit")
        used = session.mask & session._in_trial()
        if not used.any():
            raise SessionError("the session has no valid samples inside trials; nothing to fit the scaler on.")
        x = np.hstack([session.u, session.y])[used]
        mean = x.mean(axis=0) if self.with_mean else np.zeros(x.shape[1])
        std = x.std(axis=0)
        constant = std <= 1e-12 * np.maximum(np.abs(x).max(axis=0), np.finfo(float).tiny)
        scale = np.where(constant | (not self.with_scale), 1.0, std)
        names = session.input_names + session.output_names
        self.constant_channels_ = tuple(n for n, c in zip(names, constant) if c)
        if self.constant_channels_:
            warnings.warn(
                f"channel(s) {list(self.constant_channels_)} have zero variance at the valid samples; their scale "
                "is set to 1 (they are only centred). A constant channel carries no information: consider "
                "dropping it.", StimsteerWarning, stacklevel=3,
            )
        self.mean_, self.scale_ = mean, scale
        self.n_inputs_, self.n_outputs_ = session.n_inputs, session.n_outputs
        self.input_names_, self.output_names_ = session.input_names, session.output_names
        self.input_units_, self.output_units_ = session.input_units, session.output_units
        return self

    # ------------------------------------------------------------------------------------------ helpers
    def _scaled_units(self, units: tuple) -> tuple:
        return tuple(f"sd({x})" for x in units) if self.with_scale else tuple(units)

    def _check_channels(self, session: Session, units: tuple | None, what: str) -> None:
        check_fitted(self, "mean_")
        _check_session(session, f"SessionScaler.{what}")
        if (session.input_names, session.output_names) != (self.input_names_, self.output_names_):
            raise SessionError(
                f"the scaler was fitted on inputs {list(self.input_names_)} and outputs {list(self.output_names_)}; "
                f"this session has {list(session.input_names)} and {list(session.output_names)}. Fit a scaler on "
                "sessions with these channels."
            )
        if units is not None and (session.input_units, session.output_units) != units:
            raise SessionError(
                f"{what} expects units {list(units[0] + units[1])}; this session has "
                f"{list(session.input_units + session.output_units)}. Was it scaled already (or not at all)?"
            )

    def _part(self, side: str):
        m = self.n_inputs_
        sl = slice(0, m) if side == "inputs" else slice(m, m + self.n_outputs_)
        return self.mean_[sl], self.scale_[sl]

    def _array(self, x, side: str) -> np.ndarray:
        check_fitted(self, "mean_")
        x = np.asarray(x, dtype=np.float64)
        width = self.n_inputs_ if side == "inputs" else self.n_outputs_
        if x.ndim == 0 or x.shape[-1] != width:
            raise SessionError(f"{side} must have {width} channels in the last axis (as fitted); got shape "
                               f"{x.shape}.")
        return x

    # ------------------------------------------------------------------------------------------ sessions
    def transform(self, session: Session) -> Session:
        """The session in scaled units (every sample, masked ones included; NaN stays NaN)."""
        check_fitted(self, "mean_")
        self._check_channels(session, (self.input_units_, self.output_units_), "transform")
        return session.replace(
            u=self.transform_inputs(session.u), y=self.transform_outputs(session.y),
            input_units=self._scaled_units(self.input_units_), output_units=self._scaled_units(self.output_units_),
            metadata=_record(session, {"step": "scale", "with_mean": bool(self.with_mean),
                                       "with_scale": bool(self.with_scale)}),
        )

    def inverse_transform(self, session: Session) -> Session:
        """A scaled session back in the fitted physical units."""
        check_fitted(self, "mean_")
        units = (self._scaled_units(self.input_units_), self._scaled_units(self.output_units_))
        self._check_channels(session, units, "inverse_transform")
        return session.replace(
            u=self.inverse_transform_inputs(session.u), y=self.inverse_transform_outputs(session.y),
            input_units=self.input_units_, output_units=self.output_units_,
            metadata=_record(session, {"step": "unscale"}),
        )

    # ------------------------------------------------------------------------------------------ raw arrays
    def transform_inputs(self, u) -> np.ndarray:
        """Scale raw inputs, shape (..., n_inputs) in physical units."""
        mean, scale = self._part("inputs")
        return (self._array(u, "inputs") - mean) / scale

    def transform_outputs(self, y) -> np.ndarray:
        """Scale raw outputs, shape (..., n_outputs) in physical units."""
        mean, scale = self._part("outputs")
        return (self._array(y, "outputs") - mean) / scale

    def inverse_transform_inputs(self, u) -> np.ndarray:
        """Scaled inputs (e.g. a plan), shape (..., n_inputs), back to physical units."""
        mean, scale = self._part("inputs")
        return self._array(u, "inputs") * scale + mean

    def inverse_transform_outputs(self, y) -> np.ndarray:
        """Scaled outputs (e.g. a prediction), shape (..., n_outputs), back to physical units."""
        mean, scale = self._part("outputs")
        return self._array(y, "outputs") * scale + mean
