"""AFR and its exact Poisson limits, against published tables and an independent route in scipy."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.stats import chi2, poisson

from triage.survival.afr import afr_from_mttf, annualized_failure_rate, garwood_limits

# Gehrels, "Confidence limits for small numbers of events in astrophysical data", ApJ 303 (1986),
# Table 1 (upper) and Table 3 (lower), column CL = 0.975 -- a one-sided 97.5 % limit each way is
# the two-sided 95 % Garwood interval. Values from memory of those tables (3 decimals).
PUBLISHED_95 = {
    0: (0.0, 3.689),
    1: (0.0253, 5.572),
    2: (0.242, 7.225),
    3: (0.619, 8.767),
    5: (1.623, 11.668),
    10: (4.795, 18.390),
}


@pytest.mark.parametrize("events", sorted(PUBLISHED_95))
def test_garwood_limits_match_the_published_table(events):
    low, high = garwood_limits(events)
    published_low, published_high = PUBLISHED_95[events]
    assert float(low) == pytest.approx(published_low, abs=6e-4)  # Gehrels 1986, Tables 1 and 3
    assert float(high) == pytest.approx(published_high, abs=6e-4)


@pytest.mark.parametrize("events", [0, 1, 4, 17, 250])
def test_garwood_limits_equal_scipy_chi2_quantiles(events):
    low, high = garwood_limits(events)
    # Garwood (Biometrika 28, 1936) in chi-square form, computed here straight from scipy.stats.chi2
    expected_low = chi2.ppf(0.025, 2 * events) / 2 if events else 0.0
    expected_high = chi2.ppf(0.975, 2 * events + 2) / 2
    assert float(low) == pytest.approx(expected_low, rel=1e-12, abs=1e-12)
    assert float(high) == pytest.approx(expected_high, rel=1e-12)


@pytest.mark.parametrize("events", [1, 3, 12])
def test_garwood_limits_invert_the_poisson_tails(events):
    # Independent route: the exact limits are the means whose Poisson tails hold 2.5 % each
    # (definition in Garwood 1936), found by root search on scipy.stats.poisson.
    low, high = garwood_limits(events)
    root_low = brentq(lambda mu: poisson.sf(events - 1, mu) - 0.025, 1e-9, 100)
    root_high = brentq(lambda mu: poisson.cdf(events, mu) - 0.025, 1e-9, 100)
    assert float(low) == pytest.approx(root_low, rel=1e-8)
    assert float(high) == pytest.approx(root_high, rel=1e-8)


def test_zero_failures_give_a_finite_upper_limit():
    afr, low, high = annualized_failure_rate(0, drive_days=365 * 100)
    assert afr == 0 and low == 0
    # 100 drive-years, no failure: upper 95 % limit 3.689 / 100 per year (Gehrels 1986, Table 1)
    assert high == pytest.approx(3.689, abs=1e-3)


def test_afr_is_failures_per_drive_year_in_percent():
    afr, low, high = annualized_failure_rate(12, drive_days=365 * 600)
    assert afr == pytest.approx(12 / 600 * 100)  # AFR definition in the issue: failures / drive-years
    assert low < afr < high


def test_afr_without_observed_time_is_not_a_number():
    assert all(math.isnan(v) for v in annualized_failure_rate(0, 0.0))


def test_negative_or_fractional_counts_are_rejected():
    with pytest.raises(ValueError):
        garwood_limits(np.array([1.5]))
    with pytest.raises(ValueError):
        garwood_limits(-1)


def test_one_million_hour_mttf_means_about_0_88_percent_per_year():
    # Schroeder & Gibson, "Disk failures in the real world", FAST 2007, section 2: datasheet
    # MTTFs of 1,000,000 to 1,500,000 hours suggest AFRs of 0.58 % to 0.88 %.
    assert 0.87 <= afr_from_mttf(1_000_000) <= 0.88
    assert afr_from_mttf(1_500_000) == pytest.approx(0.58, abs=0.005)


def test_mttf_must_be_positive():
    with pytest.raises(ValueError):
        afr_from_mttf(0)
