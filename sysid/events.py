"""Trials from events, trigger channels and pulse tables; pulse tables onto the model grid; two clocks aligned.

Trials
------
:func:`trials_from_events` opens a window ``[t − before_s, t + after_s)`` around each event time ``t`` (seconds on
the recording clock) and turns it into a half-open sample range of the model grid: sample ``k`` (time
``t0 + k / rate``) belongs to the window when ``t − before_s <= t_k < t + after_s``. Windows that reach outside the
recording are dropped and reported; overlapping windows are merged (or the later one dropped) and reported. Events
come from annotations or event tables (:func:`select_events`, matching labels), from a trigger channel
(:func:`trigger_times`: rising crossings of a threshold) or from a pulse table (the first pulse of each train).

Pulse tables
------------
With a stimulation description (``encode_pulses(..., stimulation=...)``) pulses go onto the grid by its declared
mapping (:mod:`stimsteer.sysid.stimulation`: non-negative amplitudes or charge rates of pulse trains at fixed width
and frequency, polarity a category, every pulse checked for overlap and charge balance, units through pint), and
the mapping with the description is recorded in ``metadata["pulse_mapping"]`` (and ``metadata["stimulation"]`` by
the caller). Without one, the older onset mapping :data:`PULSE_MAPPING` is kept for tables that carry no widths or
frequencies: each pulse puts its amplitude, in the table's unit, on the model sample that holds its onset; several
pulses of one site in one sample keep the largest magnitude; samples without a pulse are 0. It cannot say what a
sample means physically (no width, no frequency, a sign for polarity): plans made on such inputs cannot be checked
in physical terms, so declare a description for new recordings.

Two clocks
----------
:func:`align_channel` moves a series from its own clock and rate onto the model grid. The clocks are related by a
declared offset (``t_model = t_source + offset_s``). Anti-aliasing is stated and recorded: ``"fir"`` is
``scipy.signal.resample_poly`` (a Kaiser-window FIR low-pass, β = 5, at the lower of the two Nyquist frequencies)
followed by linear interpolation onto the grid's sample times; ``"mean"`` averages the source samples inside each
model sample period ``[t_k, t_k + 1 / rate)`` (for stimulation series: the mean current, so the charge is kept);
``"none"`` takes the nearest earlier source sample. Model samples outside the source's span are reported, and two
clocks that do not overlap at all are an error.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from fractions import Fraction

import numpy as np

from .exceptions import SessionError
from ._lazy import lazy_module

signal = lazy_module("scipy.signal")  # imported at its first use (sysid/_lazy.py)

__all__ = ["PULSE_MAPPING", "TrialWindows", "trials_from_events", "select_events", "trigger_times",
           "encode_pulses", "pulse_train_onsets", "ClockAlignment", "align_channel", "ANTI_ALIASING"]

#: The declared mapping of recorded pulses to model inputs (recorded in ``metadata["pulse_mapping"]``).
PULSE_MAPPING = {
    "name": "onset-amplitude",
    "rule": "each pulse puts its amplitude on the model sample holding its onset (t0 + k / rate <= t < t0 + "
            "(k + 1) / rate); several pulses of one site in one sample keep the largest magnitude; other samples "
            "are 0",
    "source": "stimsteer.sysid.events (onset mapping of tables without a stimulation description; see "
              "stimsteer.sysid.stimulation for the declared mappings in physical terms)",
}

#: The anti-aliasing choices of :func:`align_channel`, each with the sentence recorded in provenance.
ANTI_ALIASING = {
    "fir": "scipy.signal.resample_poly (Kaiser-window FIR low-pass, beta 5, cut at the lower Nyquist frequency), "
           "then linear interpolation onto the model sample times",
    "mean": "mean of the source samples inside each model sample period [t_k, t_k + 1/rate)",
    "none": "nearest earlier source sample, no anti-aliasing filter",
}
_SAME_RATE = "same rate: the source samples as they are (nearest earlier sample for a fractional offset)"


# ==================================================================================================== trials
@dataclass(frozen=True)
class TrialWindows:
    """Trials built from event times, with what was dropped or merged.

    Attributes
    ----------
    trials : ndarray of int, shape (n_trials, 2)
        Half-open sample ranges on the model grid, sorted and disjoint.
    event_times_s : ndarray, shape (n_events,)
        The event times used, sorted (seconds, recording clock).
    before_s, after_s : float
    out_of_range : list of float
        Event times whose window reaches outside the recording (dropped).
    overlaps : list of (float, float)
        Pairs of event times whose windows overlapped.
    overlap : str
        What was done with overlapping windows (``"merge"`` or ``"drop"``).
    """

    trials: np.ndarray
    event_times_s: np.ndarray
    before_s: float
    after_s: float
    out_of_range: list = field(default_factory=list)
    overlaps: list = field(default_factory=list)
    overlap: str = "merge"

    def to_dict(self) -> dict:
        """JSON-ready record (for ``metadata["trials_from_events"]``)."""
        return {"n_events": int(self.event_times_s.size), "n_trials": int(self.trials.shape[0]),
                "before_s": self.before_s, "after_s": self.after_s, "overlap": self.overlap,
                "out_of_range_s": [float(t) for t in self.out_of_range],
                "overlapping_s": [[float(a), float(b)] for a, b in self.overlaps]}

    def to_text(self) -> str:
        """One line for a command's output."""
        text = (f"{self.trials.shape[0]} trials from {self.event_times_s.size} events, window "
                f"-{self.before_s:g} s to +{self.after_s:g} s")
        if self.out_of_range:
            text += f"; {len(self.out_of_range)} window(s) outside the recording dropped (events at " + ", ".join(
                f"{t:.3f}" for t in self.out_of_range[:5]) + (" ..." if len(self.out_of_range) > 5 else "") + " s)"
        if self.overlaps:
            text += f"; {len(self.overlaps)} overlapping pair(s) " + ("merged" if self.overlap == "merge" else
                                                                     "resolved by dropping the later window")
        return text


