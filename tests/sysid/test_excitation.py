"""Tests of stimsteer.sysid.excitation: orders of persistency of excitation, the report and the fit-time check.

Orders known by construction: white noise over N columns has full row rank at every depth with at least as many
columns as rows (with probability one; common practice, no source); a signal that is identically zero excites
nothing; a pulse every P samples repeats with period P, so its Hankel rows repeat after P (checked in
tests/reference/test_willems_reference.py with its source).
"""

import warnings

import numpy as np
import pytest

from stimsteer.sysid import ExcitationError, ExcitationWarning, Session, SessionError
from stimsteer.sysid.excitation import (
    ExcitationReport,
    check_excitation,
    excitation_report,
    hankel_rank,
    numerical_rank,
    pe_order,
    rank_tolerance,
    required_order,
)


def _pulses(n, period, m=1):
    u = np.zeros((n, m))
    u[::period] = 1.0
    return u


def test_rank_tolerance_follows_the_stated_rule():
    eps = np.finfo(float).eps
    assert rank_tolerance([3.0, 1.0], (4, 100), tol_factor=2.0) == pytest.approx(3.0 * 100 * eps * 2.0)
    # a singular value just above / below the tolerance (numpy's rule at tol_factor = 1)
    M = np.diag([1.0, 1e-13, 1e-17])
    assert numerical_rank(M, tol_factor=1.0) == 2
    assert numerical_rank(M, tol_factor=1.0) == np.linalg.matrix_rank(M)
    assert numerical_rank(np.zeros((3, 4))) == 0


def test_white_noise_is_exciting_up_to_the_column_limit(rng):
    # 2 inputs, 60 samples: depth L has 61 - L columns and 2 L rows, full rank needs 61 - L >= 2 L -> L <= 20
    u = rng.standard_normal((60, 2))
    assert pe_order(u, max_order=40) == 20
    assert pe_order(u, max_order=7) == 7  # capped: "at least 7"
    assert hankel_rank(u, 20) == 40 and hankel_rank(u, 21) == 40


def test_a_constant_input_excites_order_one_and_zero_excites_nothing():
    assert pe_order(np.ones((50, 1)), max_order=10) == 1
    assert pe_order(np.zeros((50, 1)), max_order=10) == 0


def test_collective_order_exceeds_the_per_trial_orders(rng):
    u = rng.standard_normal((12 * 10, 1))
    segs = [(10 * i, 10 * i + 10) for i in range(12)]
    # one trial of 10 samples: 11 - L >= L -> L <= 5; twelve trials: 12 (11 - L) >= L -> L <= 10
    assert pe_order(u, [segs[0]], max_order=30) == 5
    assert pe_order(u, segs, max_order=30) == 10


def test_required_order_adds_the_window_and_the_states():
    assert required_order(10, 20, 1) == 31
    assert required_order(10, 20) == 40  # n assumed = past window
    with pytest.raises(SessionError, match="n_states must be >= 0"):
        required_order(10, 20, -1)
    with pytest.raises(SessionError, match="past_steps must be a whole number"):
        required_order(0, 20)
    with pytest.raises(SessionError, match="horizon_steps must be a whole number"):
        required_order(3, 2.5)


def _pulse_session(rng, period=7):
    u = _pulses(400, period)
    y = rng.standard_normal((400, 2))
    return Session(u=u, y=y, sample_rate_hz=1000.0, trials=[(0, 200), (200, 400)])


def test_report_on_a_fixed_rate_pulse_train_says_what_to_change(rng):
    rep = excitation_report(_pulse_session(rng), past_steps=10, horizon_steps=20, n_states=1)
    assert isinstance(rep, ExcitationReport)
    assert rep.trial_orders == (7, 7) and rep.collective_order == 7
    assert rep.required_order == 31 and rep.window_steps == 30 and not rep.ok and not rep.defined
    assert rep.message.startswith("the input excites order 7 but the direct route needs 31 for this horizon")
    assert "`stimsteer schedule`" in rep.message
    text = rep.to_text()
    assert "order per trial: 7, 7" in text and "warning:" in text


