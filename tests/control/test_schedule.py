"""Behaviour of stimsteer.control.schedule: exciting schedules inside declared limits, and their CSV files."""

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stimsteer.control.limits import StimLimits
from stimsteer.control.schedule import SCHEDULE_KINDS, design_schedule, load_schedule, save_schedule
from stimsteer.sysid.excitation import pe_order
from stimsteer.sysid.exceptions import (ExcitationError, FileFormatError, InfeasiblePlanError, InvalidParameterError,
                                        LimitsError)

# Small designs keep the suite fast: 3 inputs, order 12, 200 Hz, 1 s trials (values chosen for this test file).
SMALL = dict(order=12, sample_rate_hz=200.0, trial_s=1.0, rest_s=0.25)
LO, HI, SLEW = np.array([-40.0, 0.0, -10.0]), np.array([40.0, 80.0, 10.0]), np.array([30.0, 25.0, 8.0])


def _lim(lo, hi, slew=None, budget=None, names=None, n_inputs=3):
    return StimLimits(amplitude_min_ua=lo, amplitude_max_ua=hi, slew_max_ua=slew, energy_budget_ua2=budget,
                      input_names=names, n_inputs=n_inputs)


def _assert_within(s, lo, hi, slew=None, budget=None, window=None):
    u = np.asarray(s.u)
    assert np.all(u >= lo) and np.all(u <= hi)
    if slew is not None:
        steps = np.abs(np.diff(np.vstack([np.clip(0.0, lo, hi), u]), axis=0))
        assert np.all(steps <= slew)
    if budget is not None:
        c = np.concatenate([[0.0], np.cumsum(np.sum(u ** 2, axis=1))])
        assert np.all(c[window:] - c[:-window] <= budget)


# ------------------------------------------------------------------------------------------------ design
@pytest.mark.parametrize("kind", SCHEDULE_KINDS)
def test_every_kind_stays_inside_its_bounds_and_is_exciting(kind, seed):
    s = design_schedule(_lim(LO, HI, SLEW if kind != "multilevel" else 2 * SLEW), kind=kind, seed=seed, **SMALL)
    _assert_within(s, LO, HI, SLEW if kind != "multilevel" else 2 * SLEW)
    assert s.excitation.exciting and s.excitation.order == 12 and s.excitation.n_rows == 36
    # a second check by other code: the excitation module's pe_order on the trials agrees
    assert pe_order(s.u, [tuple(t) for t in s.trials], max_order=12) == 12
    assert s.kind == kind and s.u.shape == (s.n_samples, 3)
    with pytest.raises(ValueError):
        s.u[0, 0] = 1.0


def test_same_seed_same_schedule_other_seed_other_schedule(seed):
    a = design_schedule(_lim(-1, 1), kind="multilevel", seed=seed, **SMALL)
    b = design_schedule(_lim(-1, 1), kind="multilevel", seed=seed, **SMALL)
    c = design_schedule(_lim(-1, 1), kind="multilevel", seed=seed + 1, **SMALL)
    np.testing.assert_array_equal(a.u, b.u)
    assert not np.array_equal(a.u, c.u)


def test_layout_of_trials_and_rests_and_session_length():
    s = design_schedule(_lim(-1, 1), kind="prbs", n_trials=5, **SMALL)
    assert s.n_trials == 5
    np.testing.assert_array_equal(s.trials[:, 1] - s.trials[:, 0], 200)
    np.testing.assert_array_equal(s.trials[1:, 0] - s.trials[:-1, 1], 50)
    assert s.trials[0, 0] == 50 and s.n_samples == s.trials[-1, 1] + 50
    assert s.duration_s == pytest.approx(5 * 1.0 + 6 * 0.25)
    rest = np.ones(s.n_samples, dtype=bool)
    for a, b in s.trials:
        rest[a:b] = False
    np.testing.assert_array_equal(s.u[rest], 0.0)  # no slew limit: rests sit at the rest level
    assert "expected session length: 6.5 s" in s.to_text()