def _check_window(before_s, after_s) -> tuple[float, float]:
    try:
        before_s, after_s = float(before_s), float(after_s)
    except (TypeError, ValueError):
        raise SessionError(f"before_s and after_s must be numbers of seconds; got {before_s!r}, {after_s!r}.") from None
    if not (math.isfinite(before_s) and math.isfinite(after_s)) or before_s + after_s <= 0:
        raise SessionError(f"the trial window [-before_s, +after_s) must have a positive finite length; got "
                           f"before_s={before_s}, after_s={after_s}.")
    return before_s, after_s


def trials_from_events(event_times_s, *, sample_rate_hz: float, n_samples: int, start_time_s: float = 0.0,
                       before_s: float, after_s: float, overlap: str = "merge") -> TrialWindows:
    """Trials ``[t − before_s, t + after_s)`` around event times, on the model grid.

    Parameters
    ----------
    event_times_s : array_like, shape (n_events,)
        Event times in seconds on the recording clock.
    sample_rate_hz : float
        Rate of the model grid.
    n_samples : int
        Length of the model grid.
    start_time_s : float, default 0.0
        Time of sample 0.
    before_s, after_s : float
        The window around each event, in seconds (``before_s`` may be negative to start after the event).
    overlap : {"merge", "drop"}, default "merge"
        Overlapping windows become one trial (``"merge"``) or the later window is dropped (``"drop"``).

    Returns
    -------
    TrialWindows

    Raises
    ------
    SessionError
        No events, a bad window, an unknown ``overlap``, or every window outside the recording.
    """
    before_s, after_s = _check_window(before_s, after_s)
    if overlap not in ("merge", "drop"):
        raise SessionError(f"overlap must be 'merge' or 'drop'; got {overlap!r}.")
    times = np.sort(np.asarray(event_times_s, dtype=np.float64).reshape(-1))
    if times.size == 0 or not np.all(np.isfinite(times)):
        raise SessionError("no (finite) event times to open trials from; check the event labels or the trigger "
                           "threshold in the description.")
    rate = float(sample_rate_hz)
    # sample k is in [a, b) when a <= t_k; the small tolerance keeps an event exactly on a sample on it
    a = np.ceil((times - before_s - start_time_s) * rate - 1e-6).astype(np.int64)
    b = np.ceil((times + after_s - start_time_s) * rate - 1e-6).astype(np.int64)
    inside = (a >= 0) & (b <= n_samples) & (b > a)
    out_of_range = times[~inside].tolist()
    if not inside.any():
        end = start_time_s + n_samples / rate
        raise SessionError(f"every trial window falls outside the recording [{start_time_s:g}, {end:g}) s (events "
                           f"from {times[0]:.3f} to {times[-1]:.3f} s, window -{before_s:g} to +{after_s:g} s); "
                           "check the window and the clock offset.")
    trials, overlaps, kept = _resolve_overlaps(a[inside], b[inside], times[inside], overlap)
    return TrialWindows(np.array(trials, dtype=np.int64), np.asarray(kept), before_s, after_s, out_of_range,
                        overlaps, overlap)