def test_report_between_the_window_and_the_required_order_warns_of_unreliable_predictions(rng):
    rep = excitation_report(_pulse_session(rng, period=7), past_steps=2, horizon_steps=3, n_states=4)
    assert rep.collective_order == 7 and rep.required_order == 9 and rep.defined and not rep.ok
    assert rep.message == ("the input excites order 7 but the direct route needs 9 for this horizon; predictions "
                           "will be unreliable. Use a longer or richer stimulation schedule (`stimsteer schedule`).")


def test_report_on_rich_data_is_ok_and_capped_at_the_required_order(rng):
    s = Session(u=rng.standard_normal((600, 2)), y=rng.standard_normal((600, 1)), sample_rate_hz=1.0,
                trials=[(0, 300), (300, 600)])
    rep = excitation_report(s, past_steps=3, horizon_steps=5)
    assert rep.ok and rep.n_states_assumed and rep.n_states == 3
    assert rep.collective_order == rep.max_checked == 11 and rep.trial_orders == (11, 11)
    assert ">=11" in rep.to_text() and "rich enough" in rep.message


def test_report_per_trial_respects_the_mask(rng):
    u = rng.standard_normal((100, 1))
    mask = np.ones(100, bool)
    mask[5:50] = False  # trial 0 keeps [0,5): 5 samples -> 6 - L >= L -> order 3
    s = Session(u=u, y=u.copy(), sample_rate_hz=1.0, trials=[(0, 50), (50, 100)], mask=mask)
    rep = excitation_report(s, past_steps=5, horizon_steps=5, n_states=0)
    assert rep.trial_orders[0] == 3


def test_check_excitation_warns_with_the_numbers(rng):
    s = _pulse_session(rng, period=7)
    with pytest.warns(ExcitationWarning, match="excites order 7 but the direct route needs 9"):
        assert check_excitation(s, past_steps=2, horizon_steps=3, n_states=4) == 7


def test_check_excitation_raises_when_the_data_matrix_is_rank_deficient(rng):
    with pytest.raises(ExcitationError, match="excites order 7 but the direct route needs at least 30"):
        check_excitation(_pulse_session(rng), past_steps=10, horizon_steps=20)


def test_check_excitation_raises_when_the_window_exceeds_every_trial(rng):
    s = Session(u=rng.standard_normal((40, 1)), y=rng.standard_normal((40, 1)), sample_rate_hz=1.0,
                trials=[(0, 20), (20, 40)])
    with pytest.raises(SessionError, match=r"\(10 \+ 15 = 25 samples\) is longer than every valid segment"):
        check_excitation(s, past_steps=10, horizon_steps=15)


