"""Stimulation schedules for the next session: exciting inputs inside declared bounds, trials and rests laid out.

A schedule is the input side of a session still to be recorded: per electrode (input), a sequence of amplitudes
on the model's sample grid, grouped into trials separated by rests. It is designed so that

* it never leaves the declared bounds: amplitude ``lo <= u <= hi`` and slew ``|u[k] - u[k-1]| <= slew`` per input
  (also across rests, and from the rest level before the session), and an optional energy budget on every window;
* its trials together are persistently exciting of the order the user plans for (``order >= Tini + N + n``:
  past window + horizon + a guess of the state dimension), checked on the (mosaic) input Hankel matrix with the
  rank rule of :mod:`stimsteer.sysid.excitation`.

Kinds
-----
``"pulses"``
    Per electrode, single-sample pulses with random amplitudes and random inter-pulse intervals (a minimum interval
    plus an exponential part), the rest level in between.
``"prbs"``
    Binary pseudo-random sequences: disjoint stretches of one maximum-length sequence
    (:func:`scipy.signal.max_len_seq`) per input, each bit held ``hold_steps`` samples, on two levels: the
    amplitude bounds, narrowed symmetrically to ``slew · hold_steps`` apart when a jump between them could not be
    made within one held bit; under a slew limit the switches are ramps at the limit (a trapezoidal sequence).
``"multilevel"``
    Pseudo-random multilevel sequences: a random walk over ``n_levels`` evenly spaced levels, each held
    ``hold_steps`` samples, moving only between levels the slew limit allows.
``"multisine"``
    Sums of sinusoids on the harmonics of the trial length with random phases and a flat amplitude spectrum, each
    input on its own interleaved set of harmonics (so the inputs are uncorrelated), crest factor reduced by
    iterative clipping (Van der Ouderaa, Schoukens, Renneboog 1988). Fresh phases in every trial.

The rest level of input ``j`` is ``clip(0, lo_j, hi_j)`` (no stimulation when the bounds allow it).

Schedule files
--------------
CSV, the column syntax of the session table layout of :mod:`stimsteer.sysid.io` without output columns:
``time [s] @ <rate> Hz``, ``trial`` (trial label, ``-1`` in rests) and ``in:<name> [<unit>]`` per input; one row
per sample. :func:`load_schedule` reads it back (a session table is accepted too: its input side is read).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import scipy.signal as ssig

from ._files import atomic_path
from ._headers import CHANNEL_RE as _CHANNEL_RE, TIME_RE as _TIME_RE
from .exceptions import ExcitationError, FileFormatError, InfeasiblePlanError, LimitsError, SessionError
from .excitation import DEFAULT_TOL_FACTOR, rank_tolerance
from .caution import CAUTION
from .io import comment_lines
from .session import _TrialLayout
from .hankel import hankel_column_count, row_space_factor

__all__ = [
    "SCHEDULE_KINDS",
    "ExcitationCheck",
    "Schedule",
    "design_schedule",
    "verify_excitation",
    "max_length_sequence",
    "multisine",
    "crest_factor",
    "save_schedule",
    "load_schedule",
]

SCHEDULE_KINDS = ("pulses", "prbs", "multilevel", "multisine")

# At least this many trials, so a held-out split (25 %) keeps one trial and cross-validation has folds.
_MIN_TRIALS = 4
# Automatic trial count: the mosaic Hankel gets at least this many columns per row (a margin over the
# minimum of one, so the smallest singular value stays clear of zero; our choice).
_COLUMNS_PER_ROW = 2
_MAX_MLS_BITS = 32  # scipy.signal.max_len_seq knows taps up to 32 bits


def _rng(seed) -> np.random.Generator:
    return seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)


# ---------------------------------------------------------------------------------------------------- signals
def max_length_sequence(nbits: int, *, seed=None, length: int | None = None) -> np.ndarray:
    """A maximum-length binary sequence on the levels -1 / +1.

    Parameters
    ----------
    nbits : int
        Register length; the period is ``N = 2**nbits - 1``. From 2 to 32.
    seed : int or numpy.random.Generator, optional
        Picks the (non-zero) initial register state, i.e. a cyclic shift; default the all-ones state.
    length : int, optional
        Number of values; default one period ``N``.

    Returns
    -------
    ndarray, shape (length,)
        ``2 b - 1`` for the bits ``b`` of :func:`scipy.signal.max_len_seq`.

    Notes
    -----
    Over one period the periodic autocorrelation is 1 at lag 0 and ``-1/N`` at every other lag
    (Golomb S.W. (1967), Shift Register Sequences), so the sequence is exciting of every order up to ``N``.

    Examples
    --------
    >>> s = max_length_sequence(3)
    >>> s.size, float(np.dot(s, np.roll(s, 1)) / s.size)
    (7, -0.14285714285714285)
    """
    nbits = int(nbits)
    if not 2 <= nbits <= _MAX_MLS_BITS:
        raise SessionError(f"nbits must be between 2 and {_MAX_MLS_BITS}; got {nbits}.")
    state = None
    if seed is not None:
        rng = _rng(seed)
        state = rng.integers(0, 2, size=nbits)
        if not state.any():
            state[rng.integers(nbits)] = 1
    bits, _ = ssig.max_len_seq(nbits, state=state, length=length)
    return 2.0 * bits.astype(np.float64) - 1.0


def crest_factor(x) -> np.ndarray:
    """Crest factor ``max|x - mean| / rms(x - mean)`` per column of ``x`` (shape (n_samples, c) or (n_samples,))."""
    x = np.asarray(x, dtype=np.float64)
    x2 = x[:, None] if x.ndim == 1 else x
    d = x2 - x2.mean(axis=0)
    rms = np.sqrt(np.mean(d ** 2, axis=0))
    cf = np.divide(np.max(np.abs(d), axis=0), rms, out=np.full(d.shape[1], np.inf), where=rms > 0)
    return cf[0] if x.ndim == 1 else cf


def multisine(period_samples: int, harmonics, *, seed=None, n_iter: int = 100) -> np.ndarray:
    """One period of a flat-spectrum multisine with random phases and reduced crest factor, peak 1.

    Parameters
    ----------
    period_samples : int
        Period ``P`` in samples.
    harmonics : sequence of int
        Excited harmonics ``k`` (frequency ``k / P`` cycles per sample), each in ``1 <= k < P / 2``.
    seed : int or numpy.random.Generator, optional
        Draws the initial random phases.
    n_iter : int, default 100
        Clipping iterations.

    Returns
    -------
    x : ndarray, shape (P,)
        Zero mean, ``max|x| = 1``; its DFT is non-zero only at ``harmonics``, all with the same magnitude.

    Notes
    -----
    Crest-factor reduction by time-frequency swapping: clip the signal at 90 % of its peak, keep the phases of
    the clipped signal's spectrum at the excited harmonics with the original (flat) magnitudes, repeat; the
    iterate with the lowest crest factor is returned (so it is never worse than the random-phase start).

    References
    ----------
    Van der Ouderaa E., Schoukens J., Renneboog J. (1988), Peak factor minimization using a time-frequency domain
    swapping algorithm, IEEE Trans. Instrum. Meas. 37:145.
    """
    P = int(period_samples)
    k = np.unique(np.asarray(harmonics, dtype=np.int64))
    if k.size == 0 or k[0] < 1 or 2 * k[-1] >= P:
        raise SessionError(
            f"harmonics must be non-empty whole numbers with 1 <= k < P/2 = {P / 2:g}; got {np.asarray(harmonics)}."
        )
    rng = _rng(seed)
    X = np.zeros(P // 2 + 1, dtype=complex)
    X[k] = np.exp(2j * np.pi * rng.random(k.size))
    best, best_cf = None, np.inf
    for _ in range(max(int(n_iter), 1)):
        x = np.fft.irfft(X, n=P)
        cf = crest_factor(x)
        if cf < best_cf:
            best, best_cf = x, cf
        peak = np.max(np.abs(x))
        Xc = np.fft.rfft(np.clip(x, -0.9 * peak, 0.9 * peak))
        X = np.zeros_like(X)
        X[k] = np.exp(1j * np.angle(Xc[k]))
    return best / np.max(np.abs(best))


# ---------------------------------------------------------------------------------------------------- bounds
def _vector(name, v, m, allow_inf=False) -> np.ndarray:
    a = np.asarray(v, dtype=np.float64)
    a = np.full(m, float(a)) if a.ndim == 0 else a.reshape(-1)
    if a.shape != (m,):
        raise LimitsError(f"{name} must give one value per input ({m}); got shape {np.shape(v)}.")
    if np.any(np.isnan(a)) or (not allow_inf and not np.all(np.isfinite(a))):
        raise LimitsError(f"{name} must be finite for every input; got {a.tolist()}.")
    return a


def _bounds(lo, hi, slew, m):
    lo, hi = _vector("lo (lower amplitude bound)", lo, m), _vector("hi (upper amplitude bound)", hi, m)
    bad = np.flatnonzero(lo >= hi)
    if bad.size:
        j = int(bad[0])
        off = " (the input is switched off)" if lo[j] == hi[j] else ""
        raise LimitsError(
            f"input {j} has lower bound {lo[j]:g} >= upper bound {hi[j]:g}{off}: no room to stimulate, so nothing "
            "can be excited. Declare lo < hi for every input, or leave that input out of the schedule."
        )
    if slew is not None:
        slew = _vector("slew (largest change per step; inf for none)", slew, m, allow_inf=True)
        if np.any(slew <= 0):
            raise LimitsError(f"slew limits must be positive per input; got {slew.tolist()}.")
        if np.all(np.isinf(slew)):
            slew = None
    return lo, hi, slew


def _project_slew(u, base, slew):
    """Forward pass: each sample moves at most ``slew`` from the one before (the rest level before the session).

    A value between the previous sample and the designed one, so amplitude bounds stay satisfied.
    """
    if slew is None:
        return u
    out = np.empty_like(u)
    prev = base.copy()
    for t in range(u.shape[0]):
        prev = np.clip(u[t], prev - slew, prev + slew)
        out[t] = prev
    return out


def _energy_gain(u, base, budget, window) -> float:
    """Largest ``g`` in [0, 1] with ``sum (base + g (u - base))²`` within ``budget`` on every ``window`` samples."""
    d = u - base
    W = min(int(window), u.shape[0])

    def win(a):
        c = np.concatenate([[0.0], np.cumsum(a)])
        return c[W:] - c[:-W]

    s_bb = W * float(base @ base)
    if s_bb > budget:
        raise LimitsError(
            f"the rest level alone uses {s_bb:g} uA² over {W} steps, more than the energy budget {budget:g}; "
            "raise the budget or allow zero stimulation (lo <= 0 <= hi)."
        )
    s_bd, s_dd = win(d @ base), win(np.sum(d ** 2, axis=1))
    disc = np.sqrt(np.maximum(s_bd ** 2 - s_dd * (s_bb - budget), 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(s_dd > 0, (-s_bd + disc) / s_dd, np.inf)
    return float(min(1.0, np.min(g) * (1 - 1e-12)))


# ---------------------------------------------------------------------------------------------------- excitation
@dataclass(frozen=True)
class ExcitationCheck:
    """Persistency of excitation of a schedule's trials at the planned order.

    Attributes
    ----------
    order : int
        Depth ``L`` of the checked mosaic input Hankel matrix.
    rank : int
        Its numerical rank.
    n_rows : int
        ``n_inputs * order``; full row rank (``rank == n_rows``) means exciting of order ``L``.
    n_columns : int
    rank_tol : float
        Singular values above it count (``sigma_max * max(shape) * eps * tol_factor``, see
        :mod:`stimsteer.sysid.excitation`).
    singular_value_ratio : float
        ``sigma_min / sigma_max``: the excitation margin (0 when rank-deficient).
    exciting : bool
    """

    order: int
    rank: int
    n_rows: int
    n_columns: int
    rank_tol: float
    singular_value_ratio: float
    exciting: bool


def verify_excitation(u, trials, order: int, *, tol_factor: float = DEFAULT_TOL_FACTOR) -> ExcitationCheck:
    """Check that the inputs of the given trials are persistently exciting of ``order`` collectively.

    Parameters
    ----------
    u : array_like, shape (n_samples, n_inputs)
    trials : array_like of int, shape (n_trials, 2)
        Half-open ranges ``[start, stop)``.
    order : int
        ``L >= 1``.
    tol_factor : float, default DEFAULT_TOL_FACTOR

    Returns
    -------
    ExcitationCheck

    Notes
    -----
    The mosaic block-Hankel matrix of depth ``L`` (per-trial Hankel matrices side by side) must have full row rank
    ``m L`` (Willems et al. 2005; van Waarde et al. 2020). Its singular values come from the streamed row-space
    factor (:func:`~stimsteer.sysid.hankel.row_space_factor`), so the matrix is never formed.
    """
    u = np.asarray(u, dtype=np.float64)
    u = u[:, None] if u.ndim == 1 else u
    segs = [(int(a), int(b)) for a, b in np.asarray(trials).reshape(-1, 2)]
    order = int(order)
    n_rows = u.shape[1] * order
    n_cols = hankel_column_count(segs, order)
    if n_cols == 0:
        return ExcitationCheck(order, 0, n_rows, 0, 0.0, 0.0, False)
    F, n_cols = row_space_factor([u], order, segs)
    sv = np.linalg.svd(F, compute_uv=False)
    tol = rank_tolerance(sv, (n_rows, n_cols), tol_factor=tol_factor)
    rank = int(np.count_nonzero(sv > tol)) if sv.size and sv[0] > 0 else 0
    ratio = float(sv[-1] / sv[0]) if rank == n_rows and sv.size == n_rows else 0.0
    return ExcitationCheck(order, rank, n_rows, int(n_cols), float(tol), ratio, rank == n_rows)


# ---------------------------------------------------------------------------------------------------- kinds
def _pulses(n_steps, lo, hi, slew, base, rng, *, rate, pulse_rate_hz, min_interval_steps):
    m = lo.size
    a_lo = lo if slew is None else np.maximum(lo, base - slew)
    a_hi = hi if slew is None else np.minimum(hi, base + slew)
    mean = rate / float(pulse_rate_hz)
    if not np.isfinite(mean) or mean < min_interval_steps:
        raise SessionError(
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
    nbits = int(np.clip(math.ceil(math.log2(need + 1)), 5, _MAX_MLS_BITS))
    bits = max_length_sequence(nbits, seed=rng, length=need).reshape(m, n_bits).T
    s = np.repeat(bits, hold_steps, axis=0)[:n_steps]
    mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
    if slew is not None:  # a jump must be reachable within one held bit; the final slew pass makes the ramps
        half = np.minimum(half, 0.5 * slew * hold_steps)
    return mid + half * s


def _multilevel(n_steps, lo, hi, slew, base, rng, *, n_levels, hold_steps):
    m = lo.size
    if isinstance(n_levels, bool) or int(n_levels) != n_levels or n_levels < 2:
        raise SessionError(f"n_levels must be a whole number >= 2; got {n_levels!r}.")
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


# ---------------------------------------------------------------------------------------------------- schedule
@dataclass(frozen=True)
class Schedule(_TrialLayout):
    """A designed stimulation schedule: inputs on the sample grid, trials and rests, bounds and excitation.

    Attributes
    ----------
    u : ndarray, shape (n_samples, n_inputs)
        Input amplitudes in ``input_units`` (µA for stimulation), rests included.
    trials : ndarray of int, shape (n_trials, 2)
        Half-open sample ranges ``[start, stop)``; the samples between them are rests.
    sample_rate_hz : float
    input_names, input_units : tuple of str
    kind : str
        One of :data:`SCHEDULE_KINDS`.
    order : int
        Planned excitation order (``>= past window + horizon + state dimension guess``).
    excitation : ExcitationCheck
        The check at ``order`` on the trials (always passed: a failing design raises).
    lo, hi : ndarray, shape (n_inputs,)
        Amplitude bounds the schedule respects.
    slew : ndarray, shape (n_inputs,) or None
        Largest change per step it respects (also from the rest level before the session).
    rest_level : ndarray, shape (n_inputs,)
        ``clip(0, lo, hi)``.
    energy_budget : float or None
        Σ u² allowed on every window of ``energy_window_steps`` samples (input units² · samples).
    energy_window_steps : int or None
    energy_gain : float
        Factor (<= 1) applied to the deviations from the rest level to meet the energy budget (1 when none).
    seed : int or None
    settings : dict
        Kind-specific design settings (hold, levels, pulse rate, harmonics, crest factors, ...).
    """

    u: np.ndarray
    trials: np.ndarray
    sample_rate_hz: float
    input_names: tuple
    input_units: tuple
    kind: str
    order: int
    excitation: ExcitationCheck
    lo: np.ndarray
    hi: np.ndarray
    slew: np.ndarray | None
    rest_level: np.ndarray
    energy_budget: float | None
    energy_window_steps: int | None
    energy_gain: float
    seed: int | None
    settings: dict = field(default_factory=dict)

    @property
    def n_samples(self) -> int:
        return int(self.u.shape[0])

    @property
    def n_inputs(self) -> int:
        return int(self.u.shape[1])

    def to_text(self) -> str:
        """A few lines for the terminal."""
        ex = self.excitation
        trial_s = (self.trials[0, 1] - self.trials[0, 0]) / self.sample_rate_hz
        rest_s = self.trials[0, 0] / self.sample_rate_hz
        lines = [
            f"schedule: {self.kind}, {self.n_inputs} input(s), {self.n_trials} trials of {trial_s:g} s with "
            f"{rest_s:g} s rests, at {self.sample_rate_hz:g} Hz",
            f"expected session length: {self.duration_s:g} s ({self.n_samples} samples)",
            f"excitation: order {ex.order} verified on the trials (rank {ex.rank} of {ex.n_rows}, "
            f"{ex.n_columns} Hankel columns, sigma_min/sigma_max = {ex.singular_value_ratio:.3g})",
        ]
        shown = min(self.n_inputs, 8)
        for j in range(shown):
            slew = "" if self.slew is None or not np.isfinite(self.slew[j]) else f", slew {self.slew[j]:g}/step"
            lines.append(f"  {self.input_names[j]}: {float(self.u[:, j].min()):g} .. {float(self.u[:, j].max()):g} "
                         f"{self.input_units[j]} used (bounds {self.lo[j]:g} .. {self.hi[j]:g}{slew})")
        if shown < self.n_inputs:
            lines.append(f"  ... and {self.n_inputs - shown} more input(s) (all in the file)")
        if self.energy_budget is not None:
            lines.append(f"energy budget {self.energy_budget:g} per {self.energy_window_steps} steps: deviations "
                         f"scaled by {self.energy_gain:.4g}")
        return "\n".join(lines)


def _whole(name, v, low) -> int:
    if isinstance(v, (bool, np.bool_)) or not isinstance(v, (int, np.integer, float)) or not float(v).is_integer() \
            or int(v) < low:
        raise SessionError(f"{name} must be a whole number >= {low}; got {v!r}.")
    return int(v)


def _positive(name, v, allow_zero=False) -> float:
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise SessionError(f"{name} must be a number; got {v!r}.") from None
    if not np.isfinite(x) or x < 0 or (x == 0 and not allow_zero):
        raise SessionError(f"{name} must be {'>= 0' if allow_zero else 'positive'} and finite; got {v!r}.")
    return x


def _layout(rate, trial_s, rest_s, order, n_inputs, n_trials):
    trial_n, rest_n = int(round(trial_s * rate)), int(round(rest_s * rate))
    if trial_n < order:
        raise ExcitationError(
            f"a trial of {trial_s:g} s is {trial_n} samples at {rate:g} Hz, shorter than the excitation order "
            f"{order}: no Hankel column fits in a trial. Lengthen the trials to at least {order / rate:g} s."
        )
    if n_trials is None:
        per = trial_n - order + 1
        n_trials = max(_MIN_TRIALS, -(-_COLUMNS_PER_ROW * n_inputs * order // per))
    trials = np.array([(rest_n + i * (trial_n + rest_n), rest_n + i * (trial_n + rest_n) + trial_n)
                       for i in range(n_trials)], dtype=np.int64)
    return trials, int(trials[-1, 1] + rest_n), trial_n


def _margins(lo, hi, slew):
    """Slew shrunk by a rounding margin, so float arithmetic never lands a hair outside the declared limit."""
    if slew is None:
        return None
    scale = np.maximum(np.abs(lo), np.abs(hi))
    finite = np.isfinite(slew)
    margin = np.maximum(1e-9 * np.where(finite, slew, 0.0), 64 * np.finfo(float).eps * scale)
    return np.where(finite, slew - margin, np.inf)


def _check_limits(u, lo, hi, slew, base, budget, window):
    """The final guard: raise if any sample breaks a declared limit (it never should)."""
    if np.any(u < lo) or np.any(u > hi):
        raise InfeasiblePlanError("internal error: a designed schedule left its amplitude bounds; not written.")
    if slew is not None and np.any(np.abs(np.diff(np.vstack([base, u]), axis=0)) > slew):
        raise InfeasiblePlanError("internal error: a designed schedule broke its slew limit; not written.")
    if budget is not None:
        c = np.concatenate([[0.0], np.cumsum(np.sum(u ** 2, axis=1))])
        W = min(window, u.shape[0])
        if np.any(c[W:] - c[:-W] > budget):
            raise InfeasiblePlanError("internal error: a designed schedule broke its energy budget; not written.")


def design_schedule(*, n_inputs: int, order: int, lo, hi, slew=None, kind: str = "prbs",
                    sample_rate_hz: float = 1000.0, n_trials: int | None = None, trial_s: float = 10.0,
                    rest_s: float = 2.0, seed: int | None = 0, input_names=None, input_units=None,
                    energy_budget: float | None = None, energy_window_steps: int | None = None,
                    hold_steps: int = 1, n_levels: int = 5, pulse_rate_hz: float | None = None,
                    min_interval_steps: int = 2, band_hz: float | None = None, n_iter: int = 100) -> Schedule:
    """Design an exciting stimulation schedule inside declared bounds (see the module docstring for the kinds).

    Parameters
    ----------
    n_inputs : int
        Number of stimulation inputs (electrodes) ``m``.
    order : int
        Excitation order to guarantee: ``Tini + N + n`` for the past window, horizon and state dimension the
        next session is for (:func:`stimsteer.sysid.excitation.required_order`).
    lo, hi : float or array_like, shape (n_inputs,)
        Amplitude bounds per input (input units, µA for stimulation); ``lo < hi``.
    slew : float or array_like, shape (n_inputs,), optional
        Largest change per sample; default none (``inf`` for no limit on one input).
    kind : {"pulses", "prbs", "multilevel", "multisine"}, default "prbs"
    sample_rate_hz : float, default 1000.0
        Rate of the model's sample grid.
    n_trials : int, optional
        Default: the smallest number (at least 4) whose trials give twice as many Hankel columns as rows.
    trial_s, rest_s : float, default 10.0 and 2.0
        Trial and rest durations; the layout is rest, trial, rest, ..., trial, rest.
    seed : int, optional
        Seed of every random choice; same seed, same schedule.
    input_names, input_units : sequence of str, optional
        Default ``u0, u1, ...`` and ``"uA"``.
    energy_budget : float, optional
        Largest Σ_k Σ_j u_j[k]² over any ``energy_window_steps`` consecutive samples.
    energy_window_steps : int, optional
        Default ``order`` (a window at least as long as a planning horizon, so the budget also holds on every
        horizon that fits inside it).
    hold_steps : int, default 1
        Samples each value is held (``prbs``, ``multilevel``).
    n_levels : int, default 5
        Levels of ``multilevel``.
    pulse_rate_hz : float, optional
        Mean pulse rate of ``pulses``; default ``sample_rate_hz / 5``.
    min_interval_steps : int, default 2
        Shortest inter-pulse interval of ``pulses``, samples.
    band_hz : float, optional
        Highest excited frequency of ``multisine``; default the Nyquist frequency.
    n_iter : int, default 100
        Crest-factor iterations of ``multisine``.

    Returns
    -------
    Schedule

    Raises
    ------
    LimitsError
        For malformed or impossible bounds (``lo >= hi``, non-positive slew, a budget the rest level exceeds, a
        slew too small for the levels).
    ExcitationError
        When the design cannot be exciting of ``order`` (trials too short or too few, band too narrow).
    SessionError
        For other malformed arguments.

    Notes
    -----
    The designed signal goes through a forward slew projection from the rest level (each sample clipped to within
    ``slew`` of the one before, which keeps the amplitude bounds), then, with an energy budget, its deviations
    from the rest level are scaled by the largest gain that meets the budget on every window, then it is checked
    against every limit once more. The persistency of excitation is verified last, on the final signal.
    """
    m = _whole("n_inputs", n_inputs, 1)
    order = _whole("order", order, 1)
    if kind not in SCHEDULE_KINDS:
        raise SessionError(f"kind must be one of {list(SCHEDULE_KINDS)}; got {kind!r}.")
    rate = _positive("sample_rate_hz", sample_rate_hz)
    trial_s, rest_s = _positive("trial_s", trial_s), _positive("rest_s", rest_s, allow_zero=True)
    n_trials = None if n_trials is None else _whole("n_trials", n_trials, 1)
    hold = _whole("hold_steps", hold_steps, 1)
    lo, hi, slew = _bounds(lo, hi, slew, m)
    base = np.clip(0.0, lo, hi)
    if energy_budget is not None:
        energy_budget = _positive("energy_budget", energy_budget)
        window = order if energy_window_steps is None else _whole("energy_window_steps", energy_window_steps, 1)
    else:
        window = None
    names = tuple(f"u{j}" for j in range(m)) if input_names is None else tuple(str(s) for s in input_names)
    units = tuple("uA" for _ in range(m)) if input_units is None else tuple(str(s) for s in input_units)
    if len(names) != m or len(units) != m or len(set(names)) != m:
        raise SessionError(f"input_names and input_units need {m} entries each (names unique); got {names}, {units}.")
    trials, n_samples, trial_n = _layout(rate, trial_s, rest_s, order, m, n_trials)
    rng = np.random.default_rng(seed)
    inside, settings = _design_kind(kind, trials.shape[0], trial_n, lo, hi, slew, base, rng, rate=rate,
                                    hold=hold, n_levels=n_levels, pulse_rate_hz=pulse_rate_hz,
                                    min_interval_steps=min_interval_steps, band_hz=band_hz, order=order,
                                    n_iter=n_iter)
    u = np.tile(base, (n_samples, 1))
    for i, (a, b) in enumerate(trials):
        u[a:b] = inside[i]
    u = _project_slew(u, base, _margins(lo, hi, slew))
    gain = 1.0
    if energy_budget is not None:
        gain = _energy_gain(u, base, energy_budget * (1 - 1e-9), window)
        u = base + gain * (u - base)
    u = np.clip(u, lo, hi)
    _check_limits(u, lo, hi, slew, base, energy_budget, window)
    check = _require_exciting(u, trials, order, trial_n, rate, kind)
    u.setflags(write=False)
    trials.setflags(write=False)
    return Schedule(u=u, trials=trials, sample_rate_hz=rate, input_names=names, input_units=units, kind=kind,
                    order=order, excitation=check, lo=lo, hi=hi, slew=slew, rest_level=base,
                    energy_budget=energy_budget, energy_window_steps=window, energy_gain=gain,
                    seed=None if seed is None else int(seed), settings=settings)


def _design_kind(kind, n_trials, trial_n, lo, hi, slew, base, rng, *, rate, hold, n_levels, pulse_rate_hz,
                 min_interval_steps, band_hz, order, n_iter):
    """The in-trial signal of every trial, shape (n_trials, trial_n, m), and the kind's settings."""
    total = n_trials * trial_n
    m = lo.size
    if kind == "pulses":
        rate_p = rate / 5.0 if pulse_rate_hz is None else _positive("pulse_rate_hz", pulse_rate_hz)
        gap = _whole("min_interval_steps", min_interval_steps, 1)
        u = _pulses(total, lo, hi, slew, base, rng, rate=rate, pulse_rate_hz=rate_p, min_interval_steps=gap)
        return u.reshape(n_trials, trial_n, m), {"pulse_rate_hz": rate_p, "min_interval_steps": gap}
    if kind == "prbs":
        u = _prbs(total, lo, hi, slew, base, rng, hold_steps=hold)
        return u.reshape(n_trials, trial_n, m), {"hold_steps": hold}
    if kind == "multilevel":
        u = _multilevel(total, lo, hi, slew, base, rng, n_levels=n_levels, hold_steps=hold)
        return u.reshape(n_trials, trial_n, m), {"hold_steps": hold, "n_levels": int(n_levels)}
    band = None if band_hz is None else _positive("band_hz", band_hz)
    u, cf, sets = _multisine_trials(n_trials, trial_n, lo, hi, slew, rng, rate=rate, band_hz=band, order=order,
                                    n_iter=_whole("n_iter", n_iter, 1))
    return u, {"band_hz": band, "harmonics": sets, "crest_factor": cf.tolist(), "period_samples": trial_n}


