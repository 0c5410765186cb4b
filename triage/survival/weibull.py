"""Weibull lifetime fit with delayed entry, and the life phase its shape implies.

    S(t) = exp(-(t / scale) ** shape)          h(t) = shape / scale * (t / scale) ** (shape - 1)

A drive observed on (entry, exit] adds to the log-likelihood (Klein & Moeschberger, Survival
Analysis, 2nd ed., 3.5, likelihood under left truncation and right censoring):

    event * log h(exit) - H(exit) + H(entry)          H(t) = (t / scale) ** shape

The ``+ H(entry)`` term is the delayed entry: it conditions on having survived to ``entry``.
The fit is lifelines' ``WeibullFitter`` (``entry=``), which names the scale ``lambda_`` and the
shape ``rho_``. Ages are fitted in years (hours / 8766) so the optimiser sees numbers near 1,
and the scale is reported back in hours.

Confidence limits are Wald limits on the log scale, ``exp(log shape +/- z * se(shape) / shape)``
(delta method), which stay positive for the few-failure cohorts where they matter.

Phase (the bathtub curve's three parts): shape clearly below 1 (upper limit < 1) is a falling
hazard, early-life failures; clearly above 1 (lower limit > 1) a rising hazard, wear-out; a
range covering 1 cannot be told from a constant, random-failure hazard.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy.stats import norm

from triage.survival.afr import HOURS_PER_YEAR

EARLY_LIFE = "early-life"
RANDOM = "random"
WEAR_OUT = "wear-out"
TOO_FEW = "too few failures"
NO_FIT = "no fit"
#: Fewer failures than this and the shape is not estimable in any useful sense.
MIN_FAILURES = 2


@dataclass(frozen=True)
class WeibullFit:
    shape: float
    shape_low: float
    shape_high: float
    scale: float  # hours
    scale_low: float
    scale_high: float
    phase: str
    failures: int

    def survival(self, age_hours, given_hours: float = 0.0) -> np.ndarray:
        """S(age) / S(given): survival to ``age`` for a drive known alive at ``given``."""
        age = np.asarray(age_hours, dtype=float)
        if not math.isfinite(self.shape):
            return np.full(age.shape, np.nan)
        cumulative = (age / self.scale) ** self.shape - (given_hours / self.scale) ** self.shape
        return np.exp(-cumulative)

    def hazard_per_hour(self, age_hours) -> np.ndarray:
        age = np.asarray(age_hours, dtype=float)
        return self.shape / self.scale * (age / self.scale) ** (self.shape - 1)


def phase_of(shape_low: float, shape_high: float) -> str:
    if not (math.isfinite(shape_low) and math.isfinite(shape_high)):
        return NO_FIT
    if shape_high < 1:
        return EARLY_LIFE
    if shape_low > 1:
        return WEAR_OUT
    return RANDOM


def _empty(phase: str, failures: int) -> WeibullFit:
    nan = float("nan")
    return WeibullFit(nan, nan, nan, nan, nan, nan, phase, failures)


def fit_weibull(entry_hours, exit_hours, event, alpha: float = 0.05) -> WeibullFit:
    """Maximum-likelihood Weibull shape and scale (hours) with delayed entry."""
    from lifelines import WeibullFitter

    entry = np.asarray(entry_hours, dtype=float)
    exit_ = np.asarray(exit_hours, dtype=float)
    event = np.asarray(event, dtype=bool)
    keep = exit_ > entry
    entry, exit_, event = entry[keep], exit_[keep], event[keep]
    failures = int(event.sum())
    if failures < MIN_FAILURES:
        return _empty(TOO_FEW, failures)
    fitter = WeibullFitter(alpha=alpha)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fitter.fit(exit_ / HOURS_PER_YEAR, event, entry=entry / HOURS_PER_YEAR)
    except Exception:  # lifelines raises its own ConvergenceError and numpy errors alike
        return _empty(NO_FIT, failures)
    shape, scale_years = float(fitter.rho_), float(fitter.lambda_)
    variance = fitter.variance_matrix_
    se_shape = math.sqrt(max(float(variance.loc["rho_", "rho_"]), 0.0))
    se_scale = math.sqrt(max(float(variance.loc["lambda_", "lambda_"]), 0.0))
    if not (math.isfinite(se_shape) and se_shape > 0 and shape > 0 and scale_years > 0):
        return _empty(NO_FIT, failures)
    z = norm.ppf(1 - alpha / 2)
    shape_low = shape * math.exp(-z * se_shape / shape)
    shape_high = shape * math.exp(z * se_shape / shape)
    scale = scale_years * HOURS_PER_YEAR
    scale_low = scale * math.exp(-z * se_scale / scale_years)
    scale_high = scale * math.exp(z * se_scale / scale_years)
    return WeibullFit(shape, shape_low, shape_high, scale, scale_low, scale_high,
                      phase_of(shape_low, shape_high), failures)
