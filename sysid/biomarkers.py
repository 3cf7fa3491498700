"""Biomarker outputs that labs steer: band-power envelopes, binned spike rates, and line-noise removal.

Band-power envelope
-------------------
``P(t) = L[(B x)²](t)``: the signal ``x`` is band-passed by ``B`` (Butterworth, ``order``, the declared band), squared
(the rectification: power, no Hilbert transform), and smoothed by ``L`` (Butterworth low-pass of order 2 at
``smoothing_hz``). For a sinusoid of amplitude ``A`` at a frequency ``f`` well inside the band the envelope settles at
``A² |H_B(f)|² / 2`` (unit²); ``sqrt(2 P)`` is its amplitude. ``phase="causal"`` runs both filters forward only
(``scipy.signal.sosfilt``, what an online system computes, with the filters' delay); ``phase="zero-phase"`` runs
them forward and backward (``scipy.signal.sosfiltfilt``: no delay, squared magnitude). The choice is required and
recorded.

Binned spike rate
-----------------
The count of spikes in each model sample period ``[t_k, t_k + 1/rate)`` divided by the period: spikes per second.

Line noise
----------
A cascade of second-order notch filters (``scipy.signal.iirnotch``, quality factor ``quality``) at the line
frequency and its harmonics below Nyquist, causal or zero-phase.

A derived output keeps its unit (``"<unit>^2"`` for a band power, ``"Hz"`` for a rate) and its recipe in
``metadata["derived_outputs"][name]``; filtering runs per valid in-trial segment, from rest, so nothing leaks
across a trial boundary or a masked sample.
"""

from __future__ import annotations

import math

import numpy as np

from .exceptions import SessionError
from .session import Session
from ._lazy import lazy_module

signal = lazy_module("scipy.signal")  # imported at its first use (sysid/_lazy.py)

__all__ = ["PHASES", "band_power_envelope", "binned_spike_rate", "remove_line_noise", "add_band_power_outputs",
           "envelope_filters"]

#: The two filtering choices, with what each means (recorded with every derived output).
PHASES = {
    "causal": "forward only (scipy.signal.sosfilt): what an online system computes, with the filters' delay",
    "zero-phase": "forward and backward (scipy.signal.sosfiltfilt): no delay, magnitude squared; offline only",
}


def _check_phase(phase) -> str:
    if phase not in PHASES:
        raise SessionError(f"phase must be chosen explicitly among {sorted(PHASES)}; got {phase!r}. 'causal' "
                           "matches what a closed loop computes online, 'zero-phase' has no delay but needs the "
                           "future.")
    return phase


def envelope_filters(sample_rate_hz: float, band_hz, *, order: int = 4,
                     smoothing_hz: float | None = None) -> tuple[np.ndarray, np.ndarray, dict]:
    """The band-pass and smoothing filters of :func:`band_power_envelope`, as second-order sections.

    Returns
    -------
    band_sos, smooth_sos : ndarray
    recipe : dict
        The settings, in plain numbers.

    Raises
    ------
    SessionError
        A band not inside ``(0, Nyquist)``, a bad order or smoothing frequency.
    """
    rate = float(sample_rate_hz)
    band = np.asarray(band_hz, dtype=np.float64).reshape(-1)
    nyq = rate / 2.0
    if band.shape != (2,) or not (0 < band[0] < band[1] < nyq):
        raise SessionError(f"band_hz must be (low, high) with 0 < low < high < Nyquist {nyq:g} Hz; got "
                           f"{np.asarray(band_hz).tolist()}.")
    if not isinstance(order, (int, np.integer)) or isinstance(order, bool) or order < 1:
        raise SessionError(f"order must be a positive whole number; got {order!r}.")
    smooth = float(smoothing_hz) if smoothing_hz is not None else float(min(band[1] - band[0], band[0]) / 2.0)
    if not (0 < smooth < nyq):
        raise SessionError(f"smoothing_hz must lie in (0, {nyq:g}) Hz; got {smooth}.")
    band_sos = signal.butter(order, band, btype="bandpass", fs=rate, output="sos")
    smooth_sos = signal.butter(2, smooth, btype="lowpass", fs=rate, output="sos")
    recipe = {"kind": "band_power", "band_hz": band.tolist(), "order": int(order), "smoothing_hz": smooth,
              "definition": "lowpass_smoothing((bandpass(x))^2); Butterworth band-pass, squared, Butterworth "
                            "order-2 low-pass"}
    return band_sos, smooth_sos, recipe


