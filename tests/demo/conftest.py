"""Shared small fleets for the demo generator's tests (module scope: built once per module)."""

from __future__ import annotations

import gzip
import json

import pytest

from triage.demo import FleetSpec, generate_fleet, ground_truth, write_captures

#: Small enough that writing and decoding every line takes well under a second.
SMALL = FleetSpec(seed=5, n_drives=120, days=20)


@pytest.fixture(scope="session")
def small_fleet():
    return generate_fleet(SMALL)


@pytest.fixture(scope="session")
def small_files(small_fleet, tmp_path_factory):
    out = tmp_path_factory.mktemp("demo-small")
    return write_captures(small_fleet, out)


@pytest.fixture(scope="session")
def small_truth(small_fleet):
    return ground_truth(small_fleet)


@pytest.fixture(scope="session")
def small_lines(small_files):
    """Every capture line written: (file name, line number, parsed object)."""
    out = []
    for path in small_files:
        if path.name.endswith(".jsonl.gz"):
            with gzip.open(path, "rt", encoding="utf-8") as fh:
                for number, text in enumerate(fh, start=1):
                    out.append((path.name, number, json.loads(text)))
    return out


@pytest.fixture(scope="session")
def default_fleet():
    """The default-size fleet, in memory only (generation takes a fraction of a second)."""
    return generate_fleet(FleetSpec())
