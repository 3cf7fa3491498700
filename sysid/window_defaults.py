"""Windows in time: lengths such as ``100ms``, ``0.2s`` or ``40samples``, and defaults taken from the data.

Every command that needs a past window or a horizon takes it the same way (``--past``, ``--horizon``): a length in
time (``ms`` or ``s``) is turned into samples at the session's (or model's) rate, a length in samples needs the
explicit suffix ``samples`` (a bare number is refused: at 1 kHz "10" is 10 ms, at 100 Hz 100 ms, and a reader of a
command line cannot tell which was meant).

When no window is given, :func:`default_windows` derives both from the recording's memory: a quick ridge ARX
(:data:`QUICK_LAGS` output and input lags, least squares on at most 20,000 rows inside valid segments) is fitted and
its impulse response from every input to every output is followed until its envelope stays below
:data:`IMPULSE_FRACTION` of its peak; the past window and the horizon both cover that time (the impulse length of a
quick ARX, the rule the newcomer issue proposed; no other source). A session without inputs falls back on the
outputs' autocorrelation time. Both are capped (:data:`PAST_CAP_STEPS`, :data:`HORIZON_CAP_STEPS`, and
:data:`ROWS_CAP` for ``(past + horizon) x channels``) because the cost of the fits grows with the square of the
window; the cap, when it applies, is stated in the line every command prints.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from .exceptions import InvalidParameterError

__all__ = ["WindowLength", "WindowDefaults", "parse_window", "samples_window", "default_windows", "resolve_windows",
           "PAST_CAP_STEPS", "HORIZON_CAP_STEPS", "ROWS_CAP", "MIN_STEPS"]

#: Longest automatic past window, in samples (fits grow with its square; give ``--past`` for a longer one).
PAST_CAP_STEPS = 50
#: Longest automatic horizon, in samples.
HORIZON_CAP_STEPS = 100
#: Largest automatic ``(past + horizon) x (inputs + outputs)``: the rows of the direct route's Hankel matrix, whose
#: fit grows with their square (a session of 20 channels gets at most 60 samples of past plus horizon).
ROWS_CAP = 1200
#: Shortest automatic window, in samples.
MIN_STEPS = 2
#: Lags of the quick ARX whose impulse response measures the recording's memory.
QUICK_LAGS = 10
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
    option : str
        The command-line flag it came from, when it did.
    """

    value: float
    unit: str
    text: str
    option: str = ""  # the flag it came from, for messages ("--past-steps" keeps its older spelling)

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


def samples_window(n: int, option: str = "") -> WindowLength:
    """A window of ``n`` samples (the older ``--past-steps N`` spelling, named by ``option``)."""
    return WindowLength(float(int(n)), "samples", str(int(n)) if option else f"{int(n)}samples", option)