def _apply(sos, x: np.ndarray, phase: str) -> np.ndarray:
    return signal.sosfilt(sos, x, axis=0) if phase == "causal" else signal.sosfiltfilt(sos, x, axis=0)


_CHUNK = 1 << 16  # samples per window of a causal pass (its filter state is carried from window to window)


def _filter_into(stages, x: np.ndarray, out: np.ndarray, phase: str, cols=None) -> None:
    """``out[:] = stage_k(... stage_1(x[:, cols]))`` for one segment, from rest (``cols`` None: every column). ``stages`` are ``(sos, then)`` pairs:
    filter by ``sos``, then apply ``then`` (a function, or None). Causal passes run in windows of :data:`_CHUNK`
    samples carrying each filter's state (the same numbers as one pass over the segment); zero-phase passes need
    the whole segment, so they run one channel at a time."""
    if phase == "causal":
        cols = list(range(x.shape[1])) if cols is None else list(cols)
        zi = [np.zeros((sos.shape[0], 2, len(cols))) for sos, _ in stages]
        for c0 in range(0, x.shape[0], _CHUNK):
            w = np.asarray(x[c0:c0 + _CHUNK][:, cols], dtype=np.float64)
            for k, (sos, then) in enumerate(stages):
                w, zi[k] = signal.sosfilt(sos, w, axis=0, zi=zi[k])
                w = then(w) if then is not None else w
            out[c0:c0 + _CHUNK] = w
        return
    for i, j in enumerate(range(x.shape[1]) if cols is None else cols):
        w = np.asarray(x[:, j], dtype=np.float64)
        for sos, then in stages:
            w = signal.sosfiltfilt(sos, w)
            w = then(w) if then is not None else w
        out[:, i] = w


def band_power_envelope(x, *, sample_rate_hz: float, band_hz, phase: str, order: int = 4,
                        smoothing_hz: float | None = None) -> np.ndarray:
    """Band-power envelope of each column (see the module docstring).

    Parameters
    ----------
    x : array_like, shape (n_samples,) or (n_samples, n_channels)
    sample_rate_hz : float
    band_hz : (float, float)
    phase : {"causal", "zero-phase"}
        Required: no default, the choice changes what the envelope means.
    order : int, default 4
        Butterworth order of the band-pass (per pass).
    smoothing_hz : float, optional
        Cut-off of the smoothing low-pass; default half the smaller of the band width and the low edge.

    Returns
    -------
    ndarray, same shape as ``x``
        Power in the band, in the unit of ``x`` squared.
    """
    phase = _check_phase(phase)
    band_sos, smooth_sos, _ = envelope_filters(sample_rate_hz, band_hz, order=order, smoothing_hz=smoothing_hz)
    x = np.asarray(x, dtype=np.float64)
    return _apply(smooth_sos, _apply(band_sos, x, phase) ** 2, phase)


def binned_spike_rate(spike_times_s, *, sample_rate_hz: float, n_samples: int,
                      start_time_s: float = 0.0) -> np.ndarray:
    """Spikes per second in each model sample period ``[t_k, t_k + 1/rate)``, shape (n_samples,)."""
    t = np.asarray(spike_times_s, dtype=np.float64).reshape(-1)
    if not np.all(np.isfinite(t)):
        raise SessionError("spike times must be finite seconds; found NaN or infinite values.")
    k = np.floor((t - start_time_s) * sample_rate_hz + 1e-9).astype(np.int64)
    k = k[(k >= 0) & (k < n_samples)]
    return np.bincount(k, minlength=int(n_samples)).astype(np.float64) * float(sample_rate_hz)


def _notch_sos(sample_rate_hz: float, line_hz: float, harmonics: int, quality: float) -> tuple[np.ndarray, list]:
    nyq = sample_rate_hz / 2.0
    if not (0 < line_hz < nyq):
        raise SessionError(f"line_hz must lie in (0, Nyquist {nyq:g}) Hz; got {line_hz}.")
    if not isinstance(harmonics, (int, np.integer)) or harmonics < 1:
        raise SessionError(f"harmonics must be a positive whole number; got {harmonics!r}.")
    if not (math.isfinite(quality) and quality > 0):
        raise SessionError(f"quality must be a positive number; got {quality}.")
    freqs = [line_hz * h for h in range(1, harmonics + 1) if line_hz * h < nyq]
    sos = np.vstack([signal.tf2sos(*signal.iirnotch(f, quality, fs=sample_rate_hz)) for f in freqs])
    return sos, freqs