def _require_exciting(u, trials, order, trial_n, rate, kind) -> ExcitationCheck:
    check = verify_excitation(u, trials, order)
    if not check.exciting:
        m = u.shape[1]
        raise ExcitationError(
            f"the {kind} schedule excites rank {check.rank} of the {check.n_rows} rows needed for order {order} "
            f"({m} inputs x {order}) with {check.n_columns} Hankel columns. Give more or longer trials (now "
            f"{trials.shape[0]} of {trial_n / rate:g} s), a shorter hold, a larger pulse rate, or another kind."
        )
    return check


# ---------------------------------------------------------------------------------------------------- files
_LAYOUT_HINT = ("expected the columns 'time [s] @ <rate> Hz', 'trial' and one 'in:<name> [<unit>]' per input "
                "(as written by `stimsteer schedule`)")


def save_schedule(schedule: Schedule, path, *, overwrite: bool = False) -> Path:
    """Write a schedule as a CSV table (layout in the module docstring), atomically.

    Parameters
    ----------
    schedule : Schedule
    path : str or Path
        Output file, usually ``.csv``.
    overwrite : bool, default False

    Returns
    -------
    Path

    Raises
    ------
    FileFormatError
        When ``path`` exists and ``overwrite`` is False, or a channel name cannot be written in the layout.
    """
    import pandas as pd

    path = Path(path)
    if path.exists() and not overwrite:
        raise FileFormatError(f"{path} already exists; pass overwrite=True (--force) to replace it, or choose "
                              "another name.")
    label = np.full(schedule.n_samples, -1, dtype=np.int64)
    for i, (a, b) in enumerate(schedule.trials):
        label[a:b] = i
    cols = {f"time [s] @ {np.format_float_positional(schedule.sample_rate_hz, trim='-')} Hz":
            np.arange(schedule.n_samples) / schedule.sample_rate_hz, "trial": label}
    for j, (name, unit) in enumerate(zip(schedule.input_names, schedule.input_units)):
        header = f"in:{name} [{unit}]"
        ch = _CHANNEL_RE.match(header)
        if ch is None or (ch["name"], ch["unit"].strip()) != (name, unit):
            raise FileFormatError(f"input {name!r} with unit {unit!r} cannot be written as 'in:<name> [<unit>]' "
                                  "(no square brackets or edge spaces); rename it.")
        cols[header] = np.asarray(schedule.u[:, j], dtype=np.float64)
    with atomic_path(path) as tmp:
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            fh.write(f"# {CAUTION}\n")  # a schedule is stimulation to deliver; every reader skips this comment
            pd.DataFrame(cols).to_csv(fh, index=False)
    return path


