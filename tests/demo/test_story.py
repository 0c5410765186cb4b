"""The default demo fleet tells its own story through the survival layer: a wear-out model, an
early-life batch, a bad firmware. One seed (the one ``triage demo`` uses); the shares over many
seeds are in benchmarks/demo_story.py and docs/survival.md."""

from __future__ import annotations

import pytest

from triage.demo import FleetSpec, generate_fleet, ground_truth
from triage.survival.cohorts import cohort_table
from triage.survival.compare import compare_cohorts
from triage.survival.observations import observations, scan_frame

DEMO_SEED = 7  # triage demo --seed default


@pytest.fixture(scope="module")
def demo_scan():
    truth = ground_truth(generate_fleet(FleetSpec(seed=DEMO_SEED)))
    return scan_frame(truth.snapshots, removals=truth.removals), truth.removals


def test_the_wear_out_and_early_life_models_get_their_phase(demo_scan):
    scan, removals = demo_scan
    phases = cohort_table(observations(scan, removals, by=("model",))).set_index("cohort")["phase"]
    # catalog.py: Marrow 4T Weibull shape 3.5 (wear-out), Tallow 14T shape 0.45 (early-life)
    assert phases["Marrow 4T"] == "wear-out"
    assert phases["Tallow 14T"] == "early-life"


def test_the_bad_firmware_fails_more_often_than_its_sibling(demo_scan):
    scan, removals = demo_scan
    c = compare_cohorts(observations(scan, removals, by=("model", "firmware")), "QH-HD8T-A / QA03",
                        "QH-HD8T-A / QA02")
    # catalog.py: QA03 carries 6 times QA02's hazard
    assert c.rates.p_value < 0.05 and c.rates.rate_ratio_low > 1
