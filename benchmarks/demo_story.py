"""Does the demo fleet tell its own story? Over many seeds of the default demo fleet (1,200 drives,
120 nights), the share of seeds in which

* the wear-out model (Marrow 4T, true Weibull shape 3.5) is labelled ``wear-out``,
* the infant-mortality model (Tallow 14T, true shape 0.45) is labelled ``early-life``,
* the bad firmware (QH-HD8T-A / QA03, true hazard ratio 6) is worse than QA02 at p < 0.05
  (``compare``'s exact conditional test) and its age-adjusted hazard ratio range excludes 1,

computed from the generator's ground truth through the same observations, cohort table and
comparison as ``triage cohorts`` and ``triage compare`` (no ingest; the capture round trip is
tested elsewhere).

    .venv/bin/python benchmarks/demo_story.py --seeds 40

prints the shares and writes benchmarks/out/demo_story.csv (one row per seed).
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import pandas as pd

from triage.demo import FleetSpec, generate_fleet, ground_truth
from triage.survival.cohorts import cohort_table
from triage.survival.compare import compare_cohorts
from triage.survival.observations import observations, scan_frame


def story(seed: int) -> dict:
    truth = ground_truth(generate_fleet(FleetSpec(seed=seed)))
    scan = scan_frame(truth.snapshots, removals=truth.removals)
    phases = cohort_table(observations(scan, truth.removals, by=("model",))).set_index("cohort")["phase"]
    c = compare_cohorts(observations(scan, truth.removals, by=("model", "firmware")),
                        "QH-HD8T-A / QA03", "QH-HD8T-A / QA02")
    return {"seed": seed, "marrow_phase": phases.get("Marrow 4T"), "tallow_phase": phases.get("Tallow 14T"),
            "qa03_rate_ratio": c.rates.rate_ratio, "qa03_p": c.rates.p_value,
            "qa03_hr_low": c.hazard_ratio_low, "qa03_failures": c.rates.failures_a,
            "qa02_failures": c.rates.failures_b}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=40)
    parser.add_argument("--first-seed", type=int, default=1000)
    args = parser.parse_args()
    started = time.perf_counter()
    rows = pd.DataFrame([story(args.first_seed + i) for i in range(args.seeds)])
    out = Path(__file__).parent / "out"
    out.mkdir(exist_ok=True)
    rows.to_csv(out / "demo_story.csv", index=False)
    n = len(rows)
    print(f"{n} seeds of the default demo fleet ({time.perf_counter() - started:.0f} s)")
    print(f"Marrow 4T labelled wear-out:    {(rows['marrow_phase'] == 'wear-out').mean():.0%}"
          f"  (otherwise: {rows.loc[rows['marrow_phase'] != 'wear-out', 'marrow_phase'].value_counts().to_dict()})")
    print(f"Tallow 14T labelled early-life: {(rows['tallow_phase'] == 'early-life').mean():.0%}"
          f"  (otherwise: {rows.loc[rows['tallow_phase'] != 'early-life', 'tallow_phase'].value_counts().to_dict()})")
    print(f"QA03 worse than QA02 at p < 0.05: {(rows['qa03_p'] < 0.05).mean():.0%}; "
          f"adjusted hazard ratio range above 1: {(rows['qa03_hr_low'] > 1).mean():.0%}; "
          f"median failures QA03 {rows['qa03_failures'].median():.0f}, QA02 {rows['qa02_failures'].median():.0f}")
    wrong = rows[(rows["marrow_phase"] == "early-life") | (rows["tallow_phase"] == "wear-out")]
    print(f"seeds with a phase the wrong way round: {len(wrong)}")


if __name__ == "__main__":
    main()
