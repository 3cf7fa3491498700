"""What a user checks first about a session: channels, rate, trials, masked samples and gaps, bad channels.

:func:`describe_session` returns a :class:`SessionSummary` (printed by ``stimsteer inspect``) whose warnings say
what is wrong and what to do. Statistics use only valid samples inside trials.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np

from .exceptions import SessionError

__all__ = ["SessionSummary", "describe_session", "baseline_moments", "check_representable", "MAGNITUDE_LIMIT",
           "OFFSET_WARN_FRACTION"]


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
    offset_channels : tuple of (str, float, float)
        Output channels whose mean holds more than :data:`OFFSET_WARN_FRACTION` of their mean square: name, mean
        and that share (a baseline offset that models without a constant term cannot carry).
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
    offset_channels: tuple = ()
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
            "  output offsets: "
            + (", ".join(f"{n} (mean {m:.4g} {self.output_units[self.output_names.index(n)]}, {100 * f:.0f}% of "
                         "its mean square)" for n, m, f in self.offset_channels) or "none"),
        ]
        lines += ["Warnings:"] + [f"  - {w}" for w in self.warnings] if self.warnings else ["No problems found."]
        if self.notes:
            lines += ["Notes:"] + [f"  - {n}" for n in self.notes]
        return "\n".join(lines)


#: Share of an output's mean square held by its mean above which it is reported as an offset (our own threshold:
#: then a tenth of the channel's power is a constant that a model without a constant term cannot represent).
OFFSET_WARN_FRACTION = 0.1

#: Largest magnitude accepted in a session. Every route sums products of lagged samples (Gram matrices, Hankel
#: factors, KKT systems of squared blocks); at 1e100 a square is 1e200 and sums over 1e100 of them stay below
#: float64's 1.8e308 with room for the products of squared blocks, while values near 1e154 already overflow
#: (our own bound from float64's range; IEEE 754-2008). Rescale (e.g. to other units) beyond it.
MAGNITUDE_LIMIT = 1e100

#: Fewest pre-stimulation baseline samples (zero input before a trial's first stimulation) needed to judge
#: whether an output's offset is a resting level (our own threshold).
BASELINE_MIN_SAMPLES = 10


class _Baseline:
    """Sums of the outputs over pre-stimulation samples: valid samples of a trial before its first non-zero input.

    Why only those: after the first stimulation a one-signed input moves the mean of the outputs, and that part
    of the mean is the response, which a model reproduces from the inputs; removing it (centring) would make the
    model fit a shifted response. Only a resting level seen before any stimulation is an offset to remove.
    """

    def __init__(self, p: int):
        self.n, self.s1, self.s2 = 0, np.zeros(p), np.zeros(p)
        self.stimulated = False  # in the current trial

    def new_trial(self):
        self.stimulated = False

    def add(self, u, y, mask):
        if self.stimulated or not u.shape[0]:
            return
        moving = np.flatnonzero(np.any(np.asarray(u) != 0, axis=1))
        stop = int(moving[0]) if moving.size else u.shape[0]
        self.stimulated = bool(moving.size)
        yv = np.asarray(y[:stop], dtype=np.float64)[np.asarray(mask[:stop], dtype=bool)]
        self.n += yv.shape[0]
        with np.errstate(over="ignore", invalid="ignore"):  # huge values are refused after the scan
            self.s1 += yv.sum(axis=0)
            self.s2 += np.einsum("ij,ij->j", yv, yv)

    def shares(self):
        """Baseline count, mean, and mean² / mean square per output (zeros below BASELINE_MIN_SAMPLES)."""
        if self.n < BASELINE_MIN_SAMPLES:
            return self.n, np.zeros_like(self.s1), np.zeros_like(self.s1)
        mean, ms = self.s1 / self.n, self.s2 / self.n
        with np.errstate(over="ignore", invalid="ignore"):
            return self.n, mean, np.divide(mean ** 2, ms, out=np.zeros_like(ms), where=ms > 0)


def baseline_moments(source, chunk_rows: int = 65536) -> tuple[int, np.ndarray, np.ndarray]:
    """Pre-stimulation baseline of each output: sample count, mean, and ``mean² / mean square``.

    The baseline is the valid samples of each trial before its first sample with a non-zero input. With fewer than
    :data:`BASELINE_MIN_SAMPLES` such samples the mean and share are zeros (no baseline to judge by).
    """
    acc = _Baseline(int(source.n_outputs))
    for a, b in np.asarray(source.trials):
        acc.new_trial()
        for k0 in range(int(a), int(b), chunk_rows):
            if acc.stimulated:
                break
            u, y, mask = source.read(k0, min(int(b), k0 + chunk_rows))
            acc.add(np.asarray(u), y, mask)
    return acc.shares()


def _magnitude_error(what: str, value: float, names, units, where) -> SessionError:
    j = int(where)
    return SessionError(
        f"{what} '{names[j]}' reaches {value:.3g} {units[j]}, beyond the largest magnitude stimsteer can fit "
        f"({MAGNITUDE_LIMIT:.0e}): sums of squared samples would overflow float64. Rescale the channel (e.g. express "
        "it in larger units, or divide it by a constant) before inspecting or fitting."
    )


def check_representable(source, chunk_rows: int = 65536) -> None:
    """Refuse a session whose valid samples exceed :data:`MAGNITUDE_LIMIT` in magnitude (one streaming pass).

    Raises
    ------
    SessionError
        Naming the channel, the largest magnitude found and how to rescale.
    """
    m, p = int(source.n_inputs), int(source.n_outputs)
    top_u, top_y = np.zeros(m), np.zeros(p)
    for a, b in source.segments():
        for k0 in range(a, b, chunk_rows):
            u, y, _mask = source.read(k0, min(b, k0 + chunk_rows))
            top_u = np.maximum(top_u, np.abs(np.asarray(u)).max(axis=0, initial=0.0))
            top_y = np.maximum(top_y, np.abs(np.asarray(y)).max(axis=0, initial=0.0))
    _raise_if_huge(source, top_u, top_y)


def _raise_if_huge(source, top_u, top_y) -> None:
    for what, top, names, units in (("input", top_u, source.input_names, source.input_units),
                                    ("output", top_y, source.output_names, source.output_units)):
        if top.size and not np.max(top) <= MAGNITUDE_LIMIT:
            j = int(np.argmax(top))
            raise _magnitude_error(what, float(top[j]), names, units, j)


def output_moments(source, chunk_rows: int = 65536) -> tuple[int, np.ndarray, np.ndarray]:
    """Valid in-trial sample count, and each output's mean and mean square over them (one streaming pass).

    ``source`` is a Session or anything with ``segments()`` and ``read(start, stop)`` (a lazily opened file, a
    trial subset).
    """
    p = int(source.n_outputs)
    n, s1, s2 = 0, np.zeros(p), np.zeros(p)
    for a, b in source.segments():
        for k0 in range(a, b, chunk_rows):
            y = np.asarray(source.read(k0, min(b, k0 + chunk_rows))[1], dtype=np.float64)
            n += y.shape[0]
            s1 += y.sum(axis=0)
            s2 += np.einsum("ij,ij->j", y, y)
    return n, s1 / max(n, 1), s2 / max(n, 1)


class _Extremes:
    """Running minimum and maximum per channel, with how many samples equal each (merged chunk by chunk)."""

    def __init__(self, n: int):
        self.lo, self.hi = np.full(n, np.inf), np.full(n, -np.inf)
        self.n_lo, self.n_hi = np.zeros(n, dtype=np.int64), np.zeros(n, dtype=np.int64)

    def add(self, v: np.ndarray) -> None:
        if not v.shape[0]:
            return
        lo, hi = v.min(axis=0), v.max(axis=0)
        n_lo, n_hi = (v == lo).sum(axis=0), (v == hi).sum(axis=0)
        self.n_lo = np.where(lo < self.lo, n_lo, self.n_lo + np.where(lo == self.lo, n_lo, 0))
        self.n_hi = np.where(hi > self.hi, n_hi, self.n_hi + np.where(hi == self.hi, n_hi, 0))
        self.lo, self.hi = np.minimum(self.lo, lo), np.maximum(self.hi, hi)


def _masked_runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Starts and stops of the runs of masked (False) samples in a 1-D boolean array."""
    m = np.concatenate(([False], ~mask, [False])).astype(np.int8)
    edges = np.flatnonzero(np.diff(m))
    return edges[::2], edges[1::2]