def _resolve_overlaps(a, b, times, overlap):
    trials, overlaps, kept = [[int(a[0]), int(b[0])]], [], [float(times[0])]
    last_time = float(times[0])
    for x, z, t in zip(a[1:], b[1:], times[1:]):
        if x < trials[-1][1]:
            overlaps.append((last_time, float(t)))
            if overlap == "merge":
                trials[-1][1] = max(trials[-1][1], int(z))
                kept.append(float(t))
            last_time = float(t)
            continue
        trials.append([int(x), int(z)])
        kept.append(float(t))
        last_time = float(t)
    return trials, overlaps, kept


def select_events(events, labels) -> np.ndarray:
    """Times (s) of the events whose label (or its last part after ``/``) is one of ``labels``.

    Raises
    ------
    SessionError
        No event matches; the message lists the labels the recording has.
    """
    labels = [labels] if isinstance(labels, str) else [str(x) for x in labels]
    # a label also matches by its last part after "/" (MNE reads BrainVision markers as "Comment/<label>")
    times = [float(e["time_s"]) for e in events
             if str(e["label"]) in labels or str(e["label"]).rsplit("/", 1)[-1] in labels]
    if not times:
        have = sorted({str(e["label"]) for e in events})
        raise SessionError(f"no event matches the labels {labels}; the recording has "
                           f"{have if have else 'no events at all'}. Fix the labels in the description.")
    return np.sort(np.asarray(times))


def trigger_times(x, *, sample_rate_hz: float, threshold: float, start_time_s: float = 0.0,
                  min_interval_s: float = 0.0) -> np.ndarray:
    """Times (s) where a trigger channel crosses ``threshold`` upwards (previous sample below, this one at or above).

    ``min_interval_s`` ignores crossings closer than that to the previous kept one (a bouncing trigger).

    Raises
    ------
    SessionError
        A non-finite threshold, or no crossing (the message gives the channel's range).
    """
    x = np.asarray(x, dtype=np.float64).reshape(-1)
    threshold = float(threshold)
    if not math.isfinite(threshold):
        raise SessionError(f"the trigger threshold must be finite; got {threshold}.")
    above = x >= threshold
    k = np.flatnonzero(above[1:] & ~above[:-1]) + 1
    if k.size == 0:
        lo, hi = (float(np.nanmin(x)), float(np.nanmax(x))) if x.size else (float("nan"), float("nan"))
        raise SessionError(f"the trigger channel never rises through {threshold:g} (its values span {lo:g} to "
                           f"{hi:g}); set a threshold inside that range.")
    times = start_time_s + k / float(sample_rate_hz)
    if min_interval_s > 0:
        keep, last = [], -np.inf
        for t in times:
            if t - last >= min_interval_s:
                keep.append(t)
                last = t
        times = np.asarray(keep)
    return times


# ==================================================================================================== pulses
def pulse_train_onsets(times_s, *, gap_s: float) -> np.ndarray:
    """The first pulse of each train: pulses more than ``gap_s`` after the previous one (and the very first)."""
    t = np.sort(np.asarray(times_s, dtype=np.float64).reshape(-1))
    if t.size == 0:
        return t
    return t[np.concatenate(([True], np.diff(t) > gap_s))]


