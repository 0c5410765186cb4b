"""Weibull fit with delayed entry: against scipy, and recovery of known parameters."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.stats import weibull_min

from tests.survival.fleetsim import truncated_weibull
from triage.survival.weibull import (EARLY_LIFE, RANDOM, TOO_FEW, UNDETERMINED, WEAR_OUT, fit_weibull,
                                    phase_of)


def test_complete_data_fit_matches_scipy_weibull_min():
    rng = np.random.default_rng(5)
    ages = weibull_min.rvs(1.7, scale=40_000, size=800, random_state=rng)
    ours = fit_weibull(np.zeros_like(ages), ages, np.ones_like(ages, dtype=bool))
    # independent maximum-likelihood fit: scipy.stats.weibull_min.fit with the location fixed at 0
    shape, _, scale = weibull_min.fit(ages, floc=0)
    assert ours.shape == pytest.approx(shape, rel=1e-3)
    assert ours.scale == pytest.approx(scale, rel=1e-3)


def _truncated_censored(shape, scale, n=3000, seed=2):
    rng = np.random.default_rng(seed)
    entry = rng.uniform(0, 30_000, n)
    failure = truncated_weibull(rng, entry, shape, scale)
    end = entry + rng.uniform(2_000, 15_000, n)  # each drive watched for a limited window
    exit_ = np.minimum(failure, end)
    return entry, exit_, failure <= end


def test_delayed_entry_fit_matches_a_direct_scipy_maximisation():
    entry, exit_, event = _truncated_censored(1.4, 50_000)
    ours = fit_weibull(entry, exit_, event)

    # The left-truncated, right-censored Weibull log-likelihood written out from Klein &
    # Moeschberger, Survival Analysis, 2nd ed., section 3.5, maximised with scipy.optimize.
    def negative_loglik(params):
        k, lam = np.exp(params)
        t, a = exit_ / 8766, entry / 8766
        log_h = np.log(k / lam) + (k - 1) * np.log(t / lam)
        return -np.sum(event * log_h - (t / lam) ** k + (a / lam) ** k)

    best = minimize(negative_loglik, x0=[0.0, 1.0], method="Nelder-Mead",
                    options={"xatol": 1e-10, "fatol": 1e-10, "maxiter": 5000})
    shape, scale_years = np.exp(best.x)
    assert ours.shape == pytest.approx(shape, rel=1e-3)
    assert ours.scale == pytest.approx(scale_years * 8766, rel=1e-3)


@pytest.mark.parametrize("true_shape, phase", [(0.7, EARLY_LIFE), (2.5, WEAR_OUT)])
def test_known_shape_is_recovered_from_left_truncated_data(true_shape, phase):
    entry, exit_, event = _truncated_censored(true_shape, 40_000)
    fit = fit_weibull(entry, exit_, event)
    assert fit.shape_low < true_shape < fit.shape_high  # simulated truth inside the 95 % range
    assert fit.scale_low < 40_000 < fit.scale_high
    assert fit.phase == phase


def test_ignoring_delayed_entry_biases_the_shape():
    # Drives joining at up to 30,000 h with an increasing hazard: pretending they were watched
    # from hour 0 credits them with failure-free early hours they never showed.
    entry, exit_, event = _truncated_censored(2.5, 40_000)
    naive = fit_weibull(np.zeros_like(entry), exit_, event)
    assert not (naive.shape_low < 2.5 < naive.shape_high)


def test_exponential_lifetimes_read_as_random_failures():
    entry, exit_, event = _truncated_censored(1.0, 60_000, n=1500)
    assert fit_weibull(entry, exit_, event).phase == RANDOM


def test_phase_follows_the_shape_interval():
    assert phase_of(0.5, 0.9) == EARLY_LIFE
    assert phase_of(0.8, 1.2) == RANDOM
    assert phase_of(1.1, 1.9) == WEAR_OUT
    # a flat likelihood on one side leaves that limit unbounded; the other side still decides
    assert phase_of(1.3, math.inf) == WEAR_OUT
    assert phase_of(0.0, 0.8) == EARLY_LIFE


@pytest.mark.parametrize("low, high", [(0.0, math.inf), (0.42, 1.34), (0.9, 1.6), (0.6, 1.2)])
def test_a_range_across_1_reaching_past_the_random_band_is_undetermined(low, high):
    assert phase_of(low, high) == UNDETERMINED


def test_an_undetermined_phase_says_why():
    # 200 drives watched 120 days at 4.5-7.5 years, shape 2.2: a handful of failures
    rng = np.random.default_rng(0)
    entry = rng.uniform(4.5, 7.5, 200) * 8766
    failure = truncated_weibull(rng, entry, 2.2, 85_000)
    end = entry + 120 * 24
    fit = fit_weibull(entry, np.minimum(failure, end), failure <= end)
    assert fit.phase == UNDETERMINED
    assert f"only {fit.failures} failures" in fit.phase_note and "ages watched only 4.5-7.8 years" in fit.phase_note


def test_a_cohort_with_one_failure_gets_no_shape():
    fit = fit_weibull([0.0, 10.0, 20.0], [100.0, 200.0, 300.0], [True, False, False])
    assert fit.phase == TOO_FEW and math.isnan(fit.shape)


def test_survival_is_conditional_on_the_given_age():
    entry, exit_, event = _truncated_censored(1.4, 50_000, n=500)
    fit = fit_weibull(entry, exit_, event)
    assert fit.survival([20_000.0], given_hours=20_000.0)[0] == pytest.approx(1.0)
    # S(b | a) = S(b) / S(a) for the Weibull (definition of conditional survival)
    assert fit.survival([30_000.0], given_hours=10_000.0)[0] == pytest.approx(
        fit.survival([30_000.0])[0] / fit.survival([10_000.0])[0])


def test_shape_range_is_the_likelihood_ratio_interval_of_an_independent_profile():
    from scipy.optimize import brentq, minimize_scalar
    from scipy.stats import chi2

    entry, exit_, event = _truncated_censored(1.4, 50_000, n=400, seed=9)
    ours = fit_weibull(entry, exit_, event)
    t, a = exit_ / 8766, entry / 8766

    # Independent profile: the log-likelihood from scipy.stats.weibull_min (logpdf for failures,
    # logsf for survivors, minus logsf at entry for the delayed entry), maximised over the scale
    # numerically for each shape. The 95 % range is where twice the drop from the maximum
    # reaches chi2_1(0.95) = 3.841 (likelihood-ratio interval; Meeker & Escobar 1998, 8.3).
    def profile(k):
        def nll(log_lam):
            lam = np.exp(log_lam)
            ll = np.where(event, weibull_min.logpdf(t, k, scale=lam), weibull_min.logsf(t, k, scale=lam))
            return -(ll - weibull_min.logsf(a, k, scale=lam)).sum()
        return -minimize_scalar(nll, bounds=(-5, 10), method="bounded", options={"xatol": 1e-10}).fun

    top = profile(ours.shape)
    crossing = lambda k: 2 * (top - profile(k)) - chi2.ppf(0.95, 1)  # noqa: E731
    assert ours.shape_low == pytest.approx(brentq(crossing, 0.3, ours.shape), rel=1e-4)
    assert ours.shape_high == pytest.approx(brentq(crossing, ours.shape, 6.0), rel=1e-4)


def test_a_narrow_age_window_gives_an_honest_wide_range_not_an_error():
    # Wear-out drives (shape 2.2) bought at 4.5-7.5 years and watched for 120 days: a dozen
    # failures say little about the shape. The range must cover the truth (and 1: "undetermined").
    rng = np.random.default_rng(0)
    coverage = []
    for _ in range(60):
        entry = rng.uniform(4.5, 7.5, 205) * 8766
        failure = truncated_weibull(rng, entry, 2.2, 85_000)
        end = entry + 120 * 24
        fit = fit_weibull(entry, np.minimum(failure, end), failure <= end)
        if fit.phase != TOO_FEW:
            coverage.append(fit.shape_low <= 2.2 <= fit.shape_high)
    # a 95 % interval: at least 85 % of the (up to 60) simulated cohorts; 51/60 is
    # scipy.stats.binom.ppf(0.001, 60, 0.95), so a correct interval falls short once in a thousand seeds
    assert np.mean(coverage) >= 0.85
