"""Per-cohort summary (AFR, ARR, Weibull, small-sample flag) and the single-cohort survival report.

Two rates sit side by side. AFR counts ``failed`` removals only; ARR, the annualized
replacement rate, counts every drive an operator replaced -- failed plus pulled on a warning
(``proactive``) -- the measure field studies of replaced drives report (Schroeder & Gibson,
"Disk failures in the real world", FAST 2007, section 2). Both are events per drive-year with
exact Garwood limits (``afr.py``); ARR >= AFR always. The Weibull fit and the curves use the
event definition the observations were built with (failures unless asked otherwise).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from triage.survival.afr import DAYS_PER_YEAR, afr_from_mttf, annualized_failure_rate
from triage.survival.curves import Curves, hazard_by_age_band, survival_curves
from triage.survival.observations import Observations, at_risk_drives
from triage.survival.weibull import WeibullFit, fit_weibull

#: A cohort is flagged (never hidden) below either size. With 100 drive-years at a typical
#: 1-2 % AFR only one or two failures are expected, and the limits span an order of magnitude
#: (common practice, no source).
SMALL_DRIVES = 50
SMALL_DRIVE_YEARS = 100.0

#: The keys of each ``triage cohorts`` row, in order (the JSON contract; more may follow). The
#: intervals and the life phase with its shape interval lead; exposure and counts follow.
COHORT_KEYS = ("cohort", "afr", "afr_low", "afr_high", "arr", "arr_low", "arr_high", "phase", "phase_note",
               "shape", "shape_low", "shape_high", "scale", "drives", "drive_days", "failures", "replacements",
               "small_sample")


def is_small(drives: int, drive_days: float) -> bool:
    return drives < SMALL_DRIVES or drive_days / DAYS_PER_YEAR < SMALL_DRIVE_YEARS


def cohort_table(obs: Observations, mttf_hours: float | None = None, weibull: bool = True,
                 alpha: float = 0.05) -> pd.DataFrame:
    """One row per cohort: ``COHORT_KEYS`` (+ ``datasheet_afr`` when an MTTF is given).

    ``drives`` counts the distinct drives with any period in the cohort (a drive updated to a
    new firmware counts in both); ``drive_days`` is wall-clock time observed in the cohort;
    ``failures`` and ``replacements`` count removals (failed; failed or proactive), each once.
    The Weibull fit uses power-on ages with delayed entry and the observations' events.
    """
    rows = []
    datasheet = afr_from_mttf(mttf_hours) if mttf_hours is not None else None
    for label, group in obs.drives.groupby("cohort", sort=True):
        drive_days = float(group["drive_days"].sum())
        failures = int(group["failure"].sum())
        replacements = int(group["replacement"].sum())
        drives = int(group["serial"].nunique())
        afr, afr_low, afr_high = annualized_failure_rate(failures, drive_days, alpha)
        arr, arr_low, arr_high = annualized_failure_rate(replacements, drive_days, alpha)
        if weibull:
            usable = at_risk_drives(group)
            fit = fit_weibull(usable["entry_hours"], usable["exit_hours"], usable["event"], alpha)
        else:
            fit = WeibullFit(*(math.nan,) * 6, phase="not fitted", failures=failures)
        row = {
            "cohort": label,
            "afr": afr,
            "afr_low": afr_low,
            "afr_high": afr_high,
            "arr": arr,
            "arr_low": arr_low,
            "arr_high": arr_high,
            "phase": fit.phase,
            "phase_note": fit.phase_note,
            "shape": fit.shape,
            "shape_low": fit.shape_low,
            "shape_high": fit.shape_high,
            "scale": fit.scale,
            "drives": drives,
            "drive_days": drive_days,
            "failures": failures,
            "replacements": replacements,
            "small_sample": is_small(drives, drive_days),
        }
        if datasheet is not None:
            row["datasheet_afr"] = datasheet
        rows.append(row)
    columns = list(COHORT_KEYS) + (["datasheet_afr"] if datasheet is not None else [])
    return pd.DataFrame(rows, columns=columns)


@dataclass
class SurvivalReport:
    cohort: str
    by: tuple[str, ...]
    drives: int
    failures: int
    replacements: int
    drive_days: float
    afr: float
    afr_low: float
    afr_high: float
    arr: float
    arr_low: float
    arr_high: float
    events: str  # what the curves and the Weibull count: 'failures' or 'replacements'
    small_sample: bool
    curves: Curves
    bands: pd.DataFrame
    weibull: WeibullFit
    weibull_curve: pd.DataFrame  # age_hours, survival (conditional on the curve's start age)
    datasheet_afr: float | None = None
    mttf_hours: float | None = None


class UnknownCohort(ValueError):
    pass


def resolve_cohort(obs: Observations, cohort: str) -> str:
    """The cohort label as stored, matched exactly or case-insensitively; else ``UnknownCohort``."""
    labels = sorted(obs.drives["cohort"].unique())
    if cohort in labels:
        return cohort
    folded = {label.casefold(): label for label in labels}
    if cohort.casefold() not in folded:
        shown = ", ".join(repr(label) for label in labels[:10]) + (" ..." if len(labels) > 10 else "")
        raise UnknownCohort(f"no cohort {cohort!r} (by {','.join(obs.by)}); cohorts: {shown or 'none'}")
    return folded[cohort.casefold()]


def survival_report(obs: Observations, cohort: str, mttf_hours: float | None = None,
                    alpha: float = 0.05, curve_points: int = 200) -> SurvivalReport:
    """Curves, age-band hazards and Weibull fit of one cohort (labels as in ``cohort_table``)."""
    cohort = resolve_cohort(obs, cohort)
    group = obs.cohort(cohort)
    usable = at_risk_drives(group)
    drive_days = float(group["drive_days"].sum())
    failures = int(group["failure"].sum())
    replacements = int(group["replacement"].sum())
    drives = int(group["serial"].nunique())
    afr, afr_low, afr_high = annualized_failure_rate(failures, drive_days, alpha)
    arr, arr_low, arr_high = annualized_failure_rate(replacements, drive_days, alpha)
    entry, exit_, event = usable["entry_hours"], usable["exit_hours"], usable["event"]
    curves = survival_curves(entry, exit_, event, alpha)
    fit = fit_weibull(entry, exit_, event, alpha)
    if len(usable) and len(curves.table):
        start = curves.youngest_entry_hours  # the Weibull drawn on the curve's terms: given that age
        ages = np.linspace(start, float(curves.table["age_hours"].max()), curve_points)
        weibull_curve = pd.DataFrame({"age_hours": ages, "survival": fit.survival(ages, given_hours=start)})
    else:
        weibull_curve = pd.DataFrame({"age_hours": [], "survival": []})
    return SurvivalReport(
        cohort=cohort, by=obs.by, drives=drives, failures=failures, replacements=replacements,
        drive_days=drive_days, afr=afr, afr_low=afr_low, afr_high=afr_high, arr=arr, arr_low=arr_low,
        arr_high=arr_high, events=obs.events, small_sample=is_small(drives, drive_days),
        curves=curves, bands=hazard_by_age_band(entry, exit_, event, alpha=alpha), weibull=fit,
        weibull_curve=weibull_curve,
        datasheet_afr=afr_from_mttf(mttf_hours) if mttf_hours is not None else None, mttf_hours=mttf_hours,
    )
