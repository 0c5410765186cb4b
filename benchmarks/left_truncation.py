"""How much counting a left-truncated drive from hour zero biases survival (docs/survival.md).

    .venv/bin/python benchmarks/left_truncation.py [--seed 2026]

An invented fleet with a known Weibull lifetime (shape 1.4, scale 12 power-on years), watched by
capture for three calendar years. Drives enter the watch at different ages:

  * installed base: 6,000 drives already in service when capture began, 0-5 years old;
  * new batches: 4 x 1,500 drives bought new at months 0, 9, 18 and 27 (entry age 0);
  * second-hand: 2,000 drives moved in from another site at month 12, 2-4 years old.

A drive already old when it enters is one that survived to that age: its failure age is drawn
from the lifetime distribution conditional on it (inverse transform of the conditional CDF).
Drives that failed before they could enter the watch are never seen -- that is left truncation.
Every drive is then followed to its failure or to the end of the watch.

Compared at 1, 3 and 5 years of age:

  * true          S(t) = exp(-(t / scale) ** shape)
  * delayed entry Kaplan-Meier with ``entry=`` (lifelines), what ``triage survival`` prints
  * naive         Kaplan-Meier counting every drive from hour 0 (``entry`` ignored)

and the Weibull shape fitted both ways with ``triage.survival.weibull.fit_weibull`` (the fit
behind ``triage cohorts``). Deterministic for a given seed; runs in a few seconds.
"""

from __future__ import annotations

import argparse

import numpy as np

from triage.survival.weibull import fit_weibull

HOURS_PER_YEAR = 8766.0
SHAPE, SCALE_YEARS = 1.4, 12.0
WATCH_YEARS = 3.0
AGES_YEARS = (1.0, 3.0, 5.0)


def true_survival(age_years: float) -> float:
    return float(np.exp(-((age_years / SCALE_YEARS) ** SHAPE)))


def failure_age_given_alive(rng, entry_years: np.ndarray) -> np.ndarray:
    """Weibull failure ages conditional on survival to ``entry``: H(T) = H(entry) - log(U)."""
    cumulative = (entry_years / SCALE_YEARS) ** SHAPE - np.log(rng.uniform(size=len(entry_years)))
    return SCALE_YEARS * cumulative ** (1.0 / SHAPE)


def invented_fleet(seed: int):
    """(entry, exit, event) in power-on hours, and the group of each drive."""
    rng = np.random.default_rng(seed)
    groups = []  # (name, entry ages in years, calendar year the drive entered the watch)
    groups.append(("installed base", rng.uniform(0.0, 5.0, 6000), np.zeros(6000)))
    for month in (0, 9, 18, 27):
        groups.append(("new batch", np.zeros(1500), np.full(1500, month / 12)))
    groups.append(("second-hand", rng.uniform(2.0, 4.0, 2000), np.full(2000, 1.0)))
    entry = np.concatenate([g[1] for g in groups])
    joined = np.concatenate([g[2] for g in groups])
    name = np.concatenate([np.full(len(g[1]), g[0]) for g in groups])
    failure = failure_age_given_alive(rng, entry)
    end = entry + (WATCH_YEARS - joined)  # age at the end of the watch (drives run around the clock)
    exit_ = np.minimum(failure, end)
    event = failure <= end
    return entry * HOURS_PER_YEAR, exit_ * HOURS_PER_YEAR, event, name


def kaplan_meier_at(entry, exit_, event, ages_hours):
    """Survival and its pointwise 95 % range at each age (lifelines, log(-log) transform)."""
    from lifelines import KaplanMeierFitter

    km = KaplanMeierFitter().fit(exit_, event, entry=entry)
    survival = km.survival_function_.iloc[:, 0].reindex(ages_hours, method="ffill").to_numpy()
    band = km.confidence_interval_.reindex(ages_hours, method="ffill").to_numpy()
    return survival, band[:, 0], band[:, 1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=2026)
    args = parser.parse_args()

    entry, exit_, event, name = invented_fleet(args.seed)
    ages = np.array(AGES_YEARS) * HOURS_PER_YEAR
    delayed, low, high = kaplan_meier_at(entry, exit_, event, ages)
    naive, naive_low, naive_high = kaplan_meier_at(np.zeros_like(entry), exit_, event, ages)
    fit_delayed = fit_weibull(entry, exit_, event)
    fit_naive = fit_weibull(np.zeros_like(entry), exit_, event)

    print(f"invented fleet, seed {args.seed}: {len(entry):,} drives seen, {int(event.sum()):,} failures "
          f"in {WATCH_YEARS:g} years of capture;")
    print(f"true lifetime Weibull shape {SHAPE}, scale {SCALE_YEARS:g} years")
    for group in ("installed base", "new batch", "second-hand"):
        rows = name == group
        print(f"  {group:15s} {int(rows.sum()):6,} drives, entry age {entry[rows].min() / HOURS_PER_YEAR:.1f}"
              f"-{entry[rows].max() / HOURS_PER_YEAR:.1f} years, {int(event[rows].sum()):4,} failures")
    print()
    print("| age | true S(t) | Kaplan-Meier, delayed entry (95 %) | naive, from hour 0 (95 %) |")
    print("|---|---|---|---|")
    for i, years in enumerate(AGES_YEARS):
        print(f"| {years:g} y | {true_survival(years):.3f} | {delayed[i]:.3f} ({low[i]:.3f}-{high[i]:.3f}) "
              f"| {naive[i]:.3f} ({naive_low[i]:.3f}-{naive_high[i]:.3f}) |")
    print()
    print("| Weibull fit | shape (95 %) | scale (years) | phase |")
    print("|---|---|---|---|")
    print(f"| true | {SHAPE:.2f} | {SCALE_YEARS:.1f} | wear-out |")
    for label, fit in (("delayed entry", fit_delayed), ("naive, from hour 0", fit_naive)):
        print(f"| {label} | {fit.shape:.2f} ({fit.shape_low:.2f}-{fit.shape_high:.2f}) "
              f"| {fit.scale / HOURS_PER_YEAR:.1f} | {fit.phase} |")


if __name__ == "__main__":
    main()
