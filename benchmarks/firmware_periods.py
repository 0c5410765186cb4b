"""AFR per firmware when a fleet is updated mid-window: the exposure split at the update.

1,000 invented drives run a bad firmware (constant hazard 14 %/yr) and are all updated at day 60
to a good one (4 %/yr); nightly captures for 120 days; a failed drive is removed at its failure
time. Over many seeds, the AFR ``triage cohorts --by model,firmware`` reports for each firmware
against the truth, and how often its exact 95 % range covers the truth. Before issue 9 a drive's
whole history went to its newest firmware (bad firmware 1,269 %/yr, good 3.7 %/yr on one seed).

    .venv/bin/python benchmarks/firmware_periods.py --seeds 20
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from triage.survival.cohorts import cohort_table
from triage.survival.observations import observations, scan_frame

T0 = pd.Timestamp("2026-03-01T02:00:00Z")
DRIVES, NIGHTS, UPDATE_NIGHT = 1_000, 120, 60
BAD, GOOD = 0.14, 0.04  # failures per drive-year (365 days), constant hazards


def fleet(seed: int):
    rng = np.random.default_rng(seed)
    # failure day: exponential at the bad rate until the update, then at the good rate
    first = rng.exponential(365 / BAD, DRIVES)
    later = UPDATE_NIGHT + rng.exponential(365 / GOOD, DRIVES)
    fail_day = np.where(first < UPDATE_NIGHT, first, later)
    entry = rng.uniform(5_000, 30_000, DRIVES).round()
    nights = np.arange(NIGHTS)
    seen = nights[None, :] <= fail_day[:, None]
    drive, night = np.nonzero(seen)
    snaps = pd.DataFrame({
        "serial": np.char.add("QHU", drive.astype(str)), "model": "QH-HD8T-A",
        "firmware": np.where(night < UPDATE_NIGHT, "QF-BAD", "QF-GOOD"), "bus": "ata",
        "user_capacity_bytes": 8_000_000_000_000, "taken_at": T0 + pd.to_timedelta(night, unit="D"),
        "power_on_hours": entry[drive] + 24.0 * night,
    })
    failed = fail_day < NIGHTS - 1
    removals = pd.DataFrame({"serial": np.char.add("QHU", np.flatnonzero(failed).astype(str)),
                             "removed_at": T0 + pd.to_timedelta(fail_day[failed], unit="D"), "reason": "failed"})
    return snaps, removals


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20)
    args = parser.parse_args()
    started = time.perf_counter()
    rows = []
    for seed in range(args.seeds):
        snaps, removals = fleet(seed)
        table = cohort_table(observations(scan_frame(snaps, removals=removals), removals, by=("model", "firmware")),
                             weibull=False).set_index("cohort")
        for label, truth in (("QH-HD8T-A / QF-BAD", BAD), ("QH-HD8T-A / QF-GOOD", GOOD)):
            row = table.loc[label]
            rows.append({"seed": seed, "firmware": label, "truth": 100 * truth, "afr": row["afr"],
                         "covered": row["afr_low"] <= 100 * truth <= row["afr_high"]})
    frame = pd.DataFrame(rows)
    print(f"{args.seeds} seeds ({time.perf_counter() - started:.0f} s)")
    for label, group in frame.groupby("firmware"):
        print(f"{label}: true AFR {group['truth'].iloc[0]:.1f} %/yr, reported median {group['afr'].median():.1f} "
              f"(seeds {group['afr'].min():.1f}-{group['afr'].max():.1f}), 95 % range covers the truth in "
              f"{group['covered'].mean():.0%} of seeds")


if __name__ == "__main__":
    main()