def _scan(session, chunk_rows: int):
    """One pass over the trials: valid-sample counts, masked runs and the channels' extremes at valid samples."""
    ext_u, ext_y = _Extremes(session.n_inputs), _Extremes(session.n_outputs)
    base = _Baseline(session.n_outputs)
    s1, s2 = np.zeros(session.n_outputs), np.zeros(session.n_outputs)
    n_inside = n_used = 0
    gaps = []  # lengths of the masked runs inside trials

    for a, b in np.asarray(session.trials):
        run = 0  # a masked run reaching the end of the previous chunk of this trial
        base.new_trial()
        for k0 in range(int(a), int(b), chunk_rows):
            u, y, mask = session.read(k0, min(int(b), k0 + chunk_rows))
            n_inside += mask.size
            n_used += int(mask.sum())
            ext_u.add(np.asarray(u)[mask])
            y_valid = np.asarray(y, dtype=np.float64)[mask]
            ext_y.add(y_valid)
            base.add(np.asarray(u), y, mask)
            with np.errstate(over="ignore", invalid="ignore"):  # huge values are refused after the scan
                s1 += y_valid.sum(axis=0)
                s2 += np.einsum("ij,ij->j", y_valid, y_valid)
            starts, stops = _masked_runs(mask)
            lengths = [int(n) for n in stops - starts]
            if run:
                if starts.size and starts[0] == 0:
                    lengths[0] += run  # the run goes on across the chunk edge
                else:
                    gaps.append(run)
                run = 0
            if lengths and stops[-1] == mask.size:
                run = lengths.pop()
            gaps.extend(lengths)
        if run:
            gaps.append(run)
    mean, ms = s1 / max(n_used, 1), s2 / max(n_used, 1)
    with np.errstate(over="ignore", invalid="ignore"):  # huge values are refused after the scan
        share = np.divide(mean ** 2, ms, out=np.zeros_like(ms), where=ms > 0)
    return n_inside, n_used, len(gaps), max(gaps, default=0), ext_u, ext_y, (mean, share, base.shares())