def encode_pulses(pulses, sites, *, sample_rate_hz: float, n_samples: int, start_time_s: float = 0.0,
                  offset_s: float = 0.0, stimulation=None) -> tuple[np.ndarray, dict]:
    """Pulse events onto the model grid by :data:`PULSE_MAPPING`, or by a description's mapping (one column per site).

    Parameters
    ----------
    pulses : sequence of dict
        Each with ``time_s`` (pulse onset on the stimulation clock), ``site`` and ``amplitude``.
    sites : sequence of str
        The input channels, in order; pulses of other sites are an error.
    sample_rate_hz, n_samples, start_time_s
        The model grid.
    offset_s : float, default 0.0
        Stimulation clock to model clock: ``t_model = time_s + offset_s``.
    stimulation : StimulationDescription, optional
        Encode by its declared mapping (:func:`stimsteer.sysid.stimulation.encode_pulse_table`); its sites must be
        ``sites``, in order.

    Returns
    -------
    u : ndarray, shape (n_samples, n_sites)
    record : dict
        The mapping, the number of pulses placed and of pulses outside the grid (dropped).

    Raises
    ------
    SessionError
        A pulse of an undeclared site, a non-finite time or amplitude, or no pulse on the grid at all.
    """
    sites = list(sites)
    if stimulation is not None:
        return _encode_described(pulses, sites, stimulation, sample_rate_hz, n_samples, start_time_s, offset_s)
    u = np.zeros((int(n_samples), len(sites)))
    unknown = sorted({str(p["site"]) for p in pulses} - set(sites))
    if unknown:
        raise SessionError(f"the pulse table names sites {unknown} that are not declared inputs {sites}; declare "
                           "them under [channels] inputs or remove those pulses.")
    t = np.array([float(p["time_s"]) for p in pulses]) + offset_s
    amp = np.array([float(p["amplitude"]) for p in pulses])
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(amp))):
        raise SessionError("the pulse table holds non-finite times or amplitudes; fix or remove those rows.")
    k = np.floor((t - start_time_s) * sample_rate_hz + 1e-9).astype(np.int64)
    on = (k >= 0) & (k < n_samples)
    if pulses and not on.any():
        raise SessionError(f"no pulse falls on the recording: pulses span {t.min():.3f} to {t.max():.3f} s on the "
                           f"model clock, the recording {start_time_s:g} to "
                           f"{start_time_s + n_samples / sample_rate_hz:g} s. Check the clock offset.")
    col = np.array([sites.index(str(p["site"])) for p in pulses], dtype=np.int64)
    for kk, j, a in zip(k[on], col[on], amp[on]):
        if abs(a) > abs(u[kk, j]):
            u[kk, j] = a
    record = {**PULSE_MAPPING, "n_pulses": int(on.sum()), "n_pulses_off_grid": int((~on).sum()),
              "offset_s": float(offset_s)}
    return u, record


def _encode_described(pulses, sites, stimulation, rate, n_samples, start_time_s, offset_s):
    from .stimulation import InputMapping, StimulationDescription, encode_pulse_table

    if list(stimulation.names) != sites:
        missing = [s for s in sites if s not in stimulation.names]
        if missing or len(sites) != len(stimulation.names):
            raise SessionError(f"the stimulation description declares sites {list(stimulation.names)}, the inputs "
                               f"are {sites}; describe each input site once.")
        stimulation = StimulationDescription(sites=tuple(stimulation.site(s) for s in sites),
                                             mapping=stimulation.mapping)
    return encode_pulse_table(pulses, InputMapping(stimulation, rate), n_samples=n_samples,
                              start_time_s=start_time_s, offset_s=offset_s)


# ==================================================================================================== clocks
@dataclass(frozen=True)
class ClockAlignment:
    """How one channel was moved onto the model grid (recorded in ``metadata["clock_alignment"]``)."""

    channel: str
    source_rate_hz: float
    target_rate_hz: float
    offset_s: float
    anti_aliasing: str
    n_outside: int
    overlap_s: tuple

    def to_dict(self) -> dict:
        return {"channel": self.channel, "source_rate_hz": self.source_rate_hz,
                "target_rate_hz": self.target_rate_hz, "offset_s": self.offset_s,
                "anti_aliasing": self.anti_aliasing,
                "method": (_SAME_RATE if self.source_rate_hz == self.target_rate_hz
                           else ANTI_ALIASING[self.anti_aliasing]),
                "n_samples_outside_source": self.n_outside, "overlap_s": list(self.overlap_s)}


#: Model samples aligned per window by :func:`align_channel` (the source is read one window, plus the filter's
#: reach, at a time: a long recording is never loaded whole).
ALIGN_WINDOW_SAMPLES = 1 << 16


