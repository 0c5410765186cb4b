"""Is cohort A worse than cohort B? Rate ratio with the exact conditional test, and an age-adjusted
hazard ratio from a Cox model.

**Rate ratio.** Failures ``k_A``, ``k_B`` over drive-days ``t_A``, ``t_B``, each Poisson. Given the
total ``n = k_A + k_B``, ``k_A`` is binomial (Przyborowski & Wilenski, Biometrika 31, 1940; the
conditional method as in Breslow & Day, Statistical Methods in Cancer Research II, 1987, 2.5 --
section from memory):

    k_A | n  ~  Binomial(n, pi)          pi = RR t_A / (RR t_A + t_B)
    RR = (k_A / t_A) / (k_B / t_B)       and back:  RR = pi / (1 - pi) * t_B / t_A

so the Clopper-Pearson limits of ``pi`` (Clopper & Pearson, Biometrika 26, 1934),

    pi_low = Beta.ppf(alpha / 2, k_A, n - k_A + 1)      (0 when k_A = 0)
    pi_high = Beta.ppf(1 - alpha / 2, k_A + 1, n - k_A) (1 when k_A = n)

map to exact limits of ``RR`` (conservative: coverage >= 1 - alpha), and the exact test of
``RR = 1`` is the binomial test of ``pi = t_A / (t_A + t_B)``, two-sided by summing every outcome
no likelier than the one observed (scipy's ``binomtest``).

**Hazard ratio adjusted for age.** Two cohorts bought at different times are compared at
different ages, and a crude rate ratio then mixes the cohort with the age (a wear-out cohort
watched at five years against a new one). A Cox model on power-on age with delayed entry and a
single covariate, 1 for cohort A, compares drives at the same age only (Cox, JRSS B 34, 1972;
Efron ties, ``cox.py``); its Wald range is ``exp(beta -/+ z se)``. When the crude rate ratio lies
outside that range, age has confounded it, and the report says so.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import beta as beta_dist
from scipy.stats import binomtest, norm

from triage.survival.cohorts import resolve_cohort
from triage.survival.cox import CoxFitError, StratifiedCox
from triage.survival.observations import Observations, at_risk_drives


@dataclass(frozen=True)
class RateRatio:
    failures_a: int
    drive_days_a: float
    failures_b: int
    drive_days_b: float
    rate_ratio: float
    rate_ratio_low: float
    rate_ratio_high: float
    p_value: float


def clopper_pearson(k: int, n: int, alpha: float = 0.05) -> tuple[float, float]:
    """Exact two-sided limits for a binomial proportion (module docstring)."""
    low = 0.0 if k == 0 else float(beta_dist.ppf(alpha / 2, k, n - k + 1))
    high = 1.0 if k == n else float(beta_dist.ppf(1 - alpha / 2, k + 1, n - k))
    return low, high


def rate_ratio(failures_a: int, drive_days_a: float, failures_b: int, drive_days_b: float,
               alpha: float = 0.05) -> RateRatio:
    """Rate ratio A / B of failures per drive-day, exact conditional limits and p-value."""
    k_a, k_b = int(failures_a), int(failures_b)
    t_a, t_b = float(drive_days_a), float(drive_days_b)
    nan = math.nan
    if not (t_a > 0 and t_b > 0):
        return RateRatio(k_a, t_a, k_b, t_b, nan, nan, nan, nan)
    n = k_a + k_b
    if n == 0:  # nothing failed on either side: no information about the ratio
        return RateRatio(k_a, t_a, k_b, t_b, nan, 0.0, math.inf, 1.0)
    odds = lambda pi: pi / (1 - pi) * t_b / t_a if pi < 1 else math.inf  # noqa: E731
    pi_low, pi_high = clopper_pearson(k_a, n, alpha)
    estimate = (k_a / t_a) / (k_b / t_b) if k_b else math.inf
    p_value = float(binomtest(k_a, n, t_a / (t_a + t_b)).pvalue)
    return RateRatio(k_a, t_a, k_b, t_b, estimate, odds(pi_low), odds(pi_high), p_value)


@dataclass(frozen=True)
class Comparison:
    a: str
    b: str
    by: tuple[str, ...]
    events: str  # 'failures' or 'replacements'
    drives_a: int
    drives_b: int
    rates: RateRatio
    hazard_ratio: float
    hazard_ratio_low: float
    hazard_ratio_high: float
    hazard_note: str  # why no hazard ratio, or empty
    median_age_a_hours: float  # median age over each cohort's watched drive-hours (midpoints)
    median_age_b_hours: float
    age_confounded: bool  # the crude rate ratio lies outside the adjusted range


def age_adjusted_hazard_ratio(entry_hours, exit_hours, event, in_a, alpha: float = 0.05) -> tuple[float, float, float]:
    """exp(beta) and its Wald range from a Cox model with one covariate, 1 for cohort A."""
    with np.errstate(invalid="ignore"):  # a flat likelihood: negative variance, caught below
        cox = StratifiedCox(penalizer=0.0, ties="efron").fit(entry_hours, exit_hours, event,
                                                             np.asarray(in_a, dtype=float)[:, None])
    z = norm.ppf(1 - alpha / 2)
    coef, se = float(cox.coef_[0]), float(cox.se_[0])
    if not (math.isfinite(coef) and math.isfinite(se)):
        raise CoxFitError("the two cohorts share too few ages at which either had a failure")
    return math.exp(coef), math.exp(coef - z * se), math.exp(coef + z * se)


def _median_age(group: pd.DataFrame) -> float:
    mid = (group["entry_hours"].to_numpy(dtype=float) + group["exit_hours"].to_numpy(dtype=float)) / 2
    return float(np.median(mid)) if len(mid) else math.nan


def compare_cohorts(obs: Observations, a: str, b: str, alpha: float = 0.05) -> Comparison:
    """Compare cohort ``a`` with cohort ``b`` (labels as ``cohort_table`` prints them)."""
    a, b = resolve_cohort(obs, a), resolve_cohort(obs, b)
    if a == b:
        raise ValueError(f"compare needs two different cohorts; got {a!r} twice")
    group_a, group_b = obs.cohort(a), obs.cohort(b)
    rates = rate_ratio(int(group_a["event"].sum()), float(group_a["drive_days"].sum()),
                       int(group_b["event"].sum()), float(group_b["drive_days"].sum()), alpha)
    both = at_risk_drives(pd.concat([group_a, group_b]))
    in_a = (both["cohort"] == a).to_numpy()
    events = both["event"].to_numpy(dtype=bool)
    nan = math.nan
    hr = (nan, nan, nan)
    note = ""
    if not events[in_a].any() or not events[~in_a].any():
        side = a if not events[in_a].any() else b
        note = f"no {obs.events} in {side}: the hazard ratio is not estimable"
    else:
        try:
            hr = age_adjusted_hazard_ratio(both["entry_hours"], both["exit_hours"], events, in_a, alpha)
        except CoxFitError as exc:
            note = f"hazard ratio not estimable: {exc}"
    crude = rates.rate_ratio
    confounded = bool(math.isfinite(hr[1]) and math.isfinite(crude) and not hr[1] <= crude <= hr[2])
    return Comparison(a=a, b=b, by=obs.by, events=obs.events,
                      drives_a=int(group_a["serial"].nunique()), drives_b=int(group_b["serial"].nunique()),
                      rates=rates, hazard_ratio=hr[0], hazard_ratio_low=hr[1], hazard_ratio_high=hr[2],
                      hazard_note=note, median_age_a_hours=_median_age(group_a),
                      median_age_b_hours=_median_age(group_b), age_confounded=confounded)


def versus_fleet(obs: Observations, alpha: float = 0.05) -> pd.DataFrame:
    """Each cohort's rate ratio against the rest of the fleet: cohort, vs_fleet, vs_fleet_low,
    vs_fleet_high, vs_fleet_p (failures per drive-day, exact conditional, as ``rate_ratio``)."""
    drives = obs.drives
    totals = drives.groupby("cohort", sort=True).agg(events=("event", "sum"), drive_days=("drive_days", "sum"))
    all_events, all_days = int(totals["events"].sum()), float(totals["drive_days"].sum())
    rows = []
    for label, row in totals.iterrows():
        r = rate_ratio(int(row["events"]), float(row["drive_days"]), all_events - int(row["events"]),
                       all_days - float(row["drive_days"]), alpha)
        rows.append({"cohort": label, "vs_fleet": r.rate_ratio, "vs_fleet_low": r.rate_ratio_low,
                     "vs_fleet_high": r.rate_ratio_high, "vs_fleet_p": r.p_value})
    return pd.DataFrame(rows, columns=["cohort", "vs_fleet", "vs_fleet_low", "vs_fleet_high", "vs_fleet_p"])
