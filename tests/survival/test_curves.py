"""Kaplan-Meier / Nelson-Aalen with delayed entry, and the age-band hazard, against outside references."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from triage.survival.curves import AGE_BANDS, exposure_in_bands, hazard_by_age_band, survival_curves

# The 6-MP arm of the leukaemia remission trial (Freireich et al. 1963), weeks; "+" censored.
# Klein & Moeschberger, Survival Analysis, 2nd ed., section 1.2 data and table 4.1A.
SIX_MP_WEEKS = [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35]
SIX_MP_RELAPSED = [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0]


def six_mp_curves():
    weeks = np.array(SIX_MP_WEEKS, dtype=float)
    return survival_curves(np.zeros_like(weeks), weeks, np.array(SIX_MP_RELAPSED, dtype=bool))


def test_kaplan_meier_reproduces_the_textbook_6mp_table():
    curve = six_mp_curves().table.set_index("age_hours")
    # Klein & Moeschberger, 2nd ed., table 4.1A (product-limit estimate, 6-MP group); from memory
    published = {6: 0.857, 7: 0.807, 10: 0.753, 13: 0.690, 16: 0.627, 22: 0.538, 23: 0.448}
    for week, survival in published.items():
        assert curve.loc[week, "survival"] == pytest.approx(survival, abs=5e-4)


def test_nelson_aalen_reproduces_the_textbook_6mp_table():
    curve = six_mp_curves().table.set_index("age_hours")
    # Klein & Moeschberger, 2nd ed., table 4.2 (Nelson-Aalen, 6-MP group); from memory
    published = {6: 0.1429, 7: 0.2017, 10: 0.2683, 13: 0.3517, 16: 0.4426, 22: 0.5854, 23: 0.7521}
    for week, cumulative_hazard in published.items():
        assert curve.loc[week, "cumulative_hazard"] == pytest.approx(cumulative_hazard, abs=5e-4)


def test_kaplan_meier_risk_set_counts_match_the_textbook():
    curve = six_mp_curves().table.set_index("age_hours")
    # Klein & Moeschberger table 4.1A, column "number at risk": 21, 17, 15, 12, 11, 7, 6
    assert curve.loc[[6, 7, 10, 13, 16, 22, 23], "at_risk"].tolist() == [21, 17, 15, 12, 11, 7, 6]


def _left_truncated_sample(seed=3, n=300):
    rng = np.random.default_rng(seed)
    # entries end in .0, exits in .x5: no entry ties an exit, so the two libraries' conventions
    # for "entered at the same instant as a failure" never come into play
    entry = rng.uniform(0, 50, n).round(1)
    exit_ = entry + rng.exponential(30, n).round(1) + 0.05
    event = rng.uniform(size=n) < 0.7
    return entry, exit_, event


def test_delayed_entry_kaplan_meier_matches_statsmodels():
    from statsmodels.duration.survfunc import SurvfuncRight

    entry, exit_, event = _left_truncated_sample()
    ours = survival_curves(entry, exit_, event).table.iloc[1:].set_index("age_hours")
    # independent implementation: statsmodels SurvfuncRight with entry= (left truncation)
    theirs = SurvfuncRight(exit_, event, entry=entry)
    reference = pd.DataFrame({"survival": theirs.surv_prob, "at_risk": theirs.n_risk}, index=theirs.surv_times)
    reference = reference.loc[ours.index]
    np.testing.assert_allclose(ours["survival"], reference["survival"], rtol=1e-12)
    np.testing.assert_array_equal(ours["at_risk"], reference["at_risk"])


def test_ignoring_delayed_entry_overstates_early_survival():
    # Why left truncation matters: drives first seen old are not at risk at young ages. Treating
    # them as observed from age 0 puts them in every early risk set and dilutes early failures.
    entry, exit_, event = _left_truncated_sample()
    truncated = survival_curves(entry, exit_, event).table.set_index("age_hours")["survival"]
    naive = survival_curves(np.zeros_like(entry), exit_, event).table.set_index("age_hours")["survival"]
    age = 20.05 if 20.05 in truncated.index else truncated.index[len(truncated) // 4]
    assert naive.asof(age) > truncated.asof(age)


def test_confidence_band_brackets_the_estimate():
    table = six_mp_curves().table
    assert (table["survival_low"] <= table["survival"]).all()
    assert (table["survival"] <= table["survival_high"]).all()
    assert (table["cumulative_hazard_low"] <= table["cumulative_hazard"] + 1e-12).all()


def test_age_band_exposure_splits_a_drive_across_bands():
    # observed from 2,000 h to 9,000 h: 191.5 h in 0-3 months, 6,574.5 h in 3-12 months, 234 h after
    hours, failures = exposure_in_bands([2000.0], [9000.0], [True], [0, 2191.5, 8766, np.inf])
    np.testing.assert_allclose(hours, [191.5, 6574.5, 234.0])
    assert failures.tolist() == [0, 0, 1]


def test_age_band_hazard_matches_lifelines_piecewise_exponential_fit():
    from lifelines import PiecewiseExponentialFitter

    rng = np.random.default_rng(11)
    n = 4000
    entry = np.concatenate([rng.uniform(0, 3000, n // 4), rng.uniform(0, 40000, 3 * n // 4)])
    exit_ = np.minimum(entry + rng.exponential(30000, n), entry + 20000)
    event = (rng.uniform(size=n) < 0.6) & (exit_ < entry + 20000)
    ours = hazard_by_age_band(entry, exit_, event)
    # independent maximum-likelihood fit of the same piecewise-constant hazard with entry=
    year = 8766.0
    breakpoints = [band[2] / year for band in AGE_BANDS[:-1]]
    fitter = PiecewiseExponentialFitter(breakpoints=breakpoints).fit(exit_ / year, event, entry=entry / year)
    theirs = 100.0 / fitter.summary["coef"].to_numpy()  # lifelines: hazard = 1 / lambda_i per year
    # lifelines optimises numerically; the band estimate is closed form (failures / exposure)
    np.testing.assert_allclose(ours["hazard"], theirs, rtol=0.02)


def test_age_band_limits_are_garwood_limits_over_exposure():
    from scipy.stats import chi2

    table = hazard_by_age_band([0.0, 0.0], [8766.0, 8766.0], [True, False])
    row = table.iloc[1]  # 3-12 months holds the one failure at 8,766 h
    years = row["drive_days"] * 24 / 8766
    assert row["failures"] == 1
    # Garwood 1936 chi-square form via scipy.stats.chi2
    assert row["hazard_high"] == pytest.approx(100 * chi2.ppf(0.975, 4) / 2 / years)


def test_at_risk_counts_only_drives_that_entered_before_the_failure_age():
    # Risk set of the delayed-entry product-limit estimator: Y(t) = #{entry < t <= exit}
    # (Klein & Moeschberger, 2nd ed., 4.6). A drive entering exactly at t is not yet at risk.
    curves = survival_curves([0, 0, 0, 5], [5, 8, 9, 9], [True, False, False, False])
    row = curves.table.set_index("age_hours").loc[5.0]
    assert row["at_risk"] == 3
    assert row["survival"] == pytest.approx(1 - 1 / 3)


def test_curve_starts_where_enough_drives_are_at_risk_and_skips_an_unwatched_gap():
    # Three new replacement drives at 0-300 h (one fails at 120 h) beside forty drives bought at
    # 40,000-41,000 h: no drive is watched between, so survival cannot be carried across; the
    # curve covers the side with the most drive-hours, from the first age with 10 at risk.
    rng = np.random.default_rng(4)
    old_entry = np.sort(rng.uniform(40_000, 41_000, 40))
    old_exit = old_entry + rng.uniform(1_000, 3_000, 40)
    entry = np.r_[[0.0, 10.0, 20.0], old_entry]
    exit_ = np.r_[[120.0, 300.0, 300.0], old_exit]
    event = np.r_[[True, False, False], rng.uniform(size=40) < 0.2]
    curves = survival_curves(entry, exit_, event)
    start = curves.youngest_entry_hours
    assert start == old_entry[9]  # the tenth old drive's entry: ten at risk just after it
    first = curves.table.iloc[0]
    assert first["survival"] == 1.0 and first["at_risk"] == 10
    # the rest equals the delayed-entry product-limit estimate of statsmodels on that side,
    # conditional on reaching the start age (independent implementation)
    from statsmodels.duration.survfunc import SurvfuncRight

    keep = (entry >= 40_000) & (exit_ > start)
    theirs = SurvfuncRight(exit_[keep], event[keep], entry=np.maximum(entry[keep], start))
    ours = curves.table.set_index("age_hours")["survival"].iloc[1:]
    np.testing.assert_allclose(ours.to_numpy(), theirs.surv_prob[np.isin(theirs.surv_times, ours.index)])
