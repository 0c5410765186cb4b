"""Weibull lifetime fit with delayed entry, and the life phase its shape implies.

    S(t) = exp(-(t / scale) ** shape)          h(t) = shape / scale * (t / scale) ** (shape - 1)

A drive observed on (entry, exit] adds to the log-likelihood (Klein & Moeschberger, Survival
Analysis, 2nd ed., 3.5, likelihood under left truncation and right censoring):

    event * log h(exit) - H(exit) + H(entry)          H(t) = (t / scale) ** shape

The ``+ H(entry)`` term is the delayed entry: it conditions on having survived to ``entry``.
Write ``theta = scale ** -shape`` and ``S(k) = sum_i (exit_i ** k - entry_i ** k)``; for a fixed
shape ``k`` the likelihood is maximised by ``theta = d / S(k)`` (d failures), which leaves the
profile log-likelihood of the shape alone (Lawless, Statistical Models and Methods for Lifetime
Data, 2nd ed., 5.2, the Weibull profile likelihood; section from memory):

    l_p(k) = d log k + d log(d / S(k)) + (k - 1) sum_{failures} log exit_i - d

One bounded scalar maximisation gives the maximum-likelihood shape and scale. The shape's 95 %
range is the likelihood-ratio (profile) interval, ``{k : 2 (l_p(k_hat) - l_p(k)) <= chi2_1(0.95)}``
(Meeker & Escobar, Statistical Methods for Reliability Data, 1998, 8.3; from memory), not a
Wald range: drives watched over a narrow band of ages (a few months of a fleet bought at four
to seven years) leave the shape nearly unidentified, the likelihood flat and skewed, and there a
Wald range is meaningless while the profile range honestly runs from ~0 to well above 1. A
limit that the likelihood never reaches inside [SHAPE_MIN, SHAPE_MAX] is reported as 0 or inf.
The scale's range is a Wald range on the log scale at the maximum (delta method).

Phase (the bathtub curve's three parts), from the shape's range, never from the point estimate:
the whole range below 1 is a falling hazard, early-life failures; the whole range above 1 a rising
hazard, wear-out; the whole range within [2/3, 1.5] a hazard close enough to constant to call
random failures (our choice of band, no source: over a drive's first five years a shape of 1.5
raises the hazard about 2.2-fold between ages 1 and 5 years, 2/3 lowers it as much). Any other
range -- across 1 but reaching past the band -- is ``undetermined``: the data cannot tell the
phases apart, and calling that "random" would read as news it is not. The note says why: few
failures (under ``FEW_FAILURES`` even complete lifetimes give a range wider than the band, since
var(log shape) is about (6 / pi^2) / d; Meeker & Escobar 1998, 8.4, from memory), or a narrow
window of ages watched (the oldest exit under ``NARROW_AGE_RATIO`` times the youngest entry).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq, minimize_scalar
from scipy.stats import chi2, norm

EARLY_LIFE = "early-life"
RANDOM = "random"
WEAR_OUT = "wear-out"
UNDETERMINED = "undetermined"
TOO_FEW = "too few failures"
NO_FIT = "no fit"
#: A shape range inside this band is called random failures (module docstring; our choice).
RANDOM_BAND = (2 / 3, 1.5)
#: Below this many failures the shape range cannot fit in RANDOM_BAND even with complete data:
#: 1.96 * sqrt(6 / pi^2 / d) <= log 1.5 needs d >= 14.2 (module docstring).
FEW_FAILURES = 15
#: Oldest exit age over youngest entry age below this: a narrow window (our choice, no source).
NARROW_AGE_RATIO = 2.0
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
    phase_note: str = ""  # why the phase is undetermined (empty otherwise)

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
    """The phase a shape range implies; a limit the likelihood never reaches is 0 or inf."""
    if math.isnan(shape_low) or math.isnan(shape_high):
        return NO_FIT
    if shape_high < 1:
        return EARLY_LIFE
    if shape_low > 1:
        return WEAR_OUT
    if RANDOM_BAND[0] <= shape_low and shape_high <= RANDOM_BAND[1]:
        return RANDOM
    return UNDETERMINED


def undetermined_note(shape_low: float, shape_high: float, failures: int, youngest_entry_hours: float,
                      oldest_exit_hours: float) -> str:
    """Why a shape range decides no phase, in words an operator can act on."""
    years = lambda hours: hours / 8766.0  # noqa: E731  (365.25-day years, as elsewhere)
    why = []
    if failures < FEW_FAILURES:
        why.append(f"only {failures} failures")
    if oldest_exit_hours < NARROW_AGE_RATIO * max(youngest_entry_hours, 1.0):
        why.append(f"ages watched only {years(youngest_entry_hours):.1f}-{years(oldest_exit_hours):.1f} years")
    reason = " and ".join(why) or f"{failures} failures are not yet enough to tell"
    return (f"shape {shape_low:.2f}-{shape_high:.2f} spans more than random ({RANDOM_BAND[0]:.2f}-"
            f"{RANDOM_BAND[1]:.1f}): {reason}")


def _empty(phase: str, failures: int) -> WeibullFit:
    nan = float("nan")
    return WeibullFit(nan, nan, nan, nan, nan, nan, phase, failures)


#: Shapes searched. Outside this the hazard is all-at-once or all-at-zero, never a drive fleet.
SHAPE_MIN, SHAPE_MAX = 0.02, 50.0


class _ProfileLikelihood:
    """l_p(k) for one cohort, ages normalised by the oldest exit age so t ** k never overflows."""

    def __init__(self, entry: np.ndarray, exit_: np.ndarray, event: np.ndarray):
        self.unit = float(exit_.max())
        self.log_t = np.log(exit_ / self.unit)
        with np.errstate(divide="ignore"):
            self.log_a = np.log(entry / self.unit)  # -inf for a drive watched from hour 0
        self.failures = int(event.sum())
        self.sum_log_t_failed = float(self.log_t[event].sum())

    def exposure(self, k: float) -> float:
        """S(k) = sum t^k - a^k, as t^k (1 - (a / t)^k) so a short watch (a close to t) keeps its digits."""
        return float(np.sum(np.exp(k * self.log_t) * -np.expm1(k * (self.log_a - self.log_t))))

    def __call__(self, k: float) -> float:
        d = self.failures
        return d * math.log(k) + d * math.log(d / self.exposure(k)) + (k - 1) * self.sum_log_t_failed - d

    def scale(self, k: float) -> float:
        """The scale (hours) maximising the likelihood at shape k: theta = d / S(k)."""
        return self.unit * (self.exposure(k) / self.failures) ** (1.0 / k)

    def loglik(self, k: float, scale_hours: float) -> float:
        """The full log-likelihood (ages in units of ``self.unit``), for the scale's curvature."""
        lam = scale_hours / self.unit
        return (self.failures * (math.log(k) - k * math.log(lam)) + (k - 1) * self.sum_log_t_failed
                - self.exposure(k) * lam ** -k)


