"""What a plan does to every output, targeted or not: :class:`OutputRanges` (issue 18, item 4).

A plan is judged by its targets, but its inputs reach every recorded channel. A tracking cost that weights only the
targeted outputs leaves the others free, and in the demo's direct plan an untargeted channel was predicted to swing
by more than 100 µV while the targets were 15 and −10 µV; nothing said so. This module measures, for every output,
the predicted range over the plan and its largest move from the output the plan starts from, and flags an
untargeted output whose move exceeds a stated fraction (:data:`FLAG_FRACTION`) of its recorded range.

The recorded range of an output is the span between its :data:`RANGE_PERCENTILES` percentiles over the valid
in-trial samples of the session the model was fitted on (percentiles, not the extremes, so that a few stimulation
artifacts do not widen it; our own choice, no source). When that session cannot be read the ranges are still listed
and nothing is flagged, and the summary says why.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from ...sysid.exceptions import InvalidParameterError

__all__ = ["FLAG_FRACTION", "RANGE_PERCENTILES", "OutputRanges", "check_flag_fraction", "output_ranges",
           "recorded_output_range"]

#: An untargeted output whose predicted move exceeds this fraction of its recorded range is flagged.
FLAG_FRACTION = 0.25
#: The recorded range of an output: the span between these percentiles of its valid in-trial samples.
RANGE_PERCENTILES = (1.0, 99.0)
#: At most this many samples (evenly strided over the valid segments) enter the percentiles: a bounded read.
MAX_RANGE_SAMPLES = 200_000


def recorded_output_range(source, *, max_samples: int = MAX_RANGE_SAMPLES) -> tuple[np.ndarray, np.ndarray]:
    """The :data:`RANGE_PERCENTILES` of every output over the valid in-trial samples of a session.

    Parameters
    ----------
    source : Session or SessionFile
        Read through ``segments()`` and ``read(start, stop)`` only, so a lazily opened file is read window by window.
    max_samples : int, default :data:`MAX_RANGE_SAMPLES`
        Longer sessions are strided evenly (every k-th valid sample) so that at most this many enter.

    Returns
    -------
    low, high : ndarray, shape (n_outputs,)
        In the outputs' units; NaN for an output without a finite sample.
    """
    segments = list(source.segments())
    total = sum(b - a for a, b in segments)
    stride = max(1, math.ceil(total / max(1, int(max_samples))))
    parts = []
    for a, b in segments:
        _u, y, _m = source.read(a, b)
        parts.append(np.asarray(y, dtype=np.float64)[::stride])
    if not parts:
        n = len(source.output_names)
        return np.full(n, np.nan), np.full(n, np.nan)
    y = np.concatenate(parts)
    with warnings.catch_warnings():  # an output without a finite sample gets NaN bounds, said by the summary
        warnings.simplefilter("ignore", RuntimeWarning)
        low, high = np.nanpercentile(y, RANGE_PERCENTILES, axis=0)
    return low, high


@dataclass(frozen=True)
class OutputRanges:
    """Every output's predicted range over a plan, its largest move, and the flag on untargeted outputs.

    Attributes
    ----------
    names, units : tuple of str
        Per output.
    targeted : ndarray of bool, shape (n_outputs,)
    start : ndarray, shape (n_outputs,)
        The output the plan starts from (the last sample of the past window), the outputs' units.
    predicted_min, predicted_max : ndarray, shape (n_outputs,)
        Over the plan's horizon.
    largest_move : ndarray, shape (n_outputs,)
        ``max_k |ŷ_k − start|`` over the horizon.
    recorded_low, recorded_high : ndarray, shape (n_outputs,)
        The recorded range (:data:`RANGE_PERCENTILES`); NaN when unknown.
    flag_fraction : float
    flagged : ndarray of bool, shape (n_outputs,)
        Untargeted and ``largest_move > flag_fraction × (recorded_high − recorded_low)``.
    recorded_from : str
        Where the recorded range came from, or why it is unknown.
    """

    names: tuple
    units: tuple
    targeted: np.ndarray
    start: np.ndarray
    predicted_min: np.ndarray
    predicted_max: np.ndarray
    largest_move: np.ndarray
    recorded_low: np.ndarray
    recorded_high: np.ndarray
    flag_fraction: float
    flagged: np.ndarray
    recorded_from: str

    @property
    def move_share(self) -> np.ndarray:
        """``largest_move`` as a fraction of the recorded range (NaN where the range is unknown or empty)."""
        width = self.recorded_high - self.recorded_low
        with np.errstate(all="ignore"):
            return np.where(width > 0, self.largest_move / width, np.nan)

    def to_dict(self) -> dict:
        """JSON-ready: the rule, where the recorded range came from, one record per output, the flagged names."""
        share = self.move_share
        rows = [{"name": n, "unit": u, "targeted": bool(t), "start": _num(s), "predicted_min": _num(lo),
                 "predicted_max": _num(hi), "largest_move": _num(mv), "recorded_low": _num(rl),
                 "recorded_high": _num(rh), "move_share_of_recorded_range": _num(sh), "flagged": bool(f)}
                for n, u, t, s, lo, hi, mv, rl, rh, sh, f in zip(
                    self.names, self.units, self.targeted, self.start, self.predicted_min, self.predicted_max,
                    self.largest_move, self.recorded_low, self.recorded_high, share, self.flagged)]
        return {"rule": self.rule(), "recorded_range_from": self.recorded_from, "flag_fraction": self.flag_fraction,
                "outputs": rows, "flagged": [n for n, f in zip(self.names, self.flagged) if f]}

    def rule(self) -> str:
        """The flag rule in words, with the fraction and the percentiles."""
        return (f"an untargeted output is flagged when its largest predicted move from the plan's start exceeds "
                f"{100 * self.flag_fraction:g} % of its recorded range ({_percentiles_text()} of its valid in-trial "
                "samples)")

    def lines(self) -> list[str]:
        """Console lines: one per output (range, move, share of the recorded range), then the warning."""
        share = self.move_share
        width = max(len(f"{n} [{u}]") for n, u in zip(self.names, self.units))
        out = [f"every output over the plan (moves from the plan's start; recorded range = {_percentiles_text()} "
               f"of {self.recorded_from}; flagged = untargeted and moving more than {100 * self.flag_fraction:g} % "
               "of it):"]
        for j, (n, u) in enumerate(zip(self.names, self.units)):
            role = "target" if self.targeted[j] else "      "
            text = (f"  {f'{n} [{u}]':<{width}}  {role}  {self.predicted_min[j]:9.4g} .. {self.predicted_max[j]:<9.4g}"
                    f" moves {self.largest_move[j]:.4g}")
            if np.isfinite(share[j]):
                text += f" = {100 * share[j]:.0f} % of recorded {self.recorded_high[j] - self.recorded_low[j]:.4g}"
            out.append(text + ("  <- FLAGGED" if self.flagged[j] else ""))
        flagged = [f"{n} ({100 * s:.0f} %)" for n, s, f in zip(self.names, share, self.flagged) if f]
        if flagged:
            out.append(f"warning: {len(flagged)} untargeted output(s) move beyond {100 * self.flag_fraction:g} % of "
                       f"their recorded range: {', '.join(flagged)}. Add them to the target (name=value) to hold "
                       "them, or bound them in the limits file ([outputs.NAME] min/max).")
        return out


def check_flag_fraction(flag_fraction) -> None:
    """Refuse a flag fraction that is not a positive finite number (InvalidParameterError naming the option)."""
    try:
        ok = math.isfinite(float(flag_fraction)) and float(flag_fraction) > 0
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise InvalidParameterError(f"the flag fraction (--flag-fraction) must be a positive number, e.g. "
                                    f"{FLAG_FRACTION} for a quarter of the recorded range; got {flag_fraction!r}.")


def output_ranges(plan, start, *, units=None, targeted=None, recorded=None, recorded_from="",
                  flag_fraction: float = FLAG_FRACTION) -> OutputRanges:
    """Measure every output of a plan against its start and its recorded range.

    Parameters
    ----------
    plan : Plan
    start : array_like, shape (n_outputs,)
        The output before the plan (the last row of the past window given to the controller).
    units : sequence of str, optional
    targeted : array_like of bool, shape (n_outputs,), optional
        Default: none targeted.
    recorded : (low, high), optional
        From :func:`recorded_output_range`; without it nothing is flagged.
    recorded_from : str
        Where ``recorded`` came from (or why it is missing), for the summary.
    flag_fraction : float, default :data:`FLAG_FRACTION`
        Must be positive.

    Returns
    -------
    OutputRanges
    """
    check_flag_fraction(flag_fraction)
    y = np.asarray(plan.predicted_outputs, dtype=np.float64)
    p = y.shape[1]
    y0 = np.asarray(start, dtype=np.float64).reshape(p)
    tracked = np.zeros(p, bool) if targeted is None else np.asarray(targeted, bool).reshape(p)
    low, high = (np.full(p, np.nan), np.full(p, np.nan)) if recorded is None else \
        (np.asarray(recorded[0], float).reshape(p), np.asarray(recorded[1], float).reshape(p))
    move = np.max(np.abs(y - y0), axis=0)
    with np.errstate(invalid="ignore"):
        flagged = ~tracked & (move > float(flag_fraction) * (high - low))
    return OutputRanges(names=tuple(plan.output_names), units=tuple(units or ("a.u.",) * p), targeted=tracked,
                        start=y0, predicted_min=y.min(axis=0), predicted_max=y.max(axis=0), largest_move=move,
                        recorded_low=low, recorded_high=high, flag_fraction=float(flag_fraction),
                        flagged=flagged, recorded_from=str(recorded_from or "nowhere: unknown"))


def _percentiles_text() -> str:
    lo, hi = RANGE_PERCENTILES
    return f"{_ordinal(lo)} to {_ordinal(hi)} percentile"


def _ordinal(v: float) -> str:
    n = int(v)
    if n != v:
        return f"{v:g}th"
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def _num(v):
    v = float(v)
    return v if math.isfinite(v) else None