def _parse_columns(columns, path):
    spec = {"time": None, "rate": None, "trial": None, "in": []}
    for col in columns:
        t, ch = _TIME_RE.match(col), _CHANNEL_RE.match(col)
        if t is not None:
            spec["time"], spec["rate"] = col, t["rate"]
        elif col.strip() == "trial":
            spec["trial"] = col
        elif ch is not None and ch["role"] == "in":
            if not ch["name"] or not ch["unit"].strip():
                raise FileFormatError(f"{path}: column {col!r} needs an input name and a unit, as in 'in:site_a [uA]'.")
            spec["in"].append((col, ch["name"], ch["unit"].strip()))
        elif not (ch is not None or col.strip() == "valid"):
            raise FileFormatError(f"{path} is not a stimsteer schedule: column {col!r} is not recognised; "
                                  f"{_LAYOUT_HINT}.")
    missing = [k for k in ("time", "trial") if spec[k] is None] + ([] if spec["in"] else ["in:<name> [<unit>]"])
    if missing:
        raise FileFormatError(f"{path} is not a stimsteer schedule: missing {missing}; {_LAYOUT_HINT}.")
    return spec


def _rate_of(t, rate_text, path):
    if rate_text is not None:
        try:
            rate = float(rate_text)
        except ValueError:
            raise FileFormatError(f"{path}: the rate {rate_text!r} in the time header is not a number.") from None
    elif t.size >= 2 and t[-1] > t[0]:
        rate = float(f"{(t.size - 1) / (t[-1] - t[0]):.9g}")
    else:
        raise FileFormatError(f"{path}: cannot tell the sampling rate; write the header as 'time [s] @ <rate> Hz'.")
    if not math.isfinite(rate) or rate <= 0:
        raise FileFormatError(f"{path}: the sampling rate must be positive; got {rate} Hz.")
    off = np.flatnonzero(np.abs(t - (t[0] + np.arange(t.size) / rate)) > 0.1 / rate)
    if off.size:
        raise FileFormatError(f"{path}: time stamps are not on a uniform {rate:g} Hz grid (row {int(off[0])}); "
                              "a schedule has one row per sample.")
    return rate


