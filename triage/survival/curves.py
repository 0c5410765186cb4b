"""Survival and cumulative hazard against age, with delayed entry; hazard by age band.

Kaplan-Meier with left truncation (Klein & Moeschberger, Survival Analysis, 2nd ed., 4.6):

    S(t) = prod_{t_i <= t} (1 - d_i / Y_i)        Y_i = #{drives with entry < t_i <= exit}

and Nelson-Aalen, H(t) = sum_{t_i <= t} d_i / Y_i. The risk set Y_i holds only drives already in
the fleet at age t_i, which is the whole point: a drive installed at 20,000 h is not "at risk"
at 5,000 h. Both come from lifelines (``entry=``); the intervals are lifelines' pointwise 95 %
ones (log(-log) transform for S, log transform for H), not simultaneous bands.

With delayed entry the curve estimates survival *conditional on reaching its start age*, and
it cannot start where almost no drive is at risk: in a fleet bought at four to seven years, one
new replacement drive failing at 300 hours is a risk set of one, the product-limit estimate drops
to 0 there and stays 0 for every older age (Klein & Moeschberger, 2nd ed., 4.6, note on small
risk sets under left truncation; from memory). So the curve starts at the youngest age with at
least ``MIN_AT_RISK`` drives at risk, conditional on reaching it; drives that left before it are
not in the curve (they still count in the AFR and the age bands). Where no drive at all was
watched over some ages (new replacements beside drives bought old), the curve covers the side
with the most drive-hours. Where few drives are at risk (the oldest ages everywhere) it is still
noisy; the ``at_risk`` column says so.

Hazard by age band (a piecewise-constant hazard, the maximum-likelihood estimate under left
truncation and right censoring):

    h_band = failures in band / drive-hours at risk in band

reported per year (x 8766 h) with Garwood limits (``afr.py``), like an AFR restricted to the band.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from triage.survival.afr import HOURS_PER_YEAR, garwood_limits

MONTH_HOURS = HOURS_PER_YEAR / 12
#: (label, from_hours, to_hours): infant mortality, first year, then yearly to the usual
#: 5-year service life (band edges are common practice, no source).
AGE_BANDS = (
    ("0-3 months", 0.0, 3 * MONTH_HOURS),
    ("3-12 months", 3 * MONTH_HOURS, HOURS_PER_YEAR),
    ("1-2 years", HOURS_PER_YEAR, 2 * HOURS_PER_YEAR),
    ("2-3 years", 2 * HOURS_PER_YEAR, 3 * HOURS_PER_YEAR),
    ("3-5 years", 3 * HOURS_PER_YEAR, 5 * HOURS_PER_YEAR),
    ("5 years+", 5 * HOURS_PER_YEAR, np.inf),
)


#: The curve starts where at least this many drives are at risk (common practice, no source).
MIN_AT_RISK = 10


@dataclass
class Curves:
    """Survival / cumulative hazard at each failure age (plus the first age), ready to print."""

    table: pd.DataFrame  # age_hours, survival, survival_low, survival_high, at_risk, failures,
    #                     cumulative_hazard, cumulative_hazard_low, cumulative_hazard_high
    youngest_entry_hours: float  # the start age: the curve is conditional on reaching it


def _widest_age_range(entry: np.ndarray, exit_: np.ndarray) -> tuple[float, float]:
    """The stretch of ages with someone at risk throughout that holds the most drive-hours.

    Ages nobody was watched at split the cohort (new replacements at 0-3,000 h beside drives
    bought at five years): survival across such a gap cannot be estimated, since no drive
    links the two sides. The curve covers one side; the others still count in AFR and bands.
    """
    order = np.argsort(entry, kind="stable")
    starts, ends = entry[order], exit_[order]
    reach = np.maximum.accumulate(ends)
    # a new stretch begins where a drive enters at or after every earlier drive has left
    new = np.r_[True, starts[1:] >= reach[:-1]]
    label = np.cumsum(new) - 1
    hours = np.bincount(label, weights=ends - starts)
    best = int(np.argmax(hours))
    return float(starts[label == best].min()), float(ends[label == best].max())


def _at_risk(entry: np.ndarray, exit_: np.ndarray, ages, just_after: bool = False) -> np.ndarray:
    """Drives at risk at each age, #{entry < t <= exit} -- the risk set Y(t) of the estimators --
    or with ``just_after``, #{entry <= t < exit}: those watched on the ages right after t."""
    side = "right" if just_after else "left"
    return (np.searchsorted(np.sort(entry), ages, side=side)
            - np.searchsorted(np.sort(exit_), ages, side=side))


def _start_age(entry: np.ndarray, exit_: np.ndarray, min_at_risk: int) -> float:
    """The youngest entry age with at least ``min_at_risk`` drives at risk just after it
    (#{entry <= a < exit}), or the one with the largest risk set if none has that many."""
    candidates = np.unique(entry)
    at_risk = _at_risk(entry, exit_, candidates, just_after=True)
    enough = np.flatnonzero(at_risk >= min(min_at_risk, at_risk.max()))
    return float(candidates[enough[0]])