@dataclass(frozen=True)
class WindowDefaults:
    """Past window and horizon derived from a recording, with how they were derived.

    Attributes
    ----------
    past_steps, horizon_steps : int
    sample_rate_hz : float
    memory_s : float or None
        The recording's memory in seconds (see ``source``); None when no output varies.
    source : str
        ``"quick ARX impulse response"`` or ``"output autocorrelation"`` (a session without inputs).
    capped : tuple of str
        ``"past"`` and/or ``"horizon"`` when the cap shortened them.
    """

    past_steps: int
    horizon_steps: int
    sample_rate_hz: float
    memory_s: float | None
    source: str = "quick ARX impulse response"
    capped: tuple = ()

    def text(self, past_steps: int | None = None, horizon_steps: int | None = None) -> str:
        """One line saying what the windows are, in samples and milliseconds, and where the defaults come from;
        ``past_steps``/``horizon_steps`` are windows that were given instead (then said so)."""
        r = self.sample_rate_hz
        ms = lambda n: f"{1e3 * n / r:.4g} ms"  # noqa: E731
        shown = {"past": (self.past_steps if past_steps is None else past_steps, past_steps is not None),
                 "horizon": (self.horizon_steps if horizon_steps is None else horizon_steps,
                             horizon_steps is not None)}
        parts = ", ".join(f"{k} {n} samples ({ms(n)}{', as given' if given else ''})" for k, (n, given) in
                          shown.items())
        if self.memory_s is None:
            origin = "no output varies, so the shortest windows were taken"
        elif self.source == "output autocorrelation":
            origin = (f"without inputs, the outputs' autocorrelation time, {1e3 * self.memory_s:.4g} ms (median over "
                      "channels, last lag where |autocorrelation| >= 1/e), twice for the past window and four times "
                      "for the horizon")
        else:
            origin = (f"the impulse response of a quick ARX ({QUICK_LAGS} lags) stays above "
                      f"{IMPULSE_FRACTION:.0%} of its peak for {1e3 * self.memory_s:.4g} ms; both windows cover that")
        caps = ""
        if self.capped:
            caps = (f"; capped at {PAST_CAP_STEPS} (past) and {HORIZON_CAP_STEPS} (horizon) samples and at "
                    f"{ROWS_CAP} for (past + horizon) x channels, which shortened the {' and the '.join(self.capped)}"
                    " (fits grow with the square of the window; give --past/--horizon for longer windows)")
        given = [k for k, (_, g) in shown.items() if g]
        head = ("default, from the data" if not given else
                "as given" if len(given) == 2 else
                f"{given[0]} as given, {'horizon' if given[0] == 'past' else 'past'} from the data")
        return f"windows ({head}): {parts} at {r:g} Hz: {origin}{caps}."


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
        peak = np.max(np.abs(r), axis=0)
        r = r / np.where(peak > 0, peak, 1.0)  # no overflow; the autocorrelation does not depend on the scale
        L = min(max_lag, r.shape[0] - 1)
        n = 1 << int(np.ceil(np.log2(2 * r.shape[0])))
        f = np.fft.rfft(r, n=n, axis=0)
        c = np.fft.irfft(f * np.conj(f), n=n, axis=0)[:L + 1]
        part = np.zeros((max_lag + 1, y.shape[1]))
        part[:L + 1] = c
        acc = part if acc is None else acc + part
    zero = acc[0]
    if not np.all(np.isfinite(acc)):
        return None
    live = zero > 1e-12 * max(float(np.max(zero)), 1e-300)
    if not live.any():
        return None
    return acc[:, live] / zero[live]


#: The quick ARX's impulse response has settled when its envelope stays below this fraction of its peak.
IMPULSE_FRACTION = 0.1
#: Rows of the quick ARX's regression, at most (evenly over segments).
_MAX_ROWS = 20_000


