"""Pooled verdicts of a study: DerSimonian–Laird random effects, the practical margin, Kendall's W."""

import numpy as np
import pytest
from scipy import stats

from stimsteer.control.study import kendall_w, margin_verdict, random_effects
from stimsteer.sysid import InvalidParameterError

combine_effects = pytest.importorskip("statsmodels.stats.meta_analysis").combine_effects


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_pooled_estimate_and_interval_equal_statsmodels_dl_when_subjects_differ(seed):
    # Outside check: statsmodels.stats.meta_analysis.combine_effects(method_re="dl") (Seabold & Perktold 2010,
    # statsmodels), the DerSimonian & Laird (1986) one-step moment estimator, on the same effects and variances.
    rng = np.random.default_rng(seed)
    k = 8
    var = rng.uniform(1e-4, 4e-4, k)
    eff = rng.normal(0.01, 0.03, k) + rng.normal(0, np.sqrt(var))  # spread well above the within variances
    ours = random_effects(eff, var)
    sm = combine_effects(eff, var, method_re="dl", use_t=False)
    assert sm.tau2 > 0  # the case where both estimators agree term by term
    lo, hi = sm.conf_int(use_t=False)[1]  # [fixed, random, ...]: the random-effects row
    assert ours.estimate == pytest.approx(sm.mean_effect_re, rel=1e-12, abs=1e-15)
    assert ours.se == pytest.approx(sm.sd_eff_w_re, rel=1e-12)
    assert (ours.ci_low, ours.ci_high) == pytest.approx((lo, hi), rel=1e-12)
    assert ours.tau2 == pytest.approx(sm.tau2, rel=1e-12)
    assert ours.q == pytest.approx(sm.q, rel=1e-12)
    assert ours.i2 == pytest.approx(sm.i2, rel=1e-12)


def test_between_subject_variance_is_truncated_at_zero_as_dersimonian_laird_state():
    # DerSimonian & Laird (1986) set tau² = max(0, ·); statsmodels keeps the negative moment estimate. With
    # tau² = 0 the random-effects estimate is the fixed-effect one, which statsmodels also reports.
    eff, var = np.array([0.10, 0.11, 0.105]), np.array([0.01, 0.02, 0.01])
    ours = random_effects(eff, var)
    sm = combine_effects(eff, var, method_re="dl", use_t=False)
    assert sm.tau2 < 0 and ours.tau2 == 0.0 and ours.i2 == 0.0
    assert ours.estimate == pytest.approx(sm.mean_effect_fe, rel=1e-12)
    assert (ours.ci_low, ours.ci_high) == pytest.approx(tuple(sm.conf_int(use_t=False)[0]), rel=1e-12)


def test_random_effects_refuses_what_it_cannot_pool():
    with pytest.raises(InvalidParameterError, match="at least two effects"):
        random_effects([0.1], [0.01])
    with pytest.raises(InvalidParameterError, match="variances > 0"):
        random_effects([0.1, 0.2], [0.01, 0.0])


@pytest.mark.parametrize("lo, hi, expected", [
    (0.002, 0.01, "direct"), (-0.01, -0.002, "indirect"), (-5e-4, 8e-4, "equivalent"),
    (2e-4, 3e-3, "small"), (-3e-3, 4e-3, "undecided"), (float("nan"), 1.0, "undecided")])
def test_margin_verdict_names_the_interval_against_the_practical_margin(lo, hi, expected):
    # the practical margin of the single-session benchmark: |dR²| < 1e-3 (common practice, no source)
    assert margin_verdict(lo, hi, 1e-3, "direct", "indirect") == expected


def test_kendall_w_equals_friedman_statistic_over_m_times_n_minus_one():
    # Outside check: W = chi²_Friedman / (m (n − 1)) (Kendall & Babington Smith 1939; Friedman 1937), with scipy's
    # friedmanchisquare on the same scores (subjects as blocks, sites as treatments; no ties).
    rng = np.random.default_rng(5)
    scores = rng.normal(size=(9, 4)) + np.array([0.0, 0.5, 1.0, 1.5])
    chi2 = stats.friedmanchisquare(*scores.T).statistic
    assert kendall_w(scores) == pytest.approx(chi2 / (9 * 3), rel=1e-12)
    assert kendall_w(np.tile([3.0, 1.0, 2.0], (5, 1))) == pytest.approx(1.0)