def survival_curves(entry_hours, exit_hours, event, alpha: float = 0.05,
                    min_at_risk: int = MIN_AT_RISK) -> Curves:
    """Kaplan-Meier and Nelson-Aalen with delayed entry (lifelines), at each failure age."""
    from lifelines import KaplanMeierFitter, NelsonAalenFitter

    entry = np.asarray(entry_hours, dtype=float)
    exit_ = np.asarray(exit_hours, dtype=float)
    event = np.asarray(event, dtype=bool)
    keep = exit_ > entry
    entry, exit_, event = entry[keep], exit_[keep], event[keep]
    columns = ["age_hours", "survival", "survival_low", "survival_high", "at_risk", "failures",
               "cumulative_hazard", "cumulative_hazard_low", "cumulative_hazard_high"]
    if len(entry) == 0:
        return Curves(pd.DataFrame(columns=columns), float("nan"))
    # the age range the curve can cover, then condition on reaching its start age
    lo, hi = _widest_age_range(entry, exit_)
    inside = (entry >= lo) & (exit_ <= hi)
    entry, exit_, event = entry[inside], exit_[inside], event[inside]
    start = _start_age(entry, exit_, min_at_risk)
    alive = exit_ > start
    entry, exit_, event = np.maximum(entry[alive], start), exit_[alive], event[alive]
    km = KaplanMeierFitter(alpha=alpha).fit(exit_, event, entry=entry)
    # the classic estimator d/Y at tied ages (lifelines would otherwise split ties as 1/Y + 1/(Y-1) ...)
    na = NelsonAalenFitter(alpha=alpha, nelson_aalen_smoothing=False).fit(exit_, event, entry=entry)
    events = km.event_table
    # rows where someone failed are the only ages where the curves move
    ages = events.index[events["observed"].to_numpy() > 0].to_numpy(dtype=float)
    ages = np.concatenate([[start], ages[ages > start]])
    survival = km.survival_function_.iloc[:, 0].reindex(ages, method="ffill").fillna(1.0)
    band = km.confidence_interval_.reindex(ages, method="ffill")
    cumhaz = na.cumulative_hazard_.iloc[:, 0].reindex(ages, method="ffill").fillna(0.0)
    cumhaz_band = na.confidence_interval_.reindex(ages, method="ffill")
    # Y(t) = #{entry < t <= exit}, the risk set the estimates use. (lifelines' event table also
    # counts a drive entering exactly at t, which whole-hour entry ages make common.)
    at_risk = _at_risk(entry, exit_, ages)
    at_risk[0] = _at_risk(entry, exit_, [start], just_after=True)[0]  # the drives the curve starts with
    failures = events["observed"].reindex(ages).fillna(0)
    table = pd.DataFrame({
        "age_hours": ages,
        "survival": survival.to_numpy(),
        "survival_low": band.iloc[:, 0].fillna(1.0).to_numpy(),
        "survival_high": band.iloc[:, 1].fillna(1.0).to_numpy(),
        "at_risk": at_risk.astype(np.int64),
        "failures": failures.to_numpy(dtype=np.int64),
        "cumulative_hazard": cumhaz.to_numpy(),
        "cumulative_hazard_low": cumhaz_band.iloc[:, 0].fillna(0.0).to_numpy(),
        "cumulative_hazard_high": cumhaz_band.iloc[:, 1].fillna(0.0).to_numpy(),
    })
    return Curves(table=table[columns], youngest_entry_hours=start)


def exposure_in_bands(entry_hours, exit_hours, event, edges) -> tuple[np.ndarray, np.ndarray]:
    """Drive-hours at risk and failures in each age band ``(edges[j], edges[j+1]]``.

    A drive contributes ``overlap((entry, exit], band)`` hours to a band, and its failure (at
    its exit age) to the band whose half-open interval ``(lo, hi]`` holds that age.
    """
    entry = np.asarray(entry_hours, dtype=float)
    exit_ = np.asarray(exit_hours, dtype=float)
    event = np.asarray(event, dtype=bool)
    edges = np.asarray(edges, dtype=float)
    lo, hi = edges[:-1], edges[1:]
    overlap = np.clip(np.minimum(exit_[:, None], hi[None, :]) - np.maximum(entry[:, None], lo[None, :]), 0, None)
    hours = overlap.sum(axis=0)
    # failure at exactly a band edge belongs to the band it ends (interval (lo, hi])
    band_of_failure = np.searchsorted(edges, exit_[event], side="left") - 1
    band_of_failure = np.clip(band_of_failure, 0, len(lo) - 1)
    failures = np.bincount(band_of_failure, minlength=len(lo))
    return hours, failures


def hazard_by_age_band(entry_hours, exit_hours, event, bands=AGE_BANDS, alpha: float = 0.05) -> pd.DataFrame:
    """Piecewise-constant hazard per age band, annualized (percent per year), with Garwood limits."""
    edges = [b[1] for b in bands] + [bands[-1][2]]
    hours, failures = exposure_in_bands(entry_hours, exit_hours, event, edges)
    low, high = garwood_limits(failures, alpha)
    years = hours / HOURS_PER_YEAR
    with np.errstate(divide="ignore", invalid="ignore"):
        rate = np.where(years > 0, failures / years, np.nan)
        rate_low = np.where(years > 0, low / years, np.nan)
        rate_high = np.where(years > 0, high / years, np.nan)
    return pd.DataFrame({
        "band": [b[0] for b in bands],
        "age_from_hours": [b[1] for b in bands],
        "age_to_hours": [b[2] for b in bands],
        "drive_days": hours / 24.0,
        "failures": failures.astype(np.int64),
        "hazard": 100 * rate,
        "hazard_low": 100 * rate_low,
        "hazard_high": 100 * rate_high,
    })