def test_automatic_trial_count_gives_a_column_margin():
    s = design_schedule(_lim(-1, 1), kind="prbs", **{**SMALL, "trial_s": 0.2})
    assert s.n_trials >= 4
    assert s.excitation.n_columns >= 2 * s.excitation.n_rows


def test_the_rest_level_is_zero_stimulation():
    # StimLimits keep zero inside every amplitude window, so rests (and the start) are zero stimulation
    s = design_schedule(_lim([0.0, -20.0, -3.0], [20.0, 0.0, 3.0]), kind="pulses", **SMALL)
    np.testing.assert_array_equal(s.rest_level, [0.0, 0.0, 0.0])
    np.testing.assert_array_equal(s.u[0], s.rest_level)


def test_energy_budget_holds_on_every_window(seed):
    s = design_schedule(_lim(-50, 50, budget=20000.0), kind="prbs", seed=seed, **SMALL)
    assert s.energy_gain < 1.0 and s.energy_window_steps == 12
    _assert_within(s, -50, 50, budget=20000.0, window=12)
    assert s.excitation.exciting


def test_an_energy_window_other_than_the_order(seed):
    s = design_schedule(_lim(-50, 50, budget=20000.0), kind="prbs", seed=seed, energy_window_steps=30, **SMALL)
    assert s.energy_window_steps == 30
    _assert_within(s, -50, 50, budget=20000.0, window=30)
    with pytest.raises(InvalidParameterError, match="energy_window_steps must be a whole number >= 1"):
        design_schedule(_lim(-50, 50, budget=20000.0), kind="prbs", energy_window_steps=0, **SMALL)


@pytest.mark.parametrize("kw, match", [
    (dict(lo=1.0, hi=1.0), "zero stimulation must lie inside"),
    (dict(lo=[0, 0], hi=1.0), "disagree on the number of inputs"),
    (dict(lo=-1.0, hi=np.inf), "NaN or infinite"),
    (dict(lo=-1.0, hi=1.0, slew=0.0), "slew_max_ua must be positive"),
    (dict(lo=-1.0, hi=1.0, names=["a", "a", "b"]), "unique names"),
])
def test_bad_bounds_are_refused(kw, match):
    # the bounds of a schedule are a StimLimits, which refuses them before any design
    with pytest.raises(LimitsError, match=match):
        design_schedule(_lim(**kw), kind="prbs", **SMALL)


def test_multilevel_with_a_slew_smaller_than_the_level_spacing_is_refused():
    with pytest.raises(LimitsError, match="smaller than the level spacing"):
        design_schedule(_lim(-10, 10, slew=1.0), kind="multilevel", **SMALL)


def test_too_short_trials_are_refused():
    with pytest.raises(ExcitationError, match="shorter than the excitation order 12"):
        design_schedule(_lim(-1, 1), kind="prbs", **{**SMALL, "trial_s": 0.05})


def test_too_few_columns_are_refused():
    with pytest.raises(ExcitationError, match="excites rank .* of the 36 rows"):
        design_schedule(_lim(-1, 1), kind="prbs", n_trials=1, **{**SMALL, "trial_s": 0.1})


def test_multisine_band_too_narrow_is_refused():
    with pytest.raises(ExcitationError, match="harmonics per input"):
        design_schedule(_lim(-1, 1), kind="multisine", band_hz=5.0, **SMALL)


def test_pulse_rate_too_high_is_refused():
    with pytest.raises(InvalidParameterError, match="pulse_rate_hz 150 is too high"):
        design_schedule(_lim(-1, 1), kind="pulses", pulse_rate_hz=150.0, **SMALL)