def test_check_excitation_is_silent_on_rich_data(rng):
    s = Session(u=rng.standard_normal((500, 2)), y=rng.standard_normal((500, 1)), sample_rate_hz=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert check_excitation(s, past_steps=3, horizon_steps=4, n_states=2) == 9


def test_pe_order_rejects_a_non_positive_cap():
    with pytest.raises(SessionError, match="max_order must be at least 1"):
        pe_order(np.ones(10), max_order=0)


def test_report_rejects_a_session_without_valid_samples():
    s = Session(u=np.zeros((10, 1)), y=np.zeros((10, 1)), sample_rate_hz=1.0, mask=np.zeros(10, bool))
    with pytest.raises(SessionError, match="no valid in-trial samples"):
        excitation_report(s, past_steps=1, horizon_steps=1)


def test_inspect_command_prints_the_excitation_report(rng, tmp_path, capsys):
    from stimsteer.control.cli import main
    from stimsteer.sysid.io import save_session

    path = tmp_path / "pulses.h5"
    save_session(_pulse_session(rng, period=7), path)
    assert main(["inspect", str(path), "--past-steps", "10", "--horizon-steps", "20", "--states", "1"]) == 0
    out = capsys.readouterr().out
    assert "order per trial: 7, 7" in out
    assert "the input excites order 7 but the direct route needs 31 for this horizon" in out
    capsys.readouterr()
    with pytest.raises(SystemExit) as exc:  # the command line refuses the window itself, naming the flag
        main(["inspect", str(path), "--past-steps", "0"])
    assert exc.value.code == 2
    assert "argument --past-steps: expected a whole number >= 1; got 0" in capsys.readouterr().err


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_report_orders_equal_pe_order_per_trial_and_collectively(seed):
    # The report computes each trial's factor once and combines them for the collective order; the orders must be
    # those of pe_order on each trial's segments and on all of them (the definition). Trials here: white noise;
    # a period-4 pattern on 2 inputs (its columns span 4 dimensions, so depth 2 = 4 rows at most: order 2); white
    # noise cut by masked gaps into short segments; the same constant on both inputs (rank 1 < 2 rows: order 0);
    # and one trial masked except for a few samples.
    rng = np.random.default_rng(seed)
    length, m = 300, 2
    u = rng.standard_normal((5 * length, m))
    u[length:2 * length] = np.tile([[1.0, 0.0], [0.0, 0.0], [0.0, 1.0], [0.0, 0.0]], (length // 4, 1))
    u[3 * length:4 * length] = 0.5
    mask = np.ones(5 * length, dtype=bool)
    mask[2 * length + 40:2 * length + 300:45] = False
    mask[4 * length:5 * length - 6] = False
    s = Session(u=u, y=rng.standard_normal((5 * length, 1)), sample_rate_hz=100.0, mask=mask,
                trials=[(i * length, (i + 1) * length) for i in range(5)])
    rep = excitation_report(s, past_steps=4, horizon_steps=8)
    segs = s.segments()
    trial_of = [a // length for a, _ in segs]
    expected = [pe_order(u, [g for g, t in zip(segs, trial_of) if t == i], max_order=rep.required_order)
                for i in range(5)]
    assert list(rep.trial_orders) == expected
    assert rep.collective_order == pe_order(u, segs, max_order=rep.required_order)
    assert expected[1] == 2 and expected[3] == 0 and rep.collective_order >= max(expected)


# ------------------------------------------------------------------------------------------------ Gram route
# The reference of these checks is the earlier route of check_excitation: pe_order on the streamed QR factor.
def _trials_session(u, n_trials):
    n = u.shape[0]
    edges = np.linspace(0, n, n_trials + 1).astype(int)
    return Session(u=u, y=np.zeros((n, 1)), sample_rate_hz=1.0, trials=list(zip(edges[:-1], edges[1:])))


def test_check_excitation_decides_rich_data_from_the_gram_without_a_qr(rng, monkeypatch):
    from stimsteer.sysid import excitation

    s = _trials_session(rng.standard_normal((3000, 3)) + 2.0, 6)  # one-signed mean, as pulse amplitudes
    u, segs, _ = excitation._segments_by_trial(s)
    reference = pe_order(u, segs, max_order=40)  # earlier route: the QR factor
    assert reference == 40

    def no_qr(*args, **kwargs):
        raise AssertionError("the QR route was taken although the Gram proves full rank")

    monkeypatch.setattr(excitation, "row_space_factor", no_qr)
    assert check_excitation(s, past_steps=10, horizon_steps=20, n_states=10) == reference


def test_gram_check_leaves_deficient_and_nearly_deficient_inputs_to_the_qr_route(rng):
    from stimsteer.sysid.excitation import _gram_proves_full_rank

    u = rng.standard_normal((2000, 3))
    segs = [(0, 1000), (1000, 2000)]
    assert _gram_proves_full_rank(u, segs, 30)
    dependent = u.copy()
    dependent[:, 2] = dependent[:, 0] - dependent[:, 1]  # rank 2 per sample: deficient at every depth
    assert not _gram_proves_full_rank(dependent, segs, 30)
    near = u.copy()
    near[:, 2] = near[:, 0] + 1e-9 * rng.standard_normal(2000)  # σ_min ~ 1e-9 σ_max: full rank, but not in a Gram
    assert not _gram_proves_full_rank(near, segs, 5)
    s = _trials_session(near, 2)
    u2, segs2 = near, [(0, 1000), (1000, 2000)]
    assert check_excitation(s, past_steps=2, horizon_steps=3, n_states=0) == pe_order(u2, segs2, max_order=5) == 5
    with pytest.raises(ExcitationError):
        check_excitation(_trials_session(dependent, 2), past_steps=2, horizon_steps=3, n_states=0)