def _quick_arx_memory(session, lags: int) -> int | None:
    """Samples until the impulse response of a quick ridge ARX (``lags`` output and input lags) stays below
    :data:`IMPULSE_FRACTION` of its peak, over every input-output pair; None when it cannot be fitted."""
    m, p = int(session.n_inputs), int(session.n_outputs)
    segs = list(session.segments(min_length=lags + 2))
    if m == 0 or not segs:
        return None
    rows = sum(b - a - lags for a, b in segs)
    take = max(1, math.ceil(rows / _MAX_ROWS))
    blocks = []
    for a, b in segs[::take]:
        u, y, _ = session.read(a, b)
        blocks.append((np.array(u, float), np.array(y, float)))
    # each channel divided by its largest magnitude: the impulse length does not depend on units, and sums of
    # squares of huge values (refused later, by name, by the magnitude check) must not overflow here
    su = np.max([np.max(np.abs(u), axis=0) for u, _ in blocks], axis=0)
    sy = np.max([np.max(np.abs(y), axis=0) for _, y in blocks], axis=0)
    su, sy = np.where(su > 0, su, 1.0), np.where(sy > 0, sy, 1.0)
    X, Y = [], []
    for u, y in blocks:
        u, y = u / su, y / sy
        y = y - y.mean(axis=0)  # an offset per segment, not dynamics
        n = y.shape[0] - lags
        X.append(np.hstack([y[lags - i:lags - i + n] for i in range(1, lags + 1)]
                           + [u[lags - i:lags - i + n] for i in range(1, lags + 1)]))
        Y.append(y[lags:])
    X, Y = np.vstack(X), np.vstack(Y)
    if X.shape[0] < X.shape[1]:
        return None
    G = X.T @ X
    G[np.diag_indices_from(G)] += 1e-6 * np.trace(G) / G.shape[0]  # a light ridge: lags are collinear
    try:
        theta = np.linalg.solve(G, X.T @ Y)
    except np.linalg.LinAlgError:
        return None
    Ay, Bu = theta[:p * lags].T.reshape(p, lags, p), theta[p * lags:].T.reshape(p, lags, m)
    T = 4 * HORIZON_CAP_STEPS
    h = np.zeros((T, p, m))
    for k in range(1, T):  # impulse at step 0 on every input: y[k] = sum_i A_i y[k-i] + B_k u[0]
        acc = Bu[:, k - 1, :].copy() if k <= lags else np.zeros((p, m))
        for i in range(1, min(k, lags) + 1):
            acc += Ay[:, i - 1, :] @ h[k - i]
        h[k] = acc
    env = np.abs(h).max(axis=(1, 2))
    if not np.all(np.isfinite(env)) or env.max() <= 0:
        return None
    return int(np.flatnonzero(env >= IMPULSE_FRACTION * env.max())[-1])


def default_windows(session) -> WindowDefaults:
    """Past window and horizon for ``session`` from its memory, capped (see the module text).

    Parameters
    ----------
    session : Session or SessionFile
        Read through ``segments()`` and ``read()`` only (a lazily opened file is not loaded whole).

    Returns
    -------
    WindowDefaults
    """
    rate = float(session.sample_rate_hz)
    with np.errstate(all="ignore"):  # a recording beyond float64's comfort is refused by name elsewhere
        return _default_windows(session, rate)


def _default_windows(session, rate) -> WindowDefaults:
    memory = _quick_arx_memory(session, QUICK_LAGS)
    if memory is not None:
        past = horizon = max(MIN_STEPS, memory)
        tau, source = memory / rate, "quick ARX impulse response"
    else:
        acf = _acf_segments(session, 2 * HORIZON_CAP_STEPS)
        if acf is None:
            return WindowDefaults(MIN_STEPS, MIN_STEPS, rate, None, "output autocorrelation")
        above = np.abs(acf) >= math.exp(-1.0)  # the envelope: an oscillating output keeps its memory past a zero
        lags = acf.shape[0] - 1 - np.argmax(above[::-1], axis=0)
        steps = float(np.median(lags))
        past = max(MIN_STEPS, int(math.ceil(2.0 * steps)))
        horizon, tau, source = 2 * past, steps / rate, "output autocorrelation"
    capped = tuple(name for name, n, cap in (("past", past, PAST_CAP_STEPS), ("horizon", horizon, HORIZON_CAP_STEPS))
                   if n > cap)
    past, horizon = min(past, PAST_CAP_STEPS), min(horizon, HORIZON_CAP_STEPS)
    channels = int(session.n_inputs) + int(session.n_outputs)
    if (past + horizon) * channels > ROWS_CAP:  # many channels: keep the direct route's Hankel matrix tractable
        scale = ROWS_CAP / ((past + horizon) * channels)
        past, horizon = max(MIN_STEPS, int(past * scale)), max(MIN_STEPS, int(horizon * scale))
        capped = ("past", "horizon")
    return WindowDefaults(past, horizon, rate, tau, source, capped)


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
        note = d.text(p, h)
        p = d.past_steps if p is None else p
        h = d.horizon_steps if h is None else h
    return p, h, note