@pytest.mark.parametrize("kw, match", [
    (dict(kind="chirp"), "kind must be one of"),
    (dict(limits={"lo": -1.0, "hi": 1.0}), "limits must be a StimLimits"),
    (dict(order=2.5), "order must be a whole number >= 1"),
    (dict(sample_rate_hz=-5.0), "sample_rate_hz must be positive"),
    (dict(rest_s=-1.0), "rest_s must be >= 0"),
    (dict(kind="multilevel", n_levels=1), "n_levels must be a whole number >= 2"),
])
def test_bad_arguments_are_refused(kw, match):
    args = {**SMALL, "kind": "prbs", "limits": _lim(-1.0, 1.0), **kw}
    with pytest.raises(InvalidParameterError, match=match):
        design_schedule(**args)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    kind=st.sampled_from(SCHEDULE_KINDS),
    m=st.integers(1, 3),
    order=st.integers(1, 8),
    below=st.floats(0.0, 1.0, allow_nan=False),
    width=st.floats(0.5, 150, allow_nan=False),
    slew_frac=st.one_of(st.none(), st.floats(0.05, 2.0)),
    budget=st.one_of(st.none(), st.floats(1.0, 1e6)),
    seed=st.integers(0, 2 ** 31),
)
def test_schedules_never_exceed_the_declared_limits(kind, m, order, below, width, slew_frac, budget, seed):
    # property test (task brief): every schedule that is produced respects amplitude, slew and energy limits;
    # impossible requests raise a toolkit error instead. The window holds zero (`below` of it under zero), as
    # every StimLimits window does.
    lo_v = np.full(m, -below * width)
    hi_v = lo_v + width
    slew = None if slew_frac is None else np.full(m, slew_frac * width)
    try:
        s = design_schedule(_lim(lo_v, hi_v, slew, budget, n_inputs=m), order=order, kind=kind,
                            sample_rate_hz=100.0, trial_s=0.5, rest_s=0.1, seed=seed, n_iter=5)
    except (LimitsError, ExcitationError):
        return
    _assert_within(s, lo_v, hi_v, slew, budget, s.energy_window_steps)
    assert s.excitation.exciting


# ------------------------------------------------------------------------------------------------ files
def test_schedule_file_round_trips_exactly(tmp_path, seed):
    s = design_schedule(_lim(LO, HI, SLEW, names=["site_a", "site_b", "c"]), kind="multisine", seed=seed, **SMALL)
    path = save_schedule(s, tmp_path / "next.csv")
    u, trials, names, units, rate = load_schedule(path)
    np.testing.assert_array_equal(u, s.u)
    np.testing.assert_array_equal(trials, s.trials)
    assert names == ("site_a", "site_b", "c") and units == ("uA",) * 3 and rate == 200.0
    with pytest.raises(FileFormatError, match="already exists"):
        save_schedule(s, path)
    save_schedule(s, path, overwrite=True)


def test_schedule_text_is_what_pandas_writes(rng):
    # the writer formats each distinct value once; the reference is pandas' own CSV writer (DataFrame.to_csv)
    import io

    import pandas as pd

    from stimsteer.control.schedule_files import _csv_text

    odd = np.array([0.0, -0.0, 1e-5, 1.5e-4, 1e16, 1.234e20, 1.2345678901234568e17, np.nan, np.inf, -np.inf, 0.1,
                    1 / 3, 100.0, 5e-324, 1.7976931348623157e308, 2.0 ** 53])
    cols = {"time [s] @ 250 Hz": np.arange(16) / 250, "trial": np.arange(16) - 3, "in:a,b [uA]": odd,
            'in:c"d [mV]': rng.standard_normal(16), "in:e [uA]": np.tile([0.0, 16.394436, -0.0, 0.0], 4)}
    text = io.StringIO()
    pd.DataFrame(cols).to_csv(text, index=False)
    assert _csv_text(cols) == text.getvalue()