def align_channel(data, *, source_rate_hz: float, source_start_s: float, target_rate_hz: float,
                  target_start_s: float, n_target: int, offset_s: float = 0.0, anti_aliasing: str = "fir",
                  name: str = "channel", out: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, ClockAlignment]:
    """A series from its own clock and rate onto the model grid (see the module docstring).

    ``data`` is an array or a lazily read channel (anything with ``shape`` and ``read(start, stop)``, such as
    :class:`~stimsteer.sysid.io._recording.LazySamples`). The grid is filled :data:`ALIGN_WINDOW_SAMPLES` samples
    at a time from the source samples that window needs (with the anti-aliasing filter's reach on either side, the
    source window starting on a multiple of the resampling ratio's denominator), so the result equals the
    whole-series computation (to rounding) while the memory used beyond ``out`` stays bounded.

    Parameters
    ----------
    out : ndarray, shape (n_target,), optional
        Where to write the values (a column of the session being built); a new array otherwise.

    Returns
    -------
    values : ndarray, shape (n_target,)
        NaN where the model grid lies outside the source's span (``out`` when given).
    covered : ndarray of bool, shape (n_target,)
    alignment : ClockAlignment

    Raises
    ------
    SessionError
        Unknown anti-aliasing, or the two clocks' spans do not overlap.
    """
    if anti_aliasing not in ANTI_ALIASING:
        raise SessionError(f"anti_aliasing must be one of {sorted(ANTI_ALIASING)}; got {anti_aliasing!r}.")
    n_src = int(data.shape[0]) if hasattr(data, "read") else int(np.asarray(data).reshape(-1).size)
    fs, ft = float(source_rate_hz), float(target_rate_hz)
    s0 = float(source_start_s) + float(offset_s)  # source start on the model clock
    s1, t1 = s0 + n_src / fs, target_start_s + n_target / ft
    lo, hi = max(s0, target_start_s), min(s1, t1)
    if hi <= lo:
        raise SessionError(f"the clocks of '{name}' and the model grid do not overlap: '{name}' spans "
                           f"[{s0:g}, {s1:g}) s on the model clock (offset {offset_s:g} s), the grid "
                           f"[{target_start_s:g}, {t1:g}) s. Check the clock offset.")
    values = np.full(n_target, np.nan) if out is None else out
    values[:] = np.nan
    covered = np.zeros(n_target, dtype=bool)
    margin, step = _reach(fs, ft, anti_aliasing)
    for g0 in range(0, n_target, ALIGN_WINDOW_SAMPLES):
        g1 = min(n_target, g0 + ALIGN_WINDOW_SAMPLES)
        tk = target_start_s + np.arange(g0, g1) / ft
        cov = (tk >= s0 - 1e-9) & (tk < s1 - 1e-9)
        covered[g0:g1] = cov
        if not cov.any():
            continue
        rel = tk[cov] - s0
        i0 = max(0, math.floor(rel[0] * fs) - margin)
        i0 -= i0 % step
        i1 = min(n_src, math.ceil(rel[-1] * fs) + margin + 1)
        values[g0:g1][cov] = _resampled(_source_window(data, i0, i1), fs, ft, rel - i0 / fs, anti_aliasing)
    # at equal rates no filter runs, whatever was asked: record what was done
    align = ClockAlignment(name, fs, ft, float(offset_s), "none" if fs == ft else anti_aliasing,
                           int((~covered).sum()), (lo, hi))
    return values, covered, align


def _source_window(data, start: int, stop: int) -> np.ndarray:
    if hasattr(data, "read"):
        return np.asarray(data.read(start, stop), dtype=np.float64).reshape(-1)
    return np.asarray(np.asarray(data).reshape(-1)[start:stop], dtype=np.float64)


def _reach(fs: float, ft: float, how: str) -> tuple[int, int]:
    """Source samples needed beyond a window's first and last model sample, and the step the source window's start
    must fall on (the FIR route's output samples line up with the whole series' only from a multiple of ``down``)."""
    if how == "none" or fs == ft:
        return 2, 1
    if how == "mean":
        return int(math.ceil(fs / ft)) + 2, 1
    ratio = Fraction(ft / fs).limit_denominator(1000)
    up, down = ratio.numerator, ratio.denominator
    # resample_poly's filter has 10·max(up, down) taps each side at the upsampled rate; linear interpolation onto
    # the grid needs one more output sample (down / up source samples) on either side
    return int(math.ceil((10 * max(up, down) + 2 * down) / up)) + 2, down


def _resampled(x, fs: float, ft: float, rel_t: np.ndarray, how: str) -> np.ndarray:
    if how == "none" or fs == ft:
        k = np.clip(np.floor(rel_t * fs + 1e-6).astype(np.int64), 0, x.size - 1)
        return x[k]
    if how == "mean":
        a = np.clip(np.ceil(rel_t * fs - 1e-6).astype(np.int64), 0, x.size)
        b = np.clip(np.ceil((rel_t + 1.0 / ft) * fs - 1e-6).astype(np.int64), 0, x.size)
        b = np.maximum(b, np.minimum(a + 1, x.size))
        c = np.concatenate(([0.0], np.cumsum(x)))
        return (c[b] - c[a]) / np.maximum(b - a, 1)
    ratio = Fraction(ft / fs).limit_denominator(1000)
    y = signal.resample_poly(x, ratio.numerator, ratio.denominator)
    ty = np.arange(y.size) * ratio.denominator / (fs * ratio.numerator)
    return np.interp(rel_t, ty, y)