def _shape_limit(profile: _ProfileLikelihood, k_hat: float, drop: float, bound: float) -> float:
    """Where l_p falls ``drop`` below its maximum between k_hat and ``bound`` (log-k search)."""
    top = profile(k_hat)
    gap = lambda log_k: top - profile(math.exp(log_k)) - drop  # noqa: E731
    if gap(math.log(bound)) < 0:
        return 0.0 if bound < k_hat else math.inf
    return math.exp(brentq(gap, math.log(k_hat), math.log(bound), xtol=1e-10))


def _log_scale_se(profile: _ProfileLikelihood, k: float, scale: float) -> float:
    """se of log(scale) from the observed information in (log k, log scale), central differences."""
    f = lambda u, v: profile.loglik(math.exp(u), math.exp(v))  # noqa: E731
    u, v, h = math.log(k), math.log(scale), 1e-4
    fuu = (f(u + h, v) - 2 * f(u, v) + f(u - h, v)) / h**2
    fvv = (f(u, v + h) - 2 * f(u, v) + f(u, v - h)) / h**2
    fuv = (f(u + h, v + h) - f(u + h, v - h) - f(u - h, v + h) + f(u - h, v - h)) / (4 * h**2)
    det = fuu * fvv - fuv**2
    if not det > 0 or not fuu < 0:
        return math.inf
    return math.sqrt(-fuu / det)  # [inverse of the negative Hessian]_vv


def _log_wald(estimate: float, se: float, z: float) -> tuple[float, float]:
    """exp(log estimate -/+ z se / estimate); an unbounded side (a flat likelihood) is inf / 0."""
    if not math.isfinite(se):
        return 0.0, math.inf
    half = min(z * se / estimate, 700.0)  # exp(700) is near the float limit
    return estimate * math.exp(-half), estimate * math.exp(half)


def fit_weibull(entry_hours, exit_hours, event, alpha: float = 0.05) -> WeibullFit:
    """Maximum-likelihood Weibull shape and scale (hours) with delayed entry; profile range for the shape."""
    entry = np.asarray(entry_hours, dtype=float)
    exit_ = np.asarray(exit_hours, dtype=float)
    event = np.asarray(event, dtype=bool)
    keep = (exit_ > entry) & (entry >= 0)
    entry, exit_, event = entry[keep], exit_[keep], event[keep]
    failures = int(event.sum())
    if failures < MIN_FAILURES:
        return _empty(TOO_FEW, failures)
    profile = _ProfileLikelihood(entry, exit_, event)
    best = minimize_scalar(lambda log_k: -profile(math.exp(log_k)), method="bounded",
                           bounds=(math.log(SHAPE_MIN), math.log(SHAPE_MAX)), options={"xatol": 1e-9})
    shape = float(math.exp(best.x))
    if not math.isfinite(profile(shape)):
        return _empty(NO_FIT, failures)
    drop = chi2.ppf(1 - alpha, 1) / 2
    shape_low = _shape_limit(profile, shape, drop, SHAPE_MIN)
    shape_high = _shape_limit(profile, shape, drop, SHAPE_MAX)
    phase = phase_of(shape_low, shape_high)
    note = (undetermined_note(shape_low, shape_high, failures, float(entry.min()), float(exit_.max()))
            if phase == UNDETERMINED else "")
    if not SHAPE_MIN * 1.001 < shape < SHAPE_MAX / 1.001:
        # the likelihood rises all the way to a search bound: no point estimate, only the range
        nan = float("nan")
        return WeibullFit(nan, shape_low, shape_high, nan, nan, nan, phase, failures, note)
    scale = profile.scale(shape)
    scale_low, scale_high = _log_wald(scale, scale * _log_scale_se(profile, shape, scale), norm.ppf(1 - alpha / 2))
    return WeibullFit(shape, shape_low, shape_high, scale, scale_low, scale_high, phase, failures, note)