def _trials_of(labels, path):
    if not np.all(np.isnan(labels) | (labels == np.round(labels))):
        raise FileFormatError(f"{path}: the 'trial' column must hold whole numbers (-1 or empty in rests).")
    ids = np.where(np.isfinite(labels) & (labels >= 0), labels, -1).astype(np.int64)
    cuts = np.flatnonzero(np.diff(ids)) + 1
    runs = [(int(a), int(b), int(ids[a])) for a, b in zip(np.r_[0, cuts], np.r_[cuts, ids.size]) if ids[a] >= 0]
    labels_seen = [r[2] for r in runs]
    if not runs or len(set(labels_seen)) != len(labels_seen):
        raise FileFormatError(f"{path}: trials must be labelled 0, 1, ... with the rows of each trial contiguous; "
                              f"found runs labelled {labels_seen}.")
    return np.array([(a, b) for a, b, _ in runs], dtype=np.int64)


def load_schedule(path):
    """Read a schedule CSV back as the input side of a session.

    Parameters
    ----------
    path : str or Path
        A file written by :func:`save_schedule` (a session table is accepted too: its outputs are ignored).

    Returns
    -------
    u : ndarray, shape (n_samples, n_inputs)
    trials : ndarray of int, shape (n_trials, 2)
    names : tuple of str
    units : tuple of str
    sample_rate_hz : float

    Raises
    ------
    FileFormatError
        When the file is not a schedule in this layout (the message names the column or row at fault).
    """
    import pandas as pd

    path = Path(path)
    try:
        extra = {"float_precision": "round_trip"} if int(pd.__version__.split(".")[0]) < 3 else {}
        frame = pd.read_csv(path, encoding="utf-8-sig", skiprows=comment_lines(path), **extra)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, ValueError) as exc:
        raise FileFormatError(f"{path} is not a readable CSV schedule ({exc}); {_LAYOUT_HINT}.") from None
    spec = _parse_columns([str(c) for c in frame.columns], path)
    if len(frame) == 0:
        raise FileFormatError(f"{path} holds a header but no rows; a schedule has one row per sample.")

    def numeric(col):
        v = pd.to_numeric(frame[col], errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
        return v

    t = numeric(spec["time"])
    if not np.all(np.isfinite(t)):
        raise FileFormatError(f"{path}: every row needs a finite time in {spec['time']!r}.")
    rate = _rate_of(t, spec["rate"], path)
    trials = _trials_of(numeric(spec["trial"]), path)
    u = np.column_stack([numeric(c) for c, _, _ in spec["in"]])
    bad = np.argwhere(~np.isfinite(u))
    if bad.size:
        r, c = bad[0]
        raise FileFormatError(f"{path}: input {spec['in'][c][1]!r} has no finite value at row {int(r)}; a "
                              "schedule must give every amplitude.")
    return (u, trials, tuple(n for _, n, _ in spec["in"]), tuple(x for _, _, x in spec["in"]), rate)
