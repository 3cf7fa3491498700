"""The four signal families of a schedule's trials (pulses, PRBS, multilevel, multisine) inside amplitude bounds.

Each generator returns the in-trial signal of every trial for :func:`stimsteer.control.schedule.design_schedule`,
which then applies the slew projection, the energy budget and the final checks. The kinds are described in the
docstring of :mod:`stimsteer.control.schedule`.
"""

from __future__ import annotations

import math

import numpy as np

from ..sysid import ExcitationError, InvalidParameterError, LimitsError, crest_factor, multisine
from ..sysid._mls import max_length_sequence  # the values of sysid.max_length_sequence, without scipy.signal
from ..sysid.signals import MAX_MLS_BITS

__all__ = ["SCHEDULE_KINDS", "design_kind", "whole", "positive"]

SCHEDULE_KINDS = ("pulses", "prbs", "multilevel", "multisine")


def whole(name, v, low) -> int:
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer, float)) or not float(v).is_integer() \
            or int(v) < low:
        raise InvalidParameterError(f"{name} must be a whole number >= {low}; got {v!r}.")
    return int(v)


def positive(name, v, allow_zero=False) -> float:
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise InvalidParameterError(f"{name} must be a number; got {v!r}.") from None
    if not np.isfinite(x) or x < 0 or (x == 0 and not allow_zero):
        raise InvalidParameterError(f"{name} must be {'>= 0' if allow_zero else 'positive'} and finite; got {v!r}.")
    return x




def _pulses(n_steps, lo, hi, slew, base, rng, *, rate, pulse_rate_hz, min_interval_steps):
    m = lo.size
    a_lo = lo if slew is None else np.maximum(lo, base - slew)
    a_hi = hi if slew is None else np.minimum(hi, base + slew)
    mean = rate / float(pulse_rate_hz)
    if not np.isfinite(mean) or mean < min_interval_steps:
        raise InvalidParameterError(
            f"pulse_rate_hz {pulse_rate_hz:g} is too high for a minimum inter-pulse interval of {min_interval_steps} "
            f"samples at {rate:g} Hz; give pulse_rate_hz <= {rate / min_interval_steps:g}."
        )
    p = 1.0 / (mean - min_interval_steps + 1.0)
    u = np.tile(base, (n_steps, 1))
    n_draw = int(n_steps / mean * 1.5) + 16
    for j in range(m):
        gaps = min_interval_steps + rng.geometric(p, size=n_draw) - 1
        t = int(rng.integers(0, max(int(mean), 1))) + np.concatenate([[0], np.cumsum(gaps[:-1])])
        t = t[t < n_steps]
        u[t, j] = rng.uniform(a_lo[j], a_hi[j], size=t.size)
    return u


