"""Stimulation schedules for the next session: exciting inputs inside declared limits, trials and rests laid out.

A schedule is the input side of a session still to be recorded: per electrode (input), a sequence of amplitudes
on the model's sample grid, grouped into trials separated by rests. It is designed so that

* it never leaves the declared limits, a :class:`~stimsteer.control.limits.StimLimits`: the amplitude window
  ``lo <= u <= hi`` per input (the declared bounds narrowed by the charge-density rule), the slew limit
  ``|u[k] - u[k-1]| <= slew`` per input (also across rests, and from rest before the session), and the energy
  budget on every window of ``energy_window_steps`` samples;
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

The rest level is zero stimulation, which the limits always allow (a :class:`StimLimits` refuses bounds that
exclude zero).

Files: :func:`save_schedule` and :func:`load_schedule` (:mod:`stimsteer.control.schedule_files`). The signals and the
excitation check come from the identification layer (:mod:`stimsteer.sysid.signals`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from ..sysid import (ExcitationCheck, ExcitationError, InfeasiblePlanError, InvalidParameterError, LimitsError,
                     TrialLayout, verify_excitation)
from ..sysid._progress import progress
from ..sysid.exceptions import StimsteerWarning
from ._schedule_kinds import SCHEDULE_KINDS, design_kind, positive, whole
from .limits import StimLimits
from .schedule_files import load_schedule, save_schedule

__all__ = ["SCHEDULE_KINDS", "Schedule", "design_schedule", "save_schedule", "load_schedule"]

# At least this many trials, so a held-out split (25 %) keeps one trial and cross-validation has folds.
_MIN_TRIALS = 4
# Automatic trial count: the mosaic Hankel gets at least this many columns per row (a margin over the
# minimum of one, so the smallest singular value stays clear of zero; our choice).
_COLUMNS_PER_ROW = 2


def _project_slew(u, base, slew):
    """Forward pass: each sample moves at most ``slew`` from the one before (the rest level before the session).

    A value between the previous sample and the designed one, so amplitude bounds stay satisfied.
    """
    if slew is None:
        return u
    out = np.empty_like(u)
    for j in range(u.shape[1]):
        out[:, j] = _slew_column(u[:, j].tolist(), float(base[j]), float(slew[j]))
    return out


def _slew_column(x: list, prev: float, slew: float) -> list:
    """One input's pass on Python floats: ``numpy.clip(x[t], prev - slew, prev + slew)`` sample by sample, bit for
    bit (the same double arithmetic and the same choice at ties), at a tenth of the cost of a NumPy call per
    sample (the demo's schedule: 21,000 samples of 3 inputs)."""
    out = []
    for v in x:
        lo, hi = prev - slew, prev + slew
        prev = v if v > lo else lo  # NumPy's clip takes the bound at a tie (it decides the sign of a zero)
        prev = prev if prev < hi else hi
        out.append(prev)
    return out


def _energy_gain(u, base, budget, window) -> float:
    """Largest ``g`` in [0, 1] with ``sum (base + g (u - base))²`` within ``budget`` on every ``window`` samples."""
    d = u - base
    W = min(int(window), u.shape[0])

    def win(a):
        c = np.concatenate([[0.0], np.cumsum(a)])
        return c[W:] - c[:-W]

    # the rest level is zero (StimLimits keep 0 inside the bounds), so s_bb and s_bd vanish; the general
    # quadratic is kept because it gives the stored schedules bit for bit
    s_bb = W * float(base @ base)
    s_bd, s_dd = win(d @ base), win(np.sum(d ** 2, axis=1))
    disc = np.sqrt(np.maximum(s_bd ** 2 - s_dd * (s_bb - budget), 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        g = np.where(s_dd > 0, (-s_bd + disc) / s_dd, np.inf)
    return float(min(1.0, np.min(g) * (1 - 1e-12)))


@dataclass(frozen=True)
class Schedule(TrialLayout):
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
        Amplitude window the schedule respects, µA (:meth:`StimLimits.input_bounds`).
    slew : ndarray, shape (n_inputs,) or None
        Largest change per step it respects, µA (also from the rest level before the session); ``inf`` for an
        input without a slew limit, None when no input has one.
    rest_level : ndarray, shape (n_inputs,)
        ``clip(0, lo, hi)``: zero stimulation.
    energy_budget : float or None
        Σ u² allowed on every window of ``energy_window_steps`` samples (µA² · samples).
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
            lo, hi = float(self.u[:, j].min()), float(self.u[:, j].max())
            share = 100 * (hi - lo) / (self.hi[j] - self.lo[j])
            lines.append(f"  {self.input_names[j]}: {lo:g} .. {hi:g} {self.input_units[j]} used, {share:.0f} % of the "
                         f"window (bounds {self.lo[j]:g} .. {self.hi[j]:g}{slew})")
        if shown < self.n_inputs:
            lines.append(f"  ... and {self.n_inputs - shown} more input(s) (all in the file)")
        return "\n".join(lines + self.limit_costs())

    def limit_costs(self) -> list[str]:
        """One line per limit that shaped the schedule: what it cost, in figures."""
        lines = []
        dlo, dhi = self.settings.get("declared_min_ua"), self.settings.get("declared_max_ua")
        if dlo is not None:
            for j in np.flatnonzero((np.asarray(dlo) < self.lo) | (np.asarray(dhi) > self.hi)):
                lines.append(f"cost of the charge-density rule: {self.input_names[j]} limited to {self.lo[j]:g} .. "
                             f"{self.hi[j]:g} µA of the declared {dlo[j]:g} .. {dhi[j]:g}")
        hold = self.settings.get("hold_steps")
        if self.slew is not None and hold is not None and self.kind == "prbs":
            how = "chosen so a full swing fits" if self.settings.get("hold_chosen") == "automatic" else "as given"
            ms = 1e3 * hold / self.sample_rate_hz
            lines.append(f"cost of the slew limit: each bit held {hold} sample(s) ({ms:.4g} ms, {how}); switches are "
                         "ramps at the limit")
        if self.energy_budget is not None:
            if self.energy_gain < 1.0:
                lines.append(f"warning: cost of the energy budget ({self.energy_budget:g} µA² per "
                             f"{self.energy_window_steps} samples): every deviation from rest scaled by "
                             f"{self.energy_gain:.4g} ({100 * self.energy_gain:.0f} % of the amplitude window used)")
            else:
                lines.append(f"energy budget {self.energy_budget:g} µA² per {self.energy_window_steps} samples: met "
                             "without scaling")
        return lines


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


def _require_exciting(u, trials, order, trial_n, rate, kind) -> ExcitationCheck:
    from threadpoolctl import threadpool_limits

    # the row-space factor reduces groups of trials on one thread per core: BLAS threads inside each thread would
    # oversubscribe the cores and spin (31 s instead of 0.6 s for the demo's schedule at load 15; same factor)
    with threadpool_limits(limits=1):
        check = verify_excitation(u, trials, order)
    if not check.exciting:
        m = u.shape[1]
        raise ExcitationError(
            f"the {kind} schedule excites rank {check.rank} of the {check.n_rows} rows needed for order {order} "
            f"({m} inputs x {order}) with {check.n_columns} Hankel columns. Give more or longer trials (now "
            f"{trials.shape[0]} of {trial_n / rate:g} s), a shorter hold, a larger pulse rate, or another kind."
        )
    return check




def _bounds(limits: StimLimits):
    """Amplitude window and slew per input from the limits; an input must have room to be excited."""
    lo, hi = limits.input_bounds()
    bad = np.flatnonzero(lo >= hi)
    if bad.size:
        j = int(bad[0])
        name = f" ({limits.input_names[j]!r})" if limits.input_names is not None else ""
        off = " (the input is switched off)" if lo[j] == hi[j] else ""
        raise LimitsError(
            f"input {j}{name} has lower bound {lo[j]:g} >= upper bound {hi[j]:g}{off}: no room to stimulate, so "
            "nothing can be excited. Declare lo < hi for every input, or leave that input out of the schedule."
        )
    slew = None if limits.slew_max_ua is None else np.array(limits.slew_max_ua, dtype=np.float64)
    if slew is not None and np.all(np.isinf(slew)):
        slew = None
    return lo, hi, slew


def _check_limits(u, limits: StimLimits, base, window) -> None:
    """The final guard: raise if any sample breaks a declared limit (it never should).

    The limits' own check, exactly (``rtol=0``), from the rest level before the session and with the energy
    budget on every window of the schedule.
    """
    found = limits.violations(u, last_input=base, rtol=0.0, energy_window_steps=window)
    for key, what in (("amplitude", "left its amplitude bounds"), ("slew", "broke its slew limit"),
                      ("energy_budget", "broke its energy budget")):
        if found[key]:
            raise InfeasiblePlanError(f"internal error: a designed schedule {what}; not written.")


def _settings(limits, order, kind, sample_rate_hz, n_trials, trial_s, rest_s, hold_steps, energy_window_steps):
    """The checked scalar settings of :func:`design_schedule`."""
    if not isinstance(limits, StimLimits):
        raise InvalidParameterError(
            f"limits must be a StimLimits; got {type(limits).__name__}. Declare them with StimLimits(...) or read "
            "a file with stimsteer.control.load_limits."
        )
    order = whole("order", order, 1)
    if kind not in SCHEDULE_KINDS:
        raise InvalidParameterError(f"kind must be one of {list(SCHEDULE_KINDS)}; got {kind!r}.")
    out = {"order": order, "rate": positive("sample_rate_hz", sample_rate_hz),
           "trial_s": positive("trial_s", trial_s), "rest_s": positive("rest_s", rest_s, allow_zero=True),
           "n_trials": None if n_trials is None else whole("n_trials", n_trials, 1),
           "hold": None if hold_steps is None else whole("hold_steps", hold_steps, 1), "window": None}
    if limits.energy_budget_ua2 is not None:
        out["window"] = ((limits.energy_window_steps or order) if energy_window_steps is None
                         else whole("energy_window_steps", energy_window_steps, 1))
    return out


def design_schedule(limits: StimLimits, *, order: int, kind: str = "prbs", sample_rate_hz: float = 1000.0,
                    n_trials: int | None = None, trial_s: float = 10.0, rest_s: float = 2.0,
                    seed: int | None = 0, energy_window_steps: int | None = None, hold_steps: int | None = None,
                    n_levels: int = 5, pulse_rate_hz: float | None = None, min_interval_steps: int = 2,
                    band_hz: float | None = None, n_iter: int = 100) -> Schedule:
    """Design an exciting stimulation schedule inside declared limits (see the module docstring for the kinds).

    Parameters
    ----------
    limits : StimLimits
        The declared limits: one input per limit, named after it (``u0, u1, ...`` when the limits are unnamed),
        in µA. The amplitude window (declared bounds narrowed by the charge-density rule), the slew limit and the
        energy budget come from here.
    order : int
        Excitation order to guarantee: ``Tini + N + n`` for the past window, horizon and state dimension the
        next session is for (:func:`stimsteer.sysid.excitation.required_order`).
    kind : {"pulses", "prbs", "multilevel", "multisine"}, default "prbs"
    sample_rate_hz : float, default 1000.0
        Rate of the model's sample grid.
    n_trials : int, optional
        Default: the smallest number (at least 4) whose trials give twice as many Hankel columns as rows.
    trial_s, rest_s : float, default 10.0 and 2.0
        Trial and rest durations; the layout is rest, trial, rest, ..., trial, rest.
    seed : int, optional
        Seed of every random choice; same seed, same schedule.
    energy_window_steps : int, optional
        The limits' energy budget holds on every window of this many consecutive samples. Default the window the
        limits declare (``StimLimits.energy_window_steps``), else ``order`` (a window at least as long as a
        planning horizon, so the budget also holds on every horizon that fits inside it).
    hold_steps : int, optional
        Samples each value is held (``prbs``, ``multilevel``). Default 1, except ``prbs`` under a slew limit: the
        fewest samples in which a swing across the whole amplitude window fits (so the schedule uses the window as
        declared instead of two levels narrowed to ``slew`` apart).
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
        When an input has no room to be excited (both bounds 0) or the slew limit is too small for the levels.
    ExcitationError
        When the design cannot be exciting of ``order`` (trials too short or too few, band too narrow).
    InvalidParameterError
        For other malformed arguments (``limits`` not a :class:`StimLimits`, an unknown kind, a non-positive
        rate or duration, ...).

    Notes
    -----
    The designed signal goes through a forward slew projection from the rest level (each sample clipped to within
    ``slew`` of the one before, which keeps the amplitude bounds), then, with an energy budget, its deviations
    from the rest level are scaled by the largest gain that meets the budget on every window, then it is checked
    against every limit once more (:meth:`StimLimits.violations`). The persistency of excitation is verified
    last, on the final signal.

    Examples
    --------
    >>> lim = StimLimits(amplitude_min_ua=[-20.0, 0.0], amplitude_max_ua=[20.0, 40.0], slew_max_ua=10.0)
    >>> s = design_schedule(lim, order=6, sample_rate_hz=100.0, trial_s=1.0, rest_s=0.2, seed=1)
    >>> s.excitation.exciting, bool(s.u.max() <= 40.0), bool(abs(s.u).max(axis=0)[0] <= 20.0)
    (True, True, True)
    """
    cfg = _settings(limits, order, kind, sample_rate_hz, n_trials, trial_s, rest_s, hold_steps,
                    energy_window_steps)
    order, rate, window = cfg["order"], cfg["rate"], cfg["window"]
    lo, hi, slew = _bounds(limits)
    m = lo.size
    base = np.clip(0.0, lo, hi)
    names = tuple(f"u{j}" for j in range(m)) if limits.input_names is None else tuple(limits.input_names)
    trials, n_samples, trial_n = _layout(rate, cfg["trial_s"], cfg["rest_s"], order, m, cfg["n_trials"])
    rng = np.random.default_rng(seed)
    hold = _auto_hold(kind, lo, hi, slew) if cfg["hold"] is None else cfg["hold"]
    with progress(3, f"schedule ({kind}, order {order})") as bar:
        inside, settings = design_kind(kind, trials.shape[0], trial_n, lo, hi, slew, base, rng, rate=rate,
                                       hold=hold, n_levels=n_levels, pulse_rate_hz=pulse_rate_hz,
                                       min_interval_steps=min_interval_steps, band_hz=band_hz, order=order,
                                       n_iter=n_iter)
        bar.update()
        u, gain = _assemble(inside, trials, n_samples, lo, hi, slew, base, limits.energy_budget_ua2, window)
        _check_limits(u, limits, base, window)
        bar.update()
        check = _require_exciting(u, trials, order, trial_n, rate, kind)
        bar.update()
    settings = {**settings, "hold_chosen": "given" if cfg["hold"] is not None else "automatic",
                "declared_min_ua": [float(v) for v in np.broadcast_to(limits.amplitude_min_ua, (m,))],
                "declared_max_ua": [float(v) for v in np.broadcast_to(limits.amplitude_max_ua, (m,))]}
    if gain < 1.0:
        warnings.warn(StimsteerWarning(_budget_warning(limits.energy_budget_ua2, window, gain, lo, hi, rate)),
                      stacklevel=2)
    u.setflags(write=False)
    trials.setflags(write=False)
    return Schedule(u=u, trials=trials, sample_rate_hz=rate, input_names=names, input_units=("uA",) * m,
                    kind=kind, order=order, excitation=check, lo=lo, hi=hi, slew=slew, rest_level=base,
                    energy_budget=limits.energy_budget_ua2, energy_window_steps=window, energy_gain=gain,
                    seed=None if seed is None else int(seed), settings=settings)


def _auto_hold(kind, lo, hi, slew) -> int:
    """The default hold: 1, or for ``prbs`` under a slew limit the fewest samples in which a swing from the lower to
    the upper bound fits at the slew limit (every input), so both levels stay at the declared bounds."""
    if kind != "prbs" or slew is None:
        return 1
    finite = np.isfinite(slew) & (slew > 0)
    if not finite.any():
        return 1
    return max(1, int(np.ceil(np.max((hi - lo)[finite] / slew[finite]) * (1 - 1e-12))))


def _budget_warning(budget, window, gain, lo, hi, rate) -> str:
    """What the energy budget costs the schedule, with the alternative (sparse pulses at the full window)."""
    peak = np.maximum(np.abs(lo), np.abs(hi))
    per_window = int(budget // float(np.sum(peak ** 2)))  # full-amplitude pulses on every input that fit a window
    alt = (f"--kind pulses with --pulse-rate-hz {per_window * rate / window:.3g} or less keeps full-amplitude pulses "
           "within the budget" if per_window >= 1 else "no full-amplitude pulse fits the budget either")
    lo0, hi0 = float(lo[0]), float(hi[0])
    rest = min(max(0.0, lo0), hi0)  # deviations are measured from rest, inside the window
    used = (f"±{gain * hi0:.3g} of ±{hi0:.3g}" if lo0 == -hi0 else
            f"{rest + gain * (lo0 - rest):.3g} .. {rest + gain * (hi0 - rest):.3g} of {lo0:.3g} .. {hi0:.3g}")
    return (f"the energy budget ({budget:g} µA² per {window} samples, {window / rate:.4g} s) scales every deviation "
            f"from rest by {gain:.3g}: the schedule uses {100 * gain:.0f} % of the declared amplitude window "
            f"(e.g. {used} µA on the first input). Alternatives: "
            f"{alt}; or declare a budget for this exploration session in the limits file (it was set for "
            "planning), or give a longer --energy-window-steps if the budget speaks of a longer window.")


def _assemble(inside, trials, n_samples, lo, hi, slew, base, budget, window):
    """Trials laid into rests, the slew projection, the energy gain and a last clip: ``(u, gain)``."""
    u = np.tile(base, (n_samples, 1))
    for i, (a, b) in enumerate(trials):
        u[a:b] = inside[i]
    u = _project_slew(u, base, _margins(lo, hi, slew))
    gain = 1.0
    if budget is not None:
        gain = _energy_gain(u, base, budget * (1 - 1e-9), window)
        u = base + gain * (u - base)
    return np.clip(u, lo, hi), gain
