"""The invented demo fleet of Quillmere Hosting: simulation, capture files, ground truth.

    from triage.demo import FleetSpec, generate_fleet, write_captures, ground_truth
    fleet = generate_fleet(FleetSpec(seed=7))
    paths = write_captures(fleet, Path("demo-captures"))
    truth = ground_truth(fleet)

Everything in it is fiction: operator, sites, models, serials, hazards.
"""

from triage.demo.fleet import Fleet, FleetSpec, NightState, draw_failure_ages, generate_fleet
from triage.demo.truth import GroundTruth, ground_truth
from triage.demo.workdir import DemoFolder, NotADemoFolder, prepare_demo_folder
from triage.demo.writer import write_captures, write_removals, write_sample

__all__ = [
    "DemoFolder",
    "Fleet",
    "FleetSpec",
    "GroundTruth",
    "NightState",
    "NotADemoFolder",
    "draw_failure_ages",
    "generate_fleet",
    "ground_truth",
    "prepare_demo_folder",
    "write_captures",
    "write_removals",
    "write_sample",
]
