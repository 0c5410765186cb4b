"""The simulated failure ages follow each model's Weibull hazard, left truncation included.

Checked with fits that do not share code with the generator: scipy.stats.weibull_min (maximum
likelihood), a Kolmogorov-Smirnov test against scipy's own survival function, and lifelines'
Cox proportional-hazards fitter.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from lifelines import CoxPHFitter
from scipy import stats

from triage.demo.catalog import MODELS
from triage.demo.fleet import draw_failure_ages, hazard_scale


@pytest.mark.parametrize("model", MODELS, ids=lambda m: m.name)
def test_weibull_shape_and_scale_of_each_model_are_recovered_by_scipy(model):
    rng = np.random.default_rng(11)
    scale = hazard_scale(model, np.zeros(20_000, dtype=int))
    ages = draw_failure_ages(model.weibull_shape, scale, 0.0, rng)
    # scipy.stats.weibull_min.fit: maximum-likelihood Weibull fit with the location fixed at 0.
    # With n = 20,000 the shape's standard error is about sqrt(6 / pi**2) k / sqrt(n) = 0.0055 k
    # (asymptotic variance of the Weibull shape MLE from its Fisher information, from memory):
    # 3 % is about 5 standard errors.
    shape, _, fitted_scale = stats.weibull_min.fit(ages, floc=0)
    assert shape == pytest.approx(model.weibull_shape, rel=0.03)
    assert fitted_scale == pytest.approx(model.weibull_scale_hours, rel=0.05)


@pytest.mark.parametrize("shape", [0.7, 2.2])
def test_left_truncated_draws_follow_the_conditional_survival(shape):
    rng = np.random.default_rng(12)
    scale, entry = 85_000.0, 50_000.0
    ages = draw_failure_ages(shape, scale, entry, rng, size=5_000)
    assert (ages > entry).all()
    # Survivors to age a0 fail by age a with probability 1 - S(a) / S(a0) (the definition of
    # left truncation); S from scipy.stats.weibull_min.sf. One-sample Kolmogorov-Smirnov test.
    survival_at_entry = stats.weibull_min.sf(entry, shape, scale=scale)

    def conditional_cdf(a):
        return 1.0 - stats.weibull_min.sf(a, shape, scale=scale) / survival_at_entry

    assert stats.kstest(ages, conditional_cdf).pvalue > 0.001


def test_without_truncation_the_ks_test_rejects_the_unconditional_weibull():
    # The same test has power: draws conditional on a0 are far from the plain Weibull.
    rng = np.random.default_rng(13)
    ages = draw_failure_ages(2.2, 85_000.0, 50_000.0, rng, size=5_000)
    assert stats.kstest(ages, stats.weibull_min(2.2, scale=85_000.0).cdf).pvalue < 1e-6


def test_bad_firmware_hazard_ratio_is_recovered_by_a_cox_fit():
    model = next(m for m in MODELS if m.name == "QH-HD8T-A")
    good, bad = model.firmwares.index("QA02"), model.firmwares.index("QA03")
    expected = model.firmware_hazard_ratios[bad] / model.firmware_hazard_ratios[good]
    rng = np.random.default_rng(14)
    firmware = np.repeat([good, bad], 2_000)
    ages = draw_failure_ages(model.weibull_shape, hazard_scale(model, firmware), 0.0, rng)
    frame = pd.DataFrame({"age": ages / 1000.0, "event": 1, "bad_firmware": (firmware == bad).astype(int)})
    # lifelines CoxPHFitter (Cox 1972, partial likelihood): exp(coef) is the hazard ratio.
    cox = CoxPHFitter().fit(frame, duration_col="age", event_col="event")
    assert cox.hazard_ratios_["bad_firmware"] == pytest.approx(expected, rel=0.1)