def _prbs(n_steps, lo, hi, slew, base, rng, *, hold_steps):
    m = lo.size
    n_bits = -(-n_steps // hold_steps)
    need = m * n_bits
    nbits = int(np.clip(math.ceil(math.log2(need + 1)), 5, MAX_MLS_BITS))
    bits = max_length_sequence(nbits, seed=rng, length=need).reshape(m, n_bits).T
    s = np.repeat(bits, hold_steps, axis=0)[:n_steps]
    mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
    if slew is not None:  # a jump must be reachable within one held bit; the final slew pass makes the ramps
        half = np.minimum(half, 0.5 * slew * hold_steps)
    return mid + half * s


def _multilevel(n_steps, lo, hi, slew, base, rng, *, n_levels, hold_steps):
    m = lo.size
    if isinstance(n_levels, bool) or int(n_levels) != n_levels or n_levels < 2:
        raise InvalidParameterError(f"n_levels must be a whole number >= 2; got {n_levels!r}.")
    n_levels = int(n_levels)
    spacing = (hi - lo) / (n_levels - 1)
    reach = np.full(m, n_levels - 1) if slew is None else np.minimum(np.floor(slew / spacing * (1 + 1e-12)),
                                                                      n_levels - 1).astype(np.int64)
    if np.any(reach < 1):
        j = int(np.flatnonzero(reach < 1)[0])
        raise LimitsError(
            f"input {j}: the slew limit {slew[j]:g} per step is smaller than the level spacing {spacing[j]:g} of "
            f"{n_levels} levels, so the sequence could never move. Use more levels (n_levels >= "
            f"{int(math.ceil((hi[j] - lo[j]) / slew[j])) + 1}) or another kind."
        )
    n_bits = -(-n_steps // hold_steps)
    idx = np.empty((n_bits, m), dtype=np.int64)
    cur = np.rint((base - lo) / spacing).astype(np.int64)
    draws = rng.random((n_bits, m))
    for t in range(n_bits):
        a, b = np.maximum(cur - reach, 0), np.minimum(cur + reach, n_levels - 1)
        cur = a + np.minimum((draws[t] * (b - a + 1)).astype(np.int64), b - a)
        idx[t] = cur
    return lo + spacing * np.repeat(idx, hold_steps, axis=0)[:n_steps]


def _multisine_block(P, harmonic_sets, rng, n_iter):
    return np.column_stack([multisine(P, k, seed=rng, n_iter=n_iter) for k in harmonic_sets])


def _multisine_trials(n_trials, P, lo, hi, slew, rng, *, rate, band_hz, order, n_iter):
    m = lo.size
    top = P // 2 if P % 2 else P // 2 - 1
    kmax = top if band_hz is None else min(top, int(math.floor(float(band_hz) * P / rate)))
    sets = [np.arange(j + 1, kmax + 1, m) for j in range(m)]
    need = -(-order // 2)
    fewest = min(s.size for s in sets)
    if fewest < need:
        band = "the Nyquist frequency" if band_hz is None else f"{float(band_hz):g} Hz"
        raise ExcitationError(
            f"a multisine on trials of {P} samples up to {band} gives {fewest} harmonics per input for {m} inputs, "
            f"but order {order} needs {need} per input (2 orders per sinusoid). Lengthen the trials, widen the "
            "band, or use fewer inputs or another kind."
        )
    x = np.stack([_multisine_block(P, sets, rng, n_iter) for _ in range(n_trials)])  # (trials, P, m)
    cf = crest_factor(x.reshape(-1, m))
    mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
    if slew is not None:
        steepest = np.max(np.abs(np.diff(x, axis=1)), axis=(0, 1))
        half = np.minimum(half, np.divide(slew, steepest, out=np.full(m, np.inf), where=steepest > 0))
    return mid + half * x, cf, [s.tolist() for s in sets]



def design_kind(kind, n_trials, trial_n, lo, hi, slew, base, rng, *, rate, hold, n_levels, pulse_rate_hz,
                 min_interval_steps, band_hz, order, n_iter):
    """The in-trial signal of every trial, shape (n_trials, trial_n, m), and the kind's settings."""
    total = n_trials * trial_n
    m = lo.size
    if kind == "pulses":
        rate_p = rate / 5.0 if pulse_rate_hz is None else positive("pulse_rate_hz", pulse_rate_hz)
        gap = whole("min_interval_steps", min_interval_steps, 1)
        u = _pulses(total, lo, hi, slew, base, rng, rate=rate, pulse_rate_hz=rate_p, min_interval_steps=gap)
        return u.reshape(n_trials, trial_n, m), {"pulse_rate_hz": rate_p, "min_interval_steps": gap}
    if kind == "prbs":
        u = _prbs(total, lo, hi, slew, base, rng, hold_steps=hold)
        return u.reshape(n_trials, trial_n, m), {"hold_steps": hold}
    if kind == "multilevel":
        u = _multilevel(total, lo, hi, slew, base, rng, n_levels=n_levels, hold_steps=hold)
        return u.reshape(n_trials, trial_n, m), {"hold_steps": hold, "n_levels": int(n_levels)}
    band = None if band_hz is None else positive("band_hz", band_hz)
    u, cf, sets = _multisine_trials(n_trials, trial_n, lo, hi, slew, rng, rate=rate, band_hz=band, order=order,
                                    n_iter=whole("n_iter", n_iter, 1))
    return u, {"band_hz": band, "harmonics": sets, "crest_factor": cf.tolist(), "period_samples": trial_n}
