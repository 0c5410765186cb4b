"""Drives join, fail, get pulled and replaced the way an operator's fleet does."""

from __future__ import annotations

import numpy as np
import pytest

from triage.demo.fleet import C

# Counters that grow only when a drive is in trouble (not cables, not power events, not the
# benign NVMe error-log noise).
TROUBLE = [C[name] for name in ("reallocated_sectors", "reallocation_events", "pending_sectors",
                                "offline_uncorrectable", "reported_uncorrectable",
                                "command_timeouts", "spin_retries", "media_errors",
                                "spare_loss_pct")]


@pytest.fixture(scope="module")
def replay(default_fleet):
    """Per drive: first and last capture time (UTC us) and the trouble counters at the last."""
    n = len(default_fleet.drives)
    first = np.full(n, np.iinfo(np.int64).max)
    last = np.full(n, -1, dtype=np.int64)
    trouble = np.zeros((n, len(TROUBLE)), dtype=np.int64)
    for state in default_fleet.nights():
        first[state.drive] = np.minimum(first[state.drive], state.taken_at_us)
        last[state.drive] = state.taken_at_us
        trouble[state.drive] = state.counters[:, TROUBLE]
    return first, last, trouble


def test_default_window_holds_tens_of_failures(default_fleet):
    failed = int(default_fleet.drives["failed"].sum())
    assert 20 <= failed <= 300


def test_failure_age_is_never_below_the_age_at_entry(default_fleet):
    d = default_fleet.drives
    assert (d["failure_age_hours"] > d["entry_age_hours"]).all()


def test_most_drives_join_with_power_on_hours_and_some_arrive_new(default_fleet):
    first = default_fleet.drives[default_fleet.drives["generation"] == 0]
    assert (first["entry_age_hours"] > 1000).mean() > 0.5
    assert (first["entry_age_hours"] < 48).sum() > 0


def test_failed_drives_are_not_captured_after_they_fail(default_fleet, replay):
    d = default_fleet.drives
    _, last, _ = replay
    failed = d["failed"].to_numpy()
    fail_us = d.loc[failed, "failure_time"].dt.as_unit("us").astype("int64").to_numpy()
    assert failed.sum() > 0
    assert (last[failed] < fail_us).all()


def test_no_drive_is_captured_before_it_is_installed(default_fleet, replay):
    first, _, _ = replay
    entry = default_fleet.drives["entry_time"].dt.as_unit("us").astype("int64").to_numpy()
    seen = first < np.iinfo(np.int64).max
    assert (first[seen] >= entry[seen]).all()


def test_failed_drives_are_logged_as_failed_days_after_the_failure(default_fleet):
    d = default_fleet.drives
    removals = default_fleet.removals.set_index("serial")
    logged = d[d["failed"] & d["removed_at"].notna()]
    assert len(logged)
    assert (removals.loc[logged["serial"], "reason"] == "failed").all()
    delay = (logged["removed_at"] - logged["failure_time"]).dt.total_seconds() / 86400
    assert delay.between(0.4, 5.0).all()


def test_all_three_removal_reasons_occur(default_fleet):
    assert set(default_fleet.removals["reason"]) == {"failed", "proactive", "retired"}


def test_replacements_take_the_slot_after_the_removed_drive_left(default_fleet):
    d = default_fleet.drives.sort_values("entry_time")
    replacements = d[d["generation"] > 0]
    assert len(replacements)
    for _, new in replacements.iterrows():
        same_slot = d[(d["host"] == new["host"]) & (d["slot"] == new["slot"])]
        before = same_slot[same_slot["entry_time"] < new["entry_time"]].iloc[-1]
        assert before["removed_at"] <= new["entry_time"]
        assert new["serial"] != before["serial"]
        assert new["entry_age_hours"] < 48  # replacements arrive new


def test_at_least_one_redundancy_group_is_degraded_at_the_end(default_fleet):
    assert (default_fleet.groups["missing_at_end"] > 0).any()


def test_warned_failures_show_trouble_counter_growth_before_failing(default_fleet, replay):
    _, last, trouble = replay
    d = default_fleet.drives
    grown = (trouble > default_fleet.baseline[:, TROUBLE]).any(axis=1)
    warned = (d["failed"] & d["warned"]).to_numpy() & (last >= 0)
    assert warned.sum() > 0
    assert grown[warned].mean() >= 0.9


def test_unwarned_failures_show_no_trouble_counter_growth(default_fleet, replay):
    # Part of the failures come without warning (Pinheiro, Weber & Barroso, FAST 2007).
    _, last, trouble = replay
    d = default_fleet.drives
    grown = (trouble > default_fleet.baseline[:, TROUBLE]).any(axis=1)
    silent = (d["failed"] & ~d["warned"]).to_numpy() & (last >= 0)
    assert silent.sum() > 0
    assert not grown[silent].any()


def test_power_on_hours_grow_about_a_day_per_night(small_truth):
    s = small_truth.snapshots.sort_values(["serial", "taken_at"])
    step = s.groupby("serial")["power_on_hours"].diff()
    elapsed = s.groupby("serial")["taken_at"].diff().dt.total_seconds() / 3600
    ok = step.notna()
    # hours counted never exceed wall-clock hours (+1 for flooring); paused while powered off
    assert (step[ok] <= elapsed[ok] + 1).all()
    assert (step[ok] >= 0).all()
    assert step[ok].median() == pytest.approx(24, abs=1)
