"""Annualized failure rate with exact Poisson confidence limits, and the datasheet comparison.

AFR is a rate, not a proportion: failures per drive-year of observed operation,

    AFR = k / T * 100 %            T = drive_days / 365 (drive-years observed)

Treating the failure count ``k`` as Poisson with mean ``mu = AFR * T``, the exact two-sided
``1 - alpha`` limits for ``mu`` are (Garwood, "Fiducial limits for the Poisson distribution",
Biometrika 28, 1936; in chi-square form e.g. Ulm, Am. J. Epidemiol. 131, 1990):

    mu_low  = chi2.ppf(alpha / 2,     2 k)     / 2      (0 when k = 0)
    mu_high = chi2.ppf(1 - alpha / 2, 2 k + 2) / 2

and the AFR limits are ``mu / T * 100 %``. They are conservative (coverage >= 1 - alpha) and,
unlike the normal approximation, give a finite, useful upper limit when no drive failed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Hours in a year of 365.25 days, the convention behind datasheet MTTF -> AFR conversions.
HOURS_PER_YEAR = 8766.0
#: AFR's denominator: drive-days are turned into drive-years of 365 days, the definition this
#: project states (AFR = failures / (drive-days / 365)); age bands and MTTF use 8766 h (365.25 d).
DAYS_PER_YEAR = 365.0


@dataclass(frozen=True)
class PoissonRate:
    """A rate of ``events`` per ``exposure`` with its exact limits, all in events per unit exposure."""

    events: int
    exposure: float
    rate: float
    low: float
    high: float


def garwood_limits(events, alpha: float = 0.05) -> tuple[np.ndarray, np.ndarray]:
    """Exact (Garwood 1936) two-sided limits for a Poisson mean given ``events`` observed.

    Vectorised over ``events``. ``events = 0`` gives ``(0, -ln(alpha / 2))``: 3.689 at 95 %.
    """
    from scipy.stats import chi2  # noqa: PLC0415  (here, so that scoring a saved model never imports scipy)

    k = np.asarray(events, dtype=float)
    if np.any(k < 0) or np.any(k != np.floor(k)):
        raise ValueError("event counts must be non-negative integers")
    with np.errstate(invalid="ignore"):
        low = np.where(k > 0, chi2.ppf(alpha / 2, 2 * k) / 2, 0.0)
    high = chi2.ppf(1 - alpha / 2, 2 * k + 2) / 2
    return low, high


def poisson_rate(events: int, exposure: float, alpha: float = 0.05) -> PoissonRate:
    """Rate ``events / exposure`` with Garwood limits; NaN everywhere when ``exposure`` is 0."""
    if exposure <= 0:
        return PoissonRate(int(events), float(exposure), math.nan, math.nan, math.nan)
    low, high = garwood_limits(events, alpha)
    return PoissonRate(int(events), float(exposure), events / exposure, float(low) / exposure,
                       float(high) / exposure)


def annualized_failure_rate(failures: int, drive_days: float, alpha: float = 0.05) -> tuple[float, float, float]:
    """``(afr, afr_low, afr_high)`` in percent per year from failures over drive-days observed."""
    drive_years = drive_days / DAYS_PER_YEAR
    r = poisson_rate(failures, drive_years, alpha)
    return 100 * r.rate, 100 * r.low, 100 * r.high


def afr_from_mttf(mttf_hours: float) -> float:
    """The AFR (percent per year) a datasheet MTTF implies under a constant hazard.

        AFR = 1 - exp(-8766 / MTTF)

    i.e. the probability of failing within one year of power-on when the hazard is
    1 / MTTF per hour (exponential lifetimes). Schroeder & Gibson, "Disk failures in the real
    world", FAST 2007, section 2, state the relation and its consequence that MTTFs of
    1,000,000 to 1,500,000 hours mean an AFR of 0.58 % to 0.88 %.
    """
    if not mttf_hours > 0:
        raise ValueError("MTTF must be a positive number of hours")
    return 100 * (1 - math.exp(-HOURS_PER_YEAR / mttf_hours))
