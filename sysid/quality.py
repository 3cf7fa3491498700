"""What a user checks first about a session: channels, rate, trials, masked samples and gaps, bad channels.

:func:`describe_session` returns a :class:`SessionSummary` (printed by ``stimsteer inspect``) whose warnings say
what is wrong and what to do. Statistics use only valid samples inside trials.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from .exceptions import SessionError
from .session import Session

__all__ = ["SessionSummary", "describe_session"]


@dataclass(frozen=True)
class SessionSummary:
    """A session's vital signs, as computed by :func:`describe_session`.

    Attributes
    ----------
    n_samples : int
    sample_rate_hz, duration_s : float
    input_names, input_units, output_names, output_units : tuple of str
    n_trials : int
    trial_samples_min, trial_samples_max : int
    trial_samples_median : float
    n_samples_outside_trials : int
    masked_fraction : float
        Fraction of in-trial samples that are masked.
    n_gaps : int
        Runs of masked samples inside trials.
    longest_gap_s : float
        Length of the longest such run in seconds (0 without gaps).
    flat_channels : tuple of str
        Channels without any variation at the valid in-trial samples.
    saturated_channels : tuple of (str, float)
        Output channels with a large fraction of valid samples at their minimum or maximum, with that fraction.
    warnings : tuple of str
        One line per problem, each saying what to do.
    notes : list of str
        Further remarks added by other checks (e.g. the excitation order of the inputs).
    """

    n_samples: int
    sample_rate_hz: float
    duration_s: float
    input_names: tuple
    input_units: tuple
    output_names: tuple
    output_units: tuple
    n_trials: int
    trial_samples_min: int
    trial_samples_median: float
    trial_samples_max: int
    n_samples_outside_trials: int
    masked_fraction: float
    n_gaps: int
    longest_gap_s: float
    flat_channels: tuple = ()
    saturated_channels: tuple = ()
    warnings: tuple = ()
    notes: list = field(default_factory=list)

    @property
    def trial_seconds(self) -> tuple[float, float, float]:
        """Trial length (min, median, max) in seconds."""
        r = self.sample_rate_hz
        return self.trial_samples_min / r, self.trial_samples_median / r, self.trial_samples_max / r

    def to_dict(self) -> dict:
        """Plain JSON-ready values (lists instead of tuples), plus the trial lengths in seconds."""
        d = asdict(self)
        for k, v in d.items():
            if isinstance(v, tuple):
                d[k] = [list(x) if isinstance(x, tuple) else x for x in v]
        d["trial_seconds_min"], d["trial_seconds_median"], d["trial_seconds_max"] = self.trial_seconds
        return d

    def to_text(self) -> str:
        """A short human-readable report (what ``stimsteer inspect`` prints)."""
        def chans(names, units):
            return ", ".join(f"{n} [{u}]" for n, u in zip(names, units)) or "none"

        smin, smed, smax = self.trial_seconds
        lines = [
            f"Session: {self.n_samples} samples at {self.sample_rate_hz:g} Hz = {self.duration_s:.3f} s",
            f"  inputs ({len(self.input_names)}): {chans(self.input_names, self.input_units)}",
            f"  outputs ({len(self.output_names)}): {chans(self.output_names, self.output_units)}",
            f"  trials: {self.n_trials}; length min {self.trial_samples_min} / median {self.trial_samples_median:g}"
            f" / max {self.trial_samples_max} samples ({smin:.3f} / {smed:.3f} / {smax:.3f} s); "
            f"{self.n_samples_outside_trials} samples outside trials",
            f"  masked: {100 * self.masked_fraction:.1f}% of in-trial samples; gaps: {self.n_gaps}"
            + (f", longest {self.longest_gap_s:.3f} s" if self.n_gaps else ""),
            f"  flat channels: {', '.join(self.flat_channels) or 'none'}",
            "  saturated channels: "
            + (", ".join(f"{n} ({100 * f:.1f}% at an extreme)" for n, f in self.saturated_channels) or "none"),
        ]
        lines += ["Warnings:"] + [f"  - {w}" for w in self.warnings] if self.warnings else ["No problems found."]
        if self.notes:
            lines += ["Notes:"] + [f"  - {n}" for n in self.notes]
        return "\n".join(lines)


def _runs(flags: np.ndarray) -> np.ndarray:
    """Lengths of the runs of True in a 1-D boolean array."""
    m = np.concatenate(([False], flags, [False])).astype(np.int8)
    edges = np.flatnonzero(np.diff(m))
    return edges[1::2] - edges[::2]


def _gaps(session: Session) -> tuple[int, int]:
    lengths = [_runs(~w.mask) for w in session.iter_trials()]
    lengths = np.concatenate(lengths) if lengths else np.zeros(0, dtype=np.int64)
    return int(lengths.size), int(lengths.max()) if lengths.size else 0


def _channel_problems(session: Session, used: np.ndarray, saturation_fraction: float):
    flat, saturated, warnings = [], [], []
    n_used = int(used.sum())
    sides = [("input", n, u, session.u[:, j]) for j, (n, u) in enumerate(zip(session.input_names,
                                                                            session.input_units))]
    sides += [("output", n, u, session.y[:, j]) for j, (n, u) in enumerate(zip(session.output_names,
                                                                              session.output_units))]
    for side, name, unit, x in sides:
        if n_used == 0:
            break
        v = x[used]
        lo, hi = float(v.min()), float(v.max())
        if lo == hi:
            flat.append(name)
            why = "it excites nothing" if side == "input" else "it cannot be predicted"
            warnings.append(f"{side} '{name}' is flat (constant {lo:g} {unit} at every valid sample): {why}; drop "
                            "it or check the channel.")
            continue
        if side != "output":
            continue  # stimulation inputs sit at their levels by design; clipping is a recording problem
        counts = {"minimum": int((v == lo).sum()), "maximum": int((v == hi).sum())}
        edge, count = max(counts.items(), key=lambda kv: kv[1])
        if count >= 2 and count >= saturation_fraction * n_used:
            saturated.append((name, count / n_used))
            value = lo if edge == "minimum" else hi
            warnings.append(
                f"output '{name}' sits at its {edge} ({value:g} {unit}) in {100 * count / n_used:.1f}% of valid "
                "samples: probably clipped by the recording range; mask those samples or re-record with a larger "
                "range."
            )
    return tuple(flat), tuple(saturated), warnings


def describe_session(session: Session, *, saturation_fraction: float = 0.01,
                     masked_warning_fraction: float = 0.2) -> SessionSummary:
    """Summarise a session and flag what needs attention before fitting.

    Parameters
    ----------
    session : Session
    saturation_fraction : float, default 0.01
        An output is flagged as saturated when at least this fraction of its valid in-trial samples (and at
        least 2) equal its minimum or its maximum; a continuous signal has a single sample at each extreme.
    masked_warning_fraction : float, default 0.2
        Warn when more than this fraction of in-trial samples is masked.

    Returns
    -------
    SessionSummary

    Raises
    ------
    SessionError
        ``session`` is not a Session, or a fraction is outside (0, 1].
    """
    if not isinstance(session, Session):
        raise SessionError(f"describe_session needs a Session; got {type(session).__name__}.")
    for name, f in (("saturation_fraction", saturation_fraction), ("masked_warning_fraction",
                                                                    masked_warning_fraction)):
        if not 0 < float(f) <= 1:
            raise SessionError(f"{name} must be in (0, 1]; got {f}.")
    inside = session._in_trial()
    used = session.mask & inside
    n_gaps, longest = _gaps(session)
    flat, saturated, warnings = _channel_problems(session, used, float(saturation_fraction))
    lengths = session.trial_lengths
    if not used.any():
        warnings.insert(0, "no valid samples inside trials: nothing can be fitted; check the mask.")
    elif session.masked_fraction > masked_warning_fraction:
        warnings.append(
            f"{100 * session.masked_fraction:.1f}% of in-trial samples are masked: fits see fewer rows and shorter "
            "segments; check the artifact window (blank_artifacts) and the missing data."
        )
    if session.n_trials < 2:
        warnings.append("only 1 trial: no held-out split by trials is possible; record more trials or cut the "
                        "recording into trials.")
    return SessionSummary(
        n_samples=session.n_samples, sample_rate_hz=session.sample_rate_hz, duration_s=session.duration_s,
        input_names=session.input_names, input_units=session.input_units, output_names=session.output_names,
        output_units=session.output_units, n_trials=session.n_trials, trial_samples_min=int(lengths.min()),
        trial_samples_median=float(np.median(lengths)), trial_samples_max=int(lengths.max()),
        n_samples_outside_trials=int((~inside).sum()), masked_fraction=session.masked_fraction, n_gaps=n_gaps,
        longest_gap_s=longest / session.sample_rate_hz, flat_channels=flat, saturated_channels=saturated,
        warnings=tuple(warnings),
    )
