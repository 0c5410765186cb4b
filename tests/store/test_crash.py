"""SIGKILL at many points of real ``ingest``, ``nightly`` and ``tickets`` runs (harness: crashes.py).

Each test kills the main process alone and the whole process group at points spread over a
clean run's duration, checks the store after every kill, then lets one run finish and compares
with a store that was never killed. ``benchmarks/crash.py`` does the same with many more points.
"""

from __future__ import annotations

import shutil

import pytest

from tests.store.crashes import COMPLETED, check_store, open_ticket_keys, run, run_and_kill, seed_store, store_rows, timed
from triage.demo import FleetSpec, generate_fleet, write_captures

#: Kill points as fractions of a clean run's duration; each is tried on the main process alone
#: and on the process group.
FRACTIONS = (0.3, 0.7)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Capture files of a small invented fleet, and a store and ticket file never killed."""
    work = tmp_path_factory.mktemp("crash")
    write_captures(generate_fleet(FleetSpec(seed=11, n_drives=60, days=8)), work / "captures")
    seed_store(work, "captures", "seed")
    shutil.copytree(work / "seed", work / "night")
    seconds = {"ingest": timed(["ingest", "captures", "--store", "ingested"], work),
               "nightly": timed(["nightly", "--dumps", "captures", "--out", "nightly.csv", "--store", "night"], work),
               "tickets": timed(["tickets", "--out", "tickets.csv", "--store", "ingested"], work)}
    return work, seconds


def _kill_points(seconds):
    return [(seconds * f, group) for f in FRACTIONS for group in (False, True)]


def test_killed_ingest_leaves_a_whole_store_and_converges(reference, tmp_path):
    work, seconds = reference
    shutil.copytree(work / "captures", tmp_path / "captures")
    args = ["ingest", "captures", "--store", "store"]
    for delay, group in _kill_points(seconds["ingest"]):
        killed = run_and_kill(args, tmp_path, delay, group)
        assert killed.leftovers == [], f"processes outlived a killed ingest: {killed}"
        check_store(tmp_path / "store")
    assert run(args, tmp_path).returncode == 0
    assert store_rows(tmp_path / "store") == store_rows(work / "ingested")
    assert not list((tmp_path / "store").rglob(".part-*"))


def test_killed_nightly_leaves_a_whole_store_and_converges(reference, tmp_path):
    work, seconds = reference
    shutil.copytree(work / "captures", tmp_path / "captures")
    shutil.copytree(work / "seed", tmp_path / "store")
    args = ["nightly", "--dumps", "captures", "--out", "tickets.csv", "--store", "store"]
    for delay, group in _kill_points(seconds["nightly"]):
        killed = run_and_kill(args, tmp_path, delay, group)
        assert killed.leftovers == [], f"processes outlived a killed nightly: {killed}"
        check_store(tmp_path / "store", tmp_path / "tickets.csv")
    assert run(args, tmp_path).returncode in COMPLETED
    assert store_rows(tmp_path / "store") == store_rows(work / "night")
    assert open_ticket_keys(tmp_path / "tickets.csv") == open_ticket_keys(work / "nightly.csv")


def test_killed_tickets_export_is_never_half_written(reference, tmp_path):
    work, seconds = reference
    shutil.copytree(work / "ingested", tmp_path / "store")
    args = ["tickets", "--out", "tickets.csv", "--store", "store"]
    for delay, group in _kill_points(seconds["tickets"]):
        killed = run_and_kill(args, tmp_path, delay, group)
        assert killed.leftovers == []
        check_store(tmp_path / "store", tmp_path / "tickets.csv")
    assert run(args, tmp_path).returncode in COMPLETED
    assert open_ticket_keys(tmp_path / "tickets.csv") == open_ticket_keys(work / "tickets.csv")
    assert not list(tmp_path.glob(".tickets.csv.*.tmp"))