def test_a_session_table_is_read_as_its_input_side(tmp_path, rng):
    from stimsteer.sysid.io import save_session
    from stimsteer.sysid.session import Session

    sess = Session(u=rng.standard_normal((50, 2)), y=rng.standard_normal((50, 1)), sample_rate_hz=100.0,
                   trials=[(0, 20), (25, 50)], input_units=["uA", "uA"])
    save_session(sess, tmp_path / "s.csv")
    u, trials, names, units, rate = load_schedule(tmp_path / "s.csv")
    np.testing.assert_array_equal(u, sess.u)
    np.testing.assert_array_equal(trials, sess.trials)
    assert names == ("u0", "u1") and rate == 100.0


@pytest.mark.parametrize("text, match", [
    ("time [s] @ 10 Hz,trial\n0,0\n", r"missing \['in:<name> \[<unit>\]'\]"),
    ("time [s] @ 10 Hz,trial,in:a [uA],extra\n0,0,1,2\n", "column 'extra' is not recognised"),
    ("time [s] @ 10 Hz,trial,in:a [uA]\n", "header but no rows"),
    ("time [s] @ 10 Hz,trial,in:a [uA]\n0,0,1\n0.5,0,1\n", "not on a uniform 10 Hz grid"),
    # the second data row, counted from 1 as the session tables count it
    ("time [s] @ 10 Hz,trial,in:a [uA]\n0,0,1\n0.1,0,\n", r"no finite value at data row 2 \(counted from 1"),
    ("time [s] @ 10 Hz,trial,in:a [uA]\n0,-1,1\n0.1,-1,1\n", "trials must be labelled"),
    ("time [s] @ 10 Hz,trial,in:a [uA]\n0,0,1\n0.1,1,1\n0.2,0,1\n", "contiguous"),
    ("time [s] @ 10 Hz,trial,in:a [ ]\n0,0,1\n", "needs an input name and a unit"),
    ("time [s] @ x Hz,trial,in:a [uA]\n0,0,1\n", "is not a number"),
    ("time [s],trial,in:a [uA]\n0,0,1\n", "cannot tell the sampling rate"),
    ("", "not a readable CSV schedule"),
])
def test_bad_schedule_files_get_clear_errors(tmp_path, text, match):
    path = tmp_path / "bad.csv"
    path.write_text(text)
    before = path.read_bytes()
    with pytest.raises(FileFormatError, match=match):
        load_schedule(path)
    assert path.read_bytes() == before


def test_infinite_slew_means_no_limit_on_that_input(seed):
    s = design_schedule(_lim(LO, HI, [np.inf, 25.0, np.inf]), kind="prbs", seed=seed, **SMALL)
    _assert_within(s, LO, HI, [np.inf, 25.0, np.inf])
    assert np.max(np.abs(np.diff(s.u[:, 0]))) == pytest.approx(80.0)  # full-range jumps where unlimited
    assert design_schedule(_lim(LO, HI, np.inf), kind="prbs", **SMALL).slew is None


def test_a_switched_off_input_is_named_in_the_error():
    with pytest.raises(LimitsError, match="input 1 .* switched off"):
        design_schedule(_lim([-1.0, 0.0, -1.0], [1.0, 0.0, 1.0]), kind="prbs", **SMALL)


def test_the_final_guard_refuses_any_limit_violation():
    from stimsteer.control.schedule import _check_limits

    base = np.array([0.0])
    ok = np.array([[0.5], [0.0], [-0.5]])
    _check_limits(ok, _lim(-1.0, 1.0, 0.5, 0.6, n_inputs=1), base, 2)
    with pytest.raises(InfeasiblePlanError, match="left its amplitude bounds"):
        _check_limits(np.array([[1.5]]), _lim(-1.0, 1.0, n_inputs=1), base, None)
    with pytest.raises(InfeasiblePlanError, match="broke its slew limit"):
        _check_limits(np.array([[0.6]]), _lim(-1.0, 1.0, 0.5, n_inputs=1), base, None)
    with pytest.raises(InfeasiblePlanError, match="broke its energy budget"):
        _check_limits(ok, _lim(-1.0, 1.0, 0.5, 0.2, n_inputs=1), base, 2)


