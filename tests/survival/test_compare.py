"""Is cohort A worse than B: the exact conditional rate ratio, the age-adjusted hazard ratio,
each cohort against the rest of the fleet, and the cohort table's failures and replacements."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from tests.survival.fleetsim import truncated_weibull
from tests.survival.test_observations import T0, build, nightly, removal
from triage.survival.cohorts import cohort_table
from triage.survival.compare import age_adjusted_hazard_ratio, compare_cohorts, rate_ratio, versus_fleet


@pytest.mark.parametrize("k_a, t_a, k_b, t_b", [(29, 3_650.0, 10, 3_650.0), (3, 1_000.0, 12, 9_000.0),
                                                (0, 500.0, 7, 2_000.0), (15, 800.0, 0, 4_000.0)])
def test_rate_ratio_limits_are_clopper_pearson_on_the_conditional_proportion(k_a, t_a, k_b, t_b):
    from scipy.stats import binomtest

    ours = rate_ratio(k_a, t_a, k_b, t_b)
    # k_A given n is Binomial(n, RR t_A / (RR t_A + t_B)); scipy's exact (Clopper-Pearson)
    # interval of that proportion, mapped back with RR = pi / (1 - pi) * t_B / t_A
    ci = binomtest(k_a, k_a + k_b).proportion_ci(confidence_level=0.95, method="exact")
    back = lambda pi: pi / (1 - pi) * t_b / t_a if pi < 1 else math.inf  # noqa: E731
    assert ours.rate_ratio_low == pytest.approx(back(ci.low), rel=1e-9, abs=1e-12)
    assert ours.rate_ratio_high == pytest.approx(back(ci.high), rel=1e-9)


@pytest.mark.parametrize("k_a, t_a, k_b, t_b", [(29, 3_650.0, 10, 3_650.0), (3, 1_000.0, 12, 9_000.0),
                                                (0, 500.0, 7, 2_000.0), (40, 20_000.0, 31, 21_000.0)])
def test_rate_ratio_p_value_is_the_exact_conditional_test_of_statsmodels(k_a, t_a, k_b, t_b):
    from statsmodels.stats.rates import test_poisson_2indep

    ours = rate_ratio(k_a, t_a, k_b, t_b)
    # statsmodels' exact conditional test (binomial, two-sided "minlike"), an independent implementation
    reference = test_poisson_2indep(k_a, t_a, k_b, t_b, method="exact-cond")
    assert ours.p_value == pytest.approx(reference.pvalue, rel=1e-9)
    if k_b:
        assert ours.rate_ratio == pytest.approx((k_a / t_a) / (k_b / t_b))


def _two_cohorts(seed=3, n=600, log_hr=math.log(2.5)):
    """Cohort A (indicator 1) with hazard ratio 2.5 against B, Weibull shape 1.6, delayed entry."""
    rng = np.random.default_rng(seed)
    in_a = np.arange(n) < n // 2
    entry = rng.uniform(0, 3 * 8766, n)
    failure = truncated_weibull(rng, entry, 1.6, 40_000.0, np.where(in_a, log_hr, 0.0))
    end = entry + 365 * 24
    return entry, np.minimum(failure, end), failure <= end, in_a


def test_age_adjusted_hazard_ratio_matches_statsmodels_phreg_with_delayed_entry():
    from statsmodels.duration.hazard_regression import PHReg

    entry, exit_, event, in_a = _two_cohorts()
    hr, low, high = age_adjusted_hazard_ratio(entry, exit_, event, in_a)
    # statsmodels PHReg with entry= (left truncation) and Efron ties
    reference = PHReg(exit_, in_a[:, None].astype(float), status=event.astype(float), entry=entry,
                      ties="efron").fit()
    coef, se = reference.params[0], reference.bse[0]
    assert math.log(hr) == pytest.approx(coef, rel=1e-6)
    assert math.log(low) == pytest.approx(coef - 1.959963984540054 * se, rel=1e-5)
    assert math.log(high) == pytest.approx(coef + 1.959963984540054 * se, rel=1e-5)


def _periods_fleet():
    """Hand-built: QHF1 runs QF12 10 nights then QF14 10 nights and fails; QHF2 runs QF12 and is
    pulled (proactive); QHF3 runs QF12, fails, comes back and is watched on; QHF4 runs QF14."""
    back = nightly("QHF3", 1_200, nights=5, firmware="QF12")
    back["taken_at"] += pd.Timedelta(days=12)  # 03-13 .. 03-17
    snaps = pd.concat([
        nightly("QHF1", 1_000, nights=20, firmware=["QF12"] * 10 + ["QF14"] * 10),
        nightly("QHF2", 2_000, nights=10, firmware="QF12"),
        nightly("QHF3", 1_000, nights=8, firmware="QF12"),
        back,
        nightly("QHF4", 500, nights=20, firmware="QF14"),
    ])
    removals = pd.concat([
        removal("QHF1", "2026-03-20T14:00:00Z", "failed"),
        removal("QHF2", "2026-03-10T14:00:00Z", "proactive"),
        removal("QHF3", "2026-03-08T14:00:00Z", "failed"),
        removal("QHF3", "2026-03-09T10:00:00Z", "retired"),  # the same pull, logged twice
    ])
    return build(snaps, removals, by=("model", "firmware"))


def test_cohort_table_counts_failures_and_replacements_per_firmware_period():
    table = cohort_table(_periods_fleet()).set_index("cohort")
    qf12, qf14 = table.loc["QH-HD8T-A / QF12"], table.loc["QH-HD8T-A / QF14"]
    # QF12: QHF1 10 d, QHF2 9.5 d (pulled), QHF3 7.5 d (failed) + 4 d after its return
    assert (qf12["drives"], qf12["failures"], qf12["replacements"]) == (3, 1, 2)
    assert qf12["drive_days"] == pytest.approx(10 + 9.5 + 7.5 + 4)
    # QF14: QHF1's last 9.5 d ending in its failure, QHF4 19 d
    assert (qf14["drives"], qf14["failures"], qf14["replacements"]) == (2, 1, 1)
    assert qf14["drive_days"] == pytest.approx(9.5 + 19)
    # AFR and ARR: events per drive-year of 365 days (the definition in afr.py)
    assert qf12["afr"] == pytest.approx(100 * 1 / (31 / 365))
    assert qf12["arr"] == pytest.approx(100 * 2 / (31 / 365))
    assert qf12["arr_low"] >= qf12["afr_low"] and qf12["arr_high"] >= qf12["afr_high"]


def test_compare_of_hand_built_cohorts_counts_each_side_exactly():
    obs = _periods_fleet()
    c = compare_cohorts(obs, "qh-hd8t-a / qf14", "QH-HD8T-A / QF12")  # labels match case-insensitively
    assert (c.a, c.b) == ("QH-HD8T-A / QF14", "QH-HD8T-A / QF12")
    assert (c.rates.failures_a, c.rates.failures_b) == (1, 1)
    assert c.rates.drive_days_a == pytest.approx(28.5) and c.rates.drive_days_b == pytest.approx(31.0)
    assert (c.drives_a, c.drives_b) == (2, 3)


def test_a_cohort_cannot_be_compared_with_itself():
    with pytest.raises(ValueError, match="two different cohorts"):
        compare_cohorts(_periods_fleet(), "QH-HD8T-A / QF12", "qh-hd8t-a / qf12")


def test_versus_fleet_is_each_cohorts_rate_ratio_against_all_the_others():
    obs = _periods_fleet()
    table = versus_fleet(obs).set_index("cohort")
    rest = rate_ratio(1, 31.0, 1, 28.5)  # QF12 against QF14, the only other cohort
    assert table.loc["QH-HD8T-A / QF12", "vs_fleet"] == pytest.approx(rest.rate_ratio)
    assert table.loc["QH-HD8T-A / QF12", "vs_fleet_p"] == pytest.approx(rest.p_value)


def test_a_crude_ratio_confounded_by_age_is_flagged():
    # Same hazard at the same age (true hazard ratio 1; shape 4, a steep wear-out), but cohort A
    # is watched at 2.5-5.5 years and B at 1.5-4.5 years: the crude rate ratio is large, the adjusted
    # one is not, and the comparison says the crude one is not to be trusted.
    rng = np.random.default_rng(11)
    frames, removals, nights = [], [], 120
    for label, lo, hi, prefix in (("QH-OLD", 2.5, 5.5, "QHO"), ("QH-NEW", 1.5, 4.5, "QHN")):
        entry = np.floor(rng.uniform(lo, hi, 800) * 8766)
        failure = truncated_weibull(rng, entry, 4.0, 50_000.0)
        for i, (a, f) in enumerate(zip(entry, failure)):
            seen = int(min(nights, (f - a) // 24 + 1))
            frames.append(nightly(f"{prefix}{i:04d}", a, nights=seen, model=label))
            if f - a < nights * 24:
                removals.append(removal(f"{prefix}{i:04d}", T0 + pd.Timedelta(hours=float(f - a)), "failed"))
    obs = build(pd.concat(frames), pd.concat(removals))
    c = compare_cohorts(obs, "QH-OLD", "QH-NEW")
    assert c.rates.rate_ratio_low > 1.2 and c.rates.p_value < 0.001  # crude: "A is worse"
    assert c.hazard_ratio_low < 1 < c.hazard_ratio_high
    assert c.age_confounded
