"""Round trip: demo generator -> capture files -> ingest -> store equals the generator's truth."""

from __future__ import annotations

import pandas as pd
import pytest

from triage.demo import FleetSpec, generate_fleet, ground_truth, write_captures
from triage.ingest import ingest_paths
from triage.store.dataset import Store
from triage.store.schema import SNAPSHOTS


@pytest.fixture(scope="module")
def round_trip(tmp_path_factory):
    work = tmp_path_factory.mktemp("fleet")
    fleet = generate_fleet(FleetSpec(seed=11, n_drives=120, days=12))
    files = write_captures(fleet, work / "captures")
    store = Store(work / "store")
    report = ingest_paths(store, files)
    return ground_truth(fleet), store, report


def _normalise(frame: pd.DataFrame, columns, key) -> pd.DataFrame:
    frame = frame[columns].sort_values(key).reset_index(drop=True)
    return frame.astype(object).where(frame.notna(), None)


def test_every_generated_capture_is_stored_without_rejects(round_trip):
    truth, store, report = round_trip
    assert report.rejected == []
    assert report.stored["snapshots"] == len(truth.snapshots)


def test_stored_snapshots_equal_ground_truth_column_by_column(round_trip):
    truth, store, _ = round_trip
    columns = [c for c in SNAPSHOTS.names if c != "source_file"]
    expected = _normalise(truth.snapshots, columns, ["serial", "taken_at"])
    stored = _normalise(store.read("snapshots"), columns, ["serial", "taken_at"])
    for column in columns:
        mismatch = [
            (i, a, b) for i, (a, b) in enumerate(zip(stored[column], expected[column]))
            if not (a == b or (a is None and b is None))
        ]
        assert mismatch == [], f"{column}: first mismatches {mismatch[:3]}"


def test_stored_removals_equal_ground_truth(round_trip):
    truth, store, _ = round_trip
    columns = ["serial", "removed_at", "reason"]
    expected = _normalise(truth.removals, columns, ["serial", "removed_at"])
    stored = _normalise(store.read("removals"), columns, ["serial", "removed_at"])
    assert stored.to_dict("records") == expected.to_dict("records")
