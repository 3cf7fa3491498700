"""Models per condition and over sliding windows: the change between two known systems is found, with intervals."""

import numpy as np
import pytest

from stimsteer.sysid import Session, SessionError, InvalidParameterError
from stimsteer.sysid.conditions import (condition_change_table, fit_per_condition, sliding_window_fits, step_gains,
                                        trial_conditions)

ARX = {"output_lags": 1, "input_lags": 1, "delay_samples": 0, "alphas": (1e-4,)}
GAIN = {"A": 0.5 / (1 - 0.8), "B": 1.5 / (1 - 0.5)}  # step gains of the two first-order systems (known)


def _two_conditions(n_trials=8, length=120, seed=5):
    rng = np.random.default_rng(seed)
    u = rng.normal(size=(n_trials * length, 1))
    y = np.zeros((n_trials * length, 1))
    labels = ["A" if k % 2 == 0 else "B" for k in range(n_trials)]
    for k, c in enumerate(labels):
        a, b = (0.8, 0.5) if c == "A" else (0.5, 1.5)
        for t in range(k * length + 1, (k + 1) * length):
            y[t] = a * y[t - 1] + b * u[t]
    y = y + 0.01 * rng.standard_normal(y.shape)
    return Session(u=u, y=y, sample_rate_hz=100.0, trials=[(k * length, (k + 1) * length) for k in range(n_trials)],
                   metadata={"trial_conditions": labels})


@pytest.fixture(scope="module")
def session():
    return _two_conditions()


def test_per_condition_models_find_each_systems_gain(session):
    fits = fit_per_condition(session, method="arx", method_settings=ARX)
    assert fits.trials == {"A": (0, 2, 4, 6), "B": (1, 3, 5, 7)}
    for c in "AB":
        assert step_gains(fits.model_for(c), 200)[0, 0] == pytest.approx(GAIN[c], rel=0.02)


@pytest.mark.slow
def test_the_change_table_gives_intervals_that_hold_the_true_gains_and_separate(session):
    table = condition_change_table(session, method="arx", method_settings=ARX, n_members=10, horizon_steps=200)
    assert list(table["condition"]) == ["A", "B"] and (table["n_trials"] == 4).all()
    for _, row in table.iterrows():
        assert row["low"] <= row["step_gain"] <= row["high"]
        assert row["low"] - 0.05 <= GAIN[row["condition"]] <= row["high"] + 0.05
    a, b = table.iloc[0], table.iloc[1]
    assert a["high"] < b["low"]


def test_sliding_windows_give_a_model_sequence(session):
    seq = sliding_window_fits(session, method="arx", method_settings=ARX, window_trials=2, step_trials=2)
    assert [idx for idx, _ in seq] == [(0, 1), (2, 3), (4, 5), (6, 7)]
    with pytest.raises(InvalidParameterError, match="window_trials must be in"):
        sliding_window_fits(session, window_trials=9)


def test_too_few_trials_per_condition_are_refused_saying_how_many_are_needed():
    s = _two_conditions(n_trials=3)  # A, B, A: condition B has one trial
    with pytest.raises(SessionError, match=r"'B' has 1; each condition needs at least 2 trials"):
        fit_per_condition(s, method="arx", method_settings=ARX)
    with pytest.raises(SessionError, match="one per trial"):
        trial_conditions(s, ["A", "B"])
    with pytest.raises(SessionError, match="no condition labels"):
        trial_conditions(s.replace(metadata={}))


def _delayed_first_order(trial_length, n=2000, seed=0):
    rng = np.random.default_rng(seed)
    u = rng.normal(size=(n, 1))
    y = np.zeros((n, 1))
    for t in range(1, n):
        y[t] = 0.8 * y[t - 1] + 0.5 * u[t - 1]
    return Session(u=u, y=y, sample_rate_hz=100.0,
                   trials=[(k * trial_length, (k + 1) * trial_length) for k in range(n // trial_length)])


class _Limited:
    max_horizon_steps_ = 10


def test_the_gain_horizon_from_the_data_is_three_memories_at_most_a_trial_and_a_models_horizon():
    from stimsteer.sysid import gain_steps_from_data

    # impulse response 0.5·0.8^(k−1) for k >= 1 (by construction): above 10 % of its peak up to k = 11, since
    # 0.8^10 = 0.107 and 0.8^11 = 0.086 (the memory rule of stimsteer.sysid.window_defaults), so 3 x 11 samples
    steps, why = gain_steps_from_data(_delayed_first_order(200))
    assert steps == 33 and "memory of 11 samples" in why
    steps, why = gain_steps_from_data(_delayed_first_order(25))
    assert steps == 25 and why.endswith("cut to the shortest trial")
    steps, why = gain_steps_from_data(_delayed_first_order(200), [_Limited()])
    assert steps == 10 and why.endswith("cut to the longest horizon the model predicts")


def test_held_out_scores_compare_each_condition_model_with_a_pooled_one(session):
    from stimsteer.sysid import condition_heldout_scores
    from stimsteer.sysid.routes import make_estimator

    train, test = [0, 1, 2, 3, 4, 5], [6, 7]
    fits = fit_per_condition(session, method="arx", method_settings=ARX, trials=train)
    assert fits.trials == {"A": (0, 2, 4), "B": (1, 3, 5)}
    pooled = make_estimator("indirect", "arx", ARX).fit(session.select_trials(train))
    table = condition_heldout_scores(fits, session, pooled=pooled, trials=test)
    assert list(table["n_test"]) == [1, 1] and list(table["n_train"]) == [3, 3]
    assert (table["vaf_condition_model"] > 99.0).all()
    assert (table["vaf_condition_model"] > table["vaf_pooled_model"] + 5.0).all()
    with pytest.raises(InvalidParameterError, match="were used to fit"):
        condition_heldout_scores(fits, session, pooled=pooled, trials=[5, 6])