def remove_line_noise(session: Session, *, line_hz: float, phase: str, harmonics: int = 3,
                      quality: float = 30.0) -> Session:
    """Notch the line frequency and its harmonics out of the outputs, per valid in-trial segment.

    Returns
    -------
    Session
        Outputs filtered; inputs untouched; ``metadata["prep"]`` records the frequencies, quality and phase.
    """
    if not isinstance(session, Session):
        raise SessionError(f"remove_line_noise needs a Session; got {type(session).__name__}.")
    phase = _check_phase(phase)
    sos, freqs = _notch_sos(session.sample_rate_hz, float(line_hz), harmonics, float(quality))
    y = np.array(session.y)
    for a, b in session.segments():
        if phase == "zero-phase" and b - a <= 3 * (2 * sos.shape[0] + 1):
            continue  # too short to pad for a forward-backward pass; left as recorded (recorded below)
        _filter_into([(sos, None)], y[a:b], y[a:b], phase)
    y.setflags(write=False)  # a new array: the session takes it without a copy
    step = {"step": "remove_line_noise", "line_hz": float(line_hz), "frequencies_hz": freqs,
            "quality": float(quality), "phase": phase, "phase_means": PHASES[phase]}
    meta = {**session.metadata, "prep": list(session.metadata.get("prep", [])) + [step]}
    return session.replace(y=y, metadata=meta)


def add_band_power_outputs(session: Session, *, channels, band_hz, phase: str, names=None, order: int = 4,
                           smoothing_hz: float | None = None, keep_source: bool = True) -> Session:
    """Add (or substitute) band-power envelopes of output channels as new outputs.

    Parameters
    ----------
    session : Session
    channels : str or sequence of str
        Output channels to take the envelope of.
    band_hz, phase, order, smoothing_hz
        As in :func:`band_power_envelope`.
    names : sequence of str, optional
        Names of the new outputs; default ``<channel>_power_<low>-<high>Hz``.
    keep_source : bool, default True
        Keep the source channels beside the envelopes; False replaces them.

    Returns
    -------
    Session
        Envelopes computed per valid in-trial segment from rest (zero elsewhere), unit ``<unit>^2``; the recipe
        in ``metadata["derived_outputs"][name]``.
    """
    phase = _check_phase(phase)
    chans = [channels] if isinstance(channels, str) else list(channels)
    missing = [c for c in chans if c not in session.output_names]
    if missing or not chans:
        raise SessionError(f"outputs {missing or chans} are not output channels; the session has "
                           f"{list(session.output_names)}.")
    band_sos, smooth_sos, recipe = envelope_filters(session.sample_rate_hz, band_hz, order=order,
                                                    smoothing_hz=smoothing_hz)
    lo, hi = recipe["band_hz"]
    names = list(names) if names is not None else [f"{c}_power_{lo:g}-{hi:g}Hz" for c in chans]
    cols = [session.output_names.index(c) for c in chans]
    keep = [j for j in range(session.n_outputs) if keep_source or j not in cols]
    y = np.zeros((session.n_samples, len(keep) + len(cols)))  # the new outputs, filled in place
    for i, j in enumerate(keep):
        y[:, i] = session.y[:, j]
    env = y[:, len(keep):]
    for a, b in session.segments():
        if phase == "zero-phase" and b - a <= 3 * (2 * band_sos.shape[0] + 1):
            continue
        _filter_into([(band_sos, np.square), (smooth_sos, None)], session.y[a:b], env[a:b], phase, cols)
    y.setflags(write=False)
    derived = dict(session.metadata.get("derived_outputs", {}))
    for c, j, n in zip(chans, cols, names):
        derived[n] = {**recipe, "source": c, "phase": phase, "phase_means": PHASES[phase],
                      "unit": f"{session.output_units[j]}^2"}
    return session.replace(
        y=y,
        output_names=tuple(session.output_names[j] for j in keep) + tuple(names),
        output_units=tuple(session.output_units[j] for j in keep) + tuple(derived[n]["unit"] for n in names),
        metadata={**session.metadata, "derived_outputs": derived})