def _channel_problems(session, ext_u: _Extremes, ext_y: _Extremes, n_used: int, saturation_fraction: float):
    flat, saturated, warnings = [], [], []
    sides = [("input", n, u, ext_u, j) for j, (n, u) in enumerate(zip(session.input_names, session.input_units))]
    sides += [("output", n, u, ext_y, j) for j, (n, u) in enumerate(zip(session.output_names,
                                                                       session.output_units))]
    for side, name, unit, ext, j in sides:
        if n_used == 0:
            break
        lo, hi = float(ext.lo[j]), float(ext.hi[j])
        if lo == hi:
            flat.append(name)
            why = "it excites nothing" if side == "input" else "it cannot be predicted"
            warnings.append(f"{side} '{name}' is flat (constant {lo:g} {unit} at every valid sample): {why}; drop "
                            "it or check the channel.")
            continue
        if side != "output":
            continue  # stimulation inputs sit at their levels by design; clipping is a recording problem
        counts = {"minimum": int(ext.n_lo[j]), "maximum": int(ext.n_hi[j])}
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


def describe_session(session, *, saturation_fraction: float = 0.01, masked_warning_fraction: float = 0.2,
                     chunk_samples: int = 65536) -> SessionSummary:
    """Summarise a session and flag what needs attention before fitting.

    Parameters
    ----------
    session : Session or SessionFile
        Read in one pass of windows of ``chunk_samples`` samples, so a lazily opened file larger than memory can
        be described.
    saturation_fraction : float, default 0.01
        An output is flagged as saturated when at least this fraction of its valid in-trial samples (and at
        least 2) equal its minimum or its maximum; a continuous signal has a single sample at each extreme.
    masked_warning_fraction : float, default 0.2
        Warn when more than this fraction of in-trial samples is masked.
    chunk_samples : int, default 65536

    Returns
    -------
    SessionSummary

    Raises
    ------
    SessionError
        ``session`` is neither a Session nor an opened session file, or a fraction is outside (0, 1].
    """
    needed = ("read", "trials", "n_samples", "n_inputs", "n_outputs", "sample_rate_hz", "input_names",
              "output_names", "input_units", "output_units")
    if not all(hasattr(session, a) for a in needed):
        raise SessionError(f"describe_session needs a Session or an opened session file (open_session_file); got "
                           f"{type(session).__name__}.")
    for name, f in (("saturation_fraction", saturation_fraction), ("masked_warning_fraction",
                                                                    masked_warning_fraction)):
        if not 0 < float(f) <= 1:
            raise SessionError(f"{name} must be in (0, 1]; got {f}.")
    n_inside, n_used, n_gaps, longest, ext_u, ext_y, (mean, share, base) = _scan(session, int(chunk_samples))
    if n_used:
        _raise_if_huge(session, np.maximum(np.abs(ext_u.lo), np.abs(ext_u.hi)),
                       np.maximum(np.abs(ext_y.lo), np.abs(ext_y.hi)))
    masked_fraction = float((n_inside - n_used) / max(n_inside, 1))
    flat, saturated, warnings = _channel_problems(session, ext_u, ext_y, n_used, float(saturation_fraction))
    trials = np.asarray(session.trials)
    lengths = trials[:, 1] - trials[:, 0]
    if not n_used:
        warnings.insert(0, "no valid samples inside trials: nothing can be fitted; check the mask.")
    elif masked_fraction > masked_warning_fraction:
        warnings.append(
            f"{100 * masked_fraction:.1f}% of in-trial samples are masked: fits see fewer rows and shorter "
            "segments; check the artifact window (blank_artifacts) and the missing data."
        )
    offsets = tuple((name, float(mean[j]), float(share[j])) for j, name in enumerate(session.output_names)
                    if name not in flat and share[j] > OFFSET_WARN_FRACTION)
    quiet = {}  # offsets that come with the stimulation, one note per reason
    for name, m, f in offsets:
        j = list(session.output_names).index(name)
        is_warning, text = _offset_advice(name, m, f, session.output_units[j], base, j)
        if is_warning:
            warnings.append(text)
        else:
            quiet.setdefault(text, []).append(f"'{name}' (mean {m:.4g} {session.output_units[j]}, {100 * f:.0f}% of "
                                              "its mean square)")
    notes = [(f"output {outs[0]} has a mean" if len(outs) == 1 else f"outputs {', '.join(outs)} have means")
             + f", but {why}: the mean comes with the stimulation, which the models reproduce from the inputs; "
             "centring is not advised." for why, outs in quiet.items()]
    if trials.shape[0] < 2:
        warnings.append("only 1 trial: no held-out split by trials is possible; record more trials or cut the "
                        "recording into trials.")
    return SessionSummary(
        n_samples=session.n_samples, sample_rate_hz=session.sample_rate_hz, duration_s=session.duration_s,
        input_names=session.input_names, input_units=session.input_units, output_names=session.output_names,
        output_units=session.output_units, n_trials=int(trials.shape[0]), trial_samples_min=int(lengths.min()),
        trial_samples_median=float(np.median(lengths)), trial_samples_max=int(lengths.max()),
        n_samples_outside_trials=int(session.n_samples - n_inside), masked_fraction=masked_fraction, n_gaps=n_gaps,
        longest_gap_s=longest / session.sample_rate_hz, flat_channels=flat, saturated_channels=saturated,
        offset_channels=offsets,
        warnings=tuple(warnings), notes=notes,
    )


def _offset_advice(name, mean, share, unit, base, j) -> tuple[bool, str]:
    """(True, the warning) when the pre-stimulation baseline carries the offset (then centring is advised), else
    (False, why the offset comes with the stimulation)."""
    n_base, base_mean, base_share = base
    if base_share[j] > OFFSET_WARN_FRACTION:
        return True, (f"output '{name}' rests on an offset before any stimulation (baseline mean {base_mean[j]:.4g} "
                      f"{unit} over {n_base} pre-stimulation samples; overall mean {mean:.4g} {unit}, {100 * share:.0f}"
                      "% of its mean square): fit subspace or direct models with --centre-outputs "
                      "(centre_outputs=True); ridge ARX fits an intercept of its own.")
    why = (f"the pre-stimulation baseline ({n_base} samples) rests near zero" if n_base >= BASELINE_MIN_SAMPLES
           else "no pre-stimulation baseline (zero-input samples before the first stimulation) shows a resting level")
    return False, why
