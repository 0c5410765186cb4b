"""How often the life-phase label is right, wrong or honestly undetermined, over many seeds.

Each scenario simulates one cohort with a known Weibull shape, bought at a range of ages
(left truncation: failure ages drawn given survival to the entry age) and watched for a window
of days, then labels it with ``fit_weibull``'s phase. Two rules are scored on the same fits:

* the rule on main before issue 9: ``random`` whenever the shape range contains 1;
* the rule now (``weibull.phase_of``): ``early-life`` / ``wear-out`` only when the whole range is
  below / above 1, ``random`` only when it lies within [2/3, 1.5], else ``undetermined``.

A label is *wrong* when it names a phase other than the true one (``undetermined`` is never
wrong, only unhelpful). The first scenario is the narrow window of the demo's old wear-out
cohort: 205 drives bought at 4.5-7.5 years, 120 days, true shape 2.2.

    .venv/bin/python benchmarks/phase_rule.py --seeds 400

prints one line per scenario and writes benchmarks/out/phase_rule.csv.
"""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

import numpy as np
import pandas as pd

from triage.survival.weibull import EARLY_LIFE, RANDOM, TOO_FEW, WEAR_OUT, fit_weibull

HOURS_PER_YEAR = 8766.0

#: name, true shape, scale (hours), drives, entry ages (years), window (days)
SCENARIOS = (
    ("wear-out, narrow window", 2.2, 85_000.0, 205, (4.5, 7.5), 120),
    ("wear-out, narrow window, many failures", 2.2, 85_000.0, 2_000, (4.5, 7.5), 120),
    ("wear-out, wide ages", 2.2, 85_000.0, 600, (1.0, 7.5), 180),
    ("random, narrow window", 1.0, 8766.0 / 0.04, 400, (0.5, 4.0), 120),
    ("random, large cohort", 1.0, 8766.0 / 0.04, 4_000, (0.5, 4.0), 365),
    ("early-life, young drives", 0.7, 181_300.0, 500, (0.05, 1.5), 120),
)
TRUE_PHASE = {2.2: WEAR_OUT, 1.0: RANDOM, 0.7: EARLY_LIFE}


def old_phase(low: float, high: float) -> str:
    """The rule before issue 9: a range containing 1 was called random."""
    if math.isnan(low) or math.isnan(high):
        return "no fit"
    return EARLY_LIFE if high < 1 else WEAR_OUT if low > 1 else RANDOM


def simulate(rng, shape, scale, drives, entry_years, days):
    entry = rng.uniform(*entry_years, drives) * HOURS_PER_YEAR
    u = rng.uniform(size=drives)
    failure = scale * ((entry / scale) ** shape - np.log(u)) ** (1 / shape)  # given survival to entry
    end = entry + 24.0 * days
    return entry, np.minimum(failure, end), failure <= end


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=400)
    args = parser.parse_args()
    started = time.perf_counter()
    rows = []
    for name, shape, scale, drives, entry_years, days in SCENARIOS:
        truth = TRUE_PHASE[shape]
        for seed in range(args.seeds):
            rng = np.random.default_rng([seed, int(shape * 100), drives])
            fit = fit_weibull(*simulate(rng, shape, scale, drives, entry_years, days))
            if fit.phase == TOO_FEW:
                continue
            rows.append({"scenario": name, "seed": seed, "failures": fit.failures, "truth": truth,
                         "shape_low": fit.shape_low, "shape_high": fit.shape_high, "now": fit.phase,
                         "before": old_phase(fit.shape_low, fit.shape_high),
                         "covered": fit.shape_low <= shape <= fit.shape_high})
    frame = pd.DataFrame(rows)
    out = Path(__file__).parent / "out"
    out.mkdir(exist_ok=True)
    frame.to_csv(out / "phase_rule.csv", index=False)
    print(f"{args.seeds} seeds per scenario ({time.perf_counter() - started:.0f} s); shares of fitted cohorts")
    print(f"{'scenario':42s} {'failures':>8s} {'cover':>6s} | before: {'right':>6s} {'wrong':>6s} | "
          f"now: {'right':>6s} {'wrong':>6s} {'undet.':>6s}")
    for name, group in frame.groupby("scenario", sort=False):
        truth = group["truth"].iloc[0]
        before_wrong = (group["before"] != truth).mean()
        now_right = (group["now"] == truth).mean()
        now_wrong = ((group["now"] != truth) & (group["now"] != "undetermined")).mean()
        print(f"{name:42s} {group['failures'].median():8.0f} {group['covered'].mean():6.1%} | "
              f"        {(group['before'] == truth).mean():6.1%} {before_wrong:6.1%} | "
              f"     {now_right:6.1%} {now_wrong:6.1%} {(group['now'] == 'undetermined').mean():6.1%}")


if __name__ == "__main__":
    main()