def test_non_numeric_durations_are_refused():
    with pytest.raises(InvalidParameterError, match="trial_s must be a number"):
        design_schedule(_lim(-1, 1), kind="prbs", **{**SMALL, "trial_s": "long"})


def test_a_name_that_cannot_be_a_column_header_is_refused(tmp_path):
    s = design_schedule(_lim(-1, 1, names=["a[1]", "b", "c"]), kind="prbs", **SMALL)
    with pytest.raises(FileFormatError, match="cannot be written as 'in:<name> \\[<unit>\\]'"):
        save_schedule(s, tmp_path / "s.csv")
    assert not (tmp_path / "s.csv").exists()


@pytest.mark.parametrize("text, match", [
    ("time [s] @ 10 Hz,trial,in:a [uA]\n0,0.5,1\n", "must hold whole numbers"),
    ("time [s] @ 10 Hz,trial,in:a [uA]\n,0,1\n", "needs a finite time"),
    ("time [s] @ -10 Hz,trial,in:a [uA]\n0,0,1\n", "must be positive"),
])
def test_more_bad_schedule_files(tmp_path, text, match):
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(FileFormatError, match=match):
        load_schedule(path)


def test_prbs_with_held_bits_ramps_at_the_slew_limit_to_wider_levels():
    # with bits held 4 samples and a slew of 10 per sample, a switch can span 40 (ramping 4 samples at the limit),
    # so the levels are ±20 instead of the ±5 a single-sample switch allows (arithmetic of the declared limits)
    s = design_schedule(_lim([-50.0], [50.0], [10.0], n_inputs=1), order=8, kind="prbs", hold_steps=4,
                        sample_rate_hz=100.0, n_trials=4, trial_s=2.0, rest_s=0.5, seed=5)
    assert np.max(s.u) == pytest.approx(20.0) and np.min(s.u) == pytest.approx(-20.0)
    assert np.max(np.abs(np.diff(np.vstack([[0.0], s.u]), axis=0))) <= 10.0


def test_a_schedule_file_opens_with_the_caution_and_reads_back(tmp_path):
    # a schedule is stimulation to deliver, so its file carries the project's caution (project rule)
    from stimsteer.sysid.caution import CAUTION
    s = design_schedule(_lim([-1.0], [1.0], n_inputs=1), order=4, sample_rate_hz=100.0, n_trials=2, trial_s=1.0,
                        rest_s=0.2, seed=2)
    path = save_schedule(s, tmp_path / "s.csv")
    assert path.read_text().splitlines()[0] == f"# {CAUTION}"
    u, trials, names, units, rate = load_schedule(path)
    np.testing.assert_array_equal(u, s.u)
    assert rate == 100.0


def test_slew_pass_gives_numpys_clip_sample_by_sample_bit_for_bit():
    # the reference is the per-sample np.clip loop the pass replaced (signed zeros and unbounded inputs included)
    from stimsteer.control.schedule import _project_slew

    rng = np.random.default_rng(5)
    for _ in range(20):
        n, m = int(rng.integers(1, 400)), int(rng.integers(1, 4))
        u = rng.normal(size=(n, m)) * rng.choice([1e-3, 1.0, 50.0])
        u[rng.random(u.shape) < 0.1] = 0.0
        u[rng.random(u.shape) < 0.05] *= -0.0
        base, slew = rng.normal(size=m) * rng.choice([0.0, 1.0]), np.abs(rng.normal(size=m)) * rng.choice([0.01, 1.0])
        slew[rng.random(m) < 0.2] = np.inf
        want, prev = np.empty_like(u), base.copy()
        for t in range(n):
            prev = np.clip(u[t], prev - slew, prev + slew)
            want[t] = prev
        got = _project_slew(u, base, slew)
        np.testing.assert_array_equal(got.view(np.int64), want.view(np.int64))
        assert np.all(np.abs(np.diff(np.vstack([base, got]), axis=0)) <= slew + 1e-12)  # up to rounding
