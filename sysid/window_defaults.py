"""Windows in time: lengths such as ``100ms``, ``0.2s`` or ``40samples``, and defaults taken from the data.

Every command that needs a past window or a horizon takes it the same way (``--past``, ``--horizon``): a length in
time (``ms`` or ``s``) is turned into samples at the session's (or model's) rate, a length in samples needs the
explicit suffix ``samples`` (a bare number is refused: at 1 kHz "10" is 10 ms, at 100 Hz 100 ms, and a reader of a
command line cannot tell which was meant).

When no window is given, :func:`default_windows` derives both from the recording: the past window covers the
outputs' memory twice, measured as their autocorrelation time (the last lag where the magnitude of the
autocorrelation of each output, linearly detrended within every valid segment, is still at least 1/e: an oscillating
output keeps its memory past its first zero; the median over output channels), and the horizon is twice the past
window (our choice, no source). Both are capped (:data:`PAST_CAP_STEPS`, :data:`HORIZON_CAP_STEPS`) because the cost of the fits
grows with the square of the window; the cap, when it applies, is stated in the text every command prints.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from .exceptions import InvalidParameterError

__all__ = ["WindowLength", "WindowDefaults", "parse_window", "samples_window", "default_windows", "resolve_windows",
           "PAST_CAP_STEPS", "HORIZON_CAP_STEPS", "MIN_STEPS"]

#: Longest automatic past window, in samples (fits grow with its square; give ``--past`` for a longer one).
PAST_CAP_STEPS = 50
#: Longest automatic horizon, in samples.
HORIZON_CAP_STEPS = 100
#: Shortest automatic window, in samples.
MIN_STEPS = 2
#: At most this many samples of each output are read to measure the autocorrelation time (evenly over segments).
_MAX_SAMPLES = 200_000

_SECONDS = {"ms": 1e-3, "s": 1.0}
_SAMPLES = ("samples", "sample")
_PATTERN = re.compile(r"^\s*([0-9]*\.?[0-9]+(?:[eE][-+]?[0-9]+)?)\s*([a-zA-Z]*)\s*$")
_HOW = "write a time (e.g. 100ms or 0.1s) or a number of samples with the suffix 'samples' (e.g. 40samples)"


@dataclass(frozen=True)
class WindowLength:
    """A window as the user wrote it: ``value`` in seconds (``unit="s"``) or in samples (``unit="samples"``).

    Attributes
    ----------
    value : float
    unit : {"s", "samples"}
    text : str
        The original spelling, for messages.
    """

    value: float
    unit: str
    text: str

    def steps(self, sample_rate_hz: float, *, option: str = "the window") -> int:
        """The window in whole samples at ``sample_rate_hz`` (a time is rounded to the nearest sample).

        Raises
        ------
        InvalidParameterError
            The window is shorter than one sample at that rate.
        """
        if self.unit == "samples":
            return int(self.value)
        n = int(round(self.value * float(sample_rate_hz)))
        if n < 1:
            raise InvalidParameterError(f"{option} {self.text} is shorter than one sample at {float(sample_rate_hz):g} "
                                        f"Hz ({1e3 / float(sample_rate_hz):.4g} ms); give a longer window.")
        return n

    def __str__(self) -> str:
        return self.text


def parse_window(text, *, option: str = "the window") -> WindowLength:
    """Read a window length: ``100ms``, ``0.1s`` or ``40samples`` (a :class:`WindowLength` is returned as is).

    Raises
    ------
    InvalidParameterError
        No unit, an unknown unit, a length that is not positive, or a fractional number of samples; the message
        names ``option`` and shows the accepted spellings.
    """
    if isinstance(text, WindowLength):
        return text
    raw = str(text).strip()
    m = _PATTERN.match(raw)
    if m is None:
        raise InvalidParameterError(f"{option}: cannot read {raw!r} as a length; {_HOW}.")
    value, unit = float(m.group(1)), m.group(2).lower()
    if not unit:
        raise InvalidParameterError(f"{option} {raw}: a bare number is ambiguous; {_HOW}.")
    if unit in _SAMPLES:
        if value != int(value) or value < 1:
            raise InvalidParameterError(f"{option} {raw}: a number of samples must be a whole number >= 1.")
        return WindowLength(float(int(value)), "samples", raw)
    if unit not in _SECONDS:
        raise InvalidParameterError(f"{option} {raw}: unknown unit {m.group(2)!r}; {_HOW}.")
    seconds = value * _SECONDS[unit]
    if not (math.isfinite(seconds) and seconds > 0):
        raise InvalidParameterError(f"{option} {raw}: a window must be longer than zero; {_HOW}.")
    return WindowLength(seconds, "s", raw)


def samples_window(n: int) -> WindowLength:
    """A window of ``n`` samples (the older ``--past-steps N`` spelling)."""
    return WindowLength(float(int(n)), "samples", f"{int(n)}samples")


@dataclass(frozen=True)
class WindowDefaults:
    """Past window and horizon derived from a recording, with how they were derived.

    Attributes
    ----------
    past_steps, horizon_steps : int
    sample_rate_hz : float
    autocorrelation_s : float or None
        The outputs' autocorrelation time (median over channels); None when no channel varies.
    capped : tuple of str
        ``"past"`` and/or ``"horizon"`` when the cap shortened them.
    """

    past_steps: int
    horizon_steps: int
    sample_rate_hz: float
    autocorrelation_s: float | None
    capped: tuple = ()

    def text(self) -> str:
        """One line saying what the defaults are, in samples and milliseconds, and where they come from."""
        r = self.sample_rate_hz
        ms = lambda n: f"{1e3 * n / r:.4g} ms"  # noqa: E731
        if self.autocorrelation_s is None:
            origin = "no output varies, so the shortest windows were taken"
        else:
            origin = (f"the outputs' autocorrelation time is {1e3 * self.autocorrelation_s:.4g} ms (median over "
                      "channels, last lag where |autocorrelation| >= 1/e); past = twice that, horizon = twice the past")
        caps = ""
        if self.capped:
            caps = (f"; capped at {PAST_CAP_STEPS} (past) and {HORIZON_CAP_STEPS} (horizon) samples, which shortened "
                    f"the {' and the '.join(self.capped)} (give --past/--horizon for longer windows)")
        return (f"windows (default, from the data): past {self.past_steps} samples ({ms(self.past_steps)}), horizon "
                f"{self.horizon_steps} samples ({ms(self.horizon_steps)}) at {r:g} Hz: {origin}{caps}.")


def _acf_segments(session, max_lag: int) -> np.ndarray | None:
    """Sum over valid segments of the lagged products of each output (detrended per segment), shape
    (max_lag + 1, p), normalised to 1 at lag 0; None when no output varies."""
    segments = [(a, b) for a, b in session.segments(min_length=max(3, max_lag + 1))]
    if not segments:
        segments = list(session.segments(min_length=3))
    if not segments:
        return None
    total = sum(b - a for a, b in segments)
    take = max(1, math.ceil(total / _MAX_SAMPLES))  # every take-th segment when the recording is long
    acc = None
    for a, b in segments[::take]:
        _, y, _ = session.read(a, b)
        y = np.asarray(y, dtype=np.float64)
        t = np.arange(y.shape[0], dtype=np.float64)
        coef = np.polynomial.polynomial.polyfit(t, y, 1)  # slow drift would stretch the autocorrelation
        r = y - (coef[0] + np.outer(t, coef[1]))
        L = min(max_lag, r.shape[0] - 1)
        n = 1 << int(np.ceil(np.log2(2 * r.shape[0])))
        f = np.fft.rfft(r, n=n, axis=0)
        c = np.fft.irfft(f * np.conj(f), n=n, axis=0)[:L + 1]
        part = np.zeros((max_lag + 1, y.shape[1]))
        part[:L + 1] = c
        acc = part if acc is None else acc + part
    zero = acc[0]
    live = zero > 1e-12 * max(float(np.max(zero)), 1e-300)
    if not live.any():
        return None
    return acc[:, live] / zero[live]


def default_windows(session) -> WindowDefaults:
    """Past window and horizon for ``session`` from its outputs' autocorrelation time, capped (see module text).

    Parameters
    ----------
    session : Session or SessionFile
        Read through ``segments()`` and ``read()`` only (a lazily opened file is not loaded whole).

    Returns
    -------
    WindowDefaults
    """
    rate = float(session.sample_rate_hz)
    acf = _acf_segments(session, 2 * HORIZON_CAP_STEPS)
    if acf is None:
        return WindowDefaults(MIN_STEPS, 2 * MIN_STEPS, rate, None)
    above = np.abs(acf) >= math.exp(-1.0)  # the envelope: an oscillating output keeps its memory past a zero
    lags = acf.shape[0] - 1 - np.argmax(above[::-1], axis=0)
    tau = float(np.median(lags))
    past = max(MIN_STEPS, int(math.ceil(2.0 * tau)))
    horizon = 2 * past
    capped = tuple(name for name, n, cap in (("past", past, PAST_CAP_STEPS), ("horizon", horizon, HORIZON_CAP_STEPS))
                   if n > cap)
    return WindowDefaults(min(past, PAST_CAP_STEPS), min(horizon, HORIZON_CAP_STEPS), rate, tau / rate, capped)


def resolve_windows(session, past=None, horizon=None, *, names=("--past", "--horizon")):
    """The past window and horizon in samples: as given (a :class:`WindowLength`, a string or a whole number of
    samples), else from :func:`default_windows`.

    Returns
    -------
    past_steps, horizon_steps : int
    note : str or None
        The defaults' :meth:`WindowDefaults.text` when either came from the data, else None.
    """
    rate = float(session.sample_rate_hz)

    def steps(value, option):
        if value is None:
            return None
        if isinstance(value, (int, np.integer)):
            return int(value)
        return parse_window(value, option=option).steps(rate, option=option)

    p, h = steps(past, names[0]), steps(horizon, names[1])
    note = None
    if p is None or h is None:
        d = default_windows(session)
        note = d.text()
        p = d.past_steps if p is None else p
        h = d.horizon_steps if h is None else h
    return p, h, note
