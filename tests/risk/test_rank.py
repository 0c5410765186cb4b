"""Scoring and ranking: monotone score, group awareness, degraded caution, filters."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest

from triage.risk.groups import GroupConfig
from triage.risk.rank import filter_ranked, rank_drives
from triage.risk.view import RowFilter, site_of
from triage.risk.score import risk_score


def _latest(rows):
    return pd.DataFrame(rows, columns=["serial", "model", "host", "slot", "group", "power_on_hours"])


def _flags(rows):
    return pd.DataFrame(rows, columns=["serial", "rule_id", "severity", "category", "title", "evidence"])


def test_score_is_monotone_in_each_input():
    base = risk_score(0.3, 0.1, 0.05)
    assert risk_score(0.6, 0.1, 0.05) > base
    assert risk_score(0.3, 0.2, 0.05) > base
    assert risk_score(0.3, 0.1, 0.10) > base
    # the formula by hand: 1 - 0.7 * 0.9 * 0.95 = 0.4015
    assert base == pytest.approx(0.4015)


def test_two_flagged_drives_in_one_group_outrank_a_lone_flagged_drive():
    latest = _latest([
        ("QX1", "QH-HD8T-A", "ash-r1-n01", "3", "ash-pool-1", 20000),
        ("QX2", "QH-HD8T-A", "ash-r1-n01", "4", "ash-pool-1", 20000),
        ("QX3", "QH-HD8T-A", "ash-r1-n01", "5", "ash-pool-1", 20000),
        ("QY1", "Tallow 14T", "birch-r2-n04", "1", "birch-pool-2", 20000),
        ("QY2", "Tallow 14T", "birch-r2-n04", "2", "birch-pool-2", 20000),
        ("QY3", "Tallow 14T", "birch-r2-n04", "3", "birch-pool-2", 20000),
    ])
    flags = _flags([
        (s, "pending-growth", "replace-now", "media", "pending sectors growing", f"pending 0 -> 24 in 3 days ({s})")
        for s in ("QX1", "QX2", "QY1")
    ])
    drives, groups = rank_drives(latest, flags, None)
    assert list(drives["serial"][:3]) == ["QX1", "QX2", "QY1"]
    assert drives.set_index("serial").loc["QY1", "score"] == pytest.approx(0.9)  # lone: its severity weight
    assert drives["p_fail"].isna().all()  # rules alone


def test_model_probability_orders_unflagged_drives():
    latest = _latest([("A", "Corvid NV1920", "cedar-1", "1", None, 100), ("B", "Corvid NV1920", "cedar-1", "2", None, 100)])
    drives, _ = rank_drives(latest, _flags([]), pd.Series({"A": 0.01, "B": 0.04}), horizon_days=30)
    assert list(drives["serial"]) == ["B", "A"]
    assert list(drives["rank"]) == [1, 2]


def test_degraded_group_action_carries_the_caution():
    latest = _latest([("A", "QH-HD8T-A", "ash-1", "1", "g", 10), ("B", "QH-HD8T-A", "ash-1", "2", "g", 10)])
    flags = _flags([("A", "realloc", "replace-soon", "media", "reallocations", "reallocated 8 -> 40")])
    lost = pd.DataFrame({"group": ["g"], "serial": ["C"]})
    drives, _ = rank_drives(latest, flags, None, lost=lost, config=GroupConfig())
    action = drives.set_index("serial").loc["A", "action"]
    assert "do not pull a second drive from this group before the rebuild finishes" in action
    assert "follow the site's change procedure" in action
    assert drives["degraded"].all()


def test_check_path_action_says_not_to_pull_the_drive():
    latest = _latest([("A", "QH-HD8T-A", "ash-1", "1", None, 10)])
    flags = _flags([("A", "crc-burst", "check-path", "check-path", "link errors", "crc 0 -> 310 in 1 day")])
    drives, _ = rank_drives(latest, flags, None)
    assert "do not pull the drive" in drives.loc[0, "action"]
    assert drives.loc[0, "evidence"] == ["crc 0 -> 310 in 1 day"]


def test_filters_combine_host_site_group_severity_and_top():
    latest = _latest([("A", "m", "ash-1", "1", "ga", 1), ("B", "m", "birch-1", "1", "gb", 1),
                      ("C", "m", "ash-2", "1", "gc", 1)])
    flags = _flags([("A", "r", "watch", "media", "t", "e"), ("C", "r", "replace-now", "media", "t", "e")])
    drives, _ = rank_drives(latest, flags, None)
    assert list(filter_ranked(drives, RowFilter(site=["ash"]))["serial"]) == ["C", "A"]
    assert list(filter_ranked(drives, RowFilter(host=["ash-1"]))["serial"]) == ["A"]
    assert list(filter_ranked(drives, RowFilter(group=["g[bc]"]))["serial"]) == ["C", "B"]
    assert list(filter_ranked(drives, RowFilter(severity=["watch"]))["serial"]) == ["A"]
    assert list(filter_ranked(drives, RowFilter(top=1))["serial"]) == ["C"]
    with pytest.raises(ValueError, match="unknown severity"):
        filter_ranked(drives, RowFilter(severity=["urgent"]))


def test_site_is_the_host_name_prefix():
    assert site_of("cedar-r4-n11") == "cedar"
    assert site_of("birch.quillmere.example") == "birch"


def test_an_unreadable_saved_model_means_rules_alone_with_a_note(tmp_path):
    from triage.risk.rank import rank_store
    from triage.store.dataset import Store

    store = Store(tmp_path / "store")
    store.append("snapshots", pd.DataFrame({
        "serial": ["QN1"], "model": ["Corvid NV1920"], "bus": ["nvme"], "host": ["cedar-r1-n02"],
        "taken_at": pd.to_datetime(["2026-11-01T02:00:00Z"]), "power_on_hours": [5000]}))
    old = store.models_dir / "fleet-risk-v1-20260101T000000Z"
    old.mkdir(parents=True)
    (old / "model.json").write_text('{"format": "triage-fleet-risk", "format_version": 999}')
    result = rank_store(store, SimpleNamespace(rules=[], window_days=3),
                        evaluate=lambda ruleset, history, now=None: pd.DataFrame(
                            columns=["serial", "rule_id", "severity", "category", "title", "evidence"]))
    assert not result.model_used and len(result.drives) == 1
    assert any("unreadable" in note and "triage fit" in note for note in result.notes)


def test_action_tier_comes_before_probability():
    # the case: a watch drive with P 57 % ranked above a replace-soon drive with P 1.6 %
    latest = _latest([("W", "m", "ash-1", "1", None, 10), ("S", "m", "ash-1", "2", None, 10),
                      ("C", "m", "ash-1", "3", None, 10), ("N", "m", "ash-1", "4", None, 10)])
    flags = _flags([("W", "r1", "watch", "media", "t", "e"), ("S", "r2", "replace-soon", "media", "t", "e"),
                    ("C", "r3", "check-path", "path", "t", "e")])
    p_fail = pd.Series({"W": 0.57, "S": 0.016, "C": 0.001, "N": 0.9})
    drives, _ = rank_drives(latest, flags, p_fail, horizon_days=30)
    # replace now, replace soon, check the path, watch; unflagged drives last whatever their P
    assert list(drives["serial"]) == ["S", "C", "W", "N"]
    assert list(drives["severity"])[:3] == ["replace-soon", "check-path", "watch"]
    # the score shown is still the formula: 1 - (1 - 0.3)(1 - 0.57) = 0.699 for the watch drive
    assert drives.set_index("serial").loc["W", "score"] == pytest.approx(0.699)


def test_score_orders_drives_inside_one_tier():
    latest = _latest([("A", "m", "ash-1", "1", None, 10), ("B", "m", "ash-1", "2", None, 10)])
    flags = _flags([(s, "r", "watch", "media", "t", "e") for s in ("A", "B")])
    drives, _ = rank_drives(latest, flags, pd.Series({"A": 0.02, "B": 0.2}), horizon_days=30)
    assert list(drives["serial"]) == ["B", "A"]


def test_media_growth_and_rising_crc_give_both_actions_path_first():
    latest = _latest([("A", "QH-HD8T-A", "ash-1", "1", None, 10)])
    flags = _flags([("A", "pending-growth", "replace-soon", "media", "t", "pending 0 -> 24"),
                    ("A", "crc-rising", "check-path", "path", "t", "crc 10 -> 90")])
    row = rank_drives(latest, flags, None)[0].iloc[0]
    assert row["severity"] == "replace-soon" and row["categories"] == ["media", "path"]
    assert len(row["actions"]) == 2
    assert row["actions"][0].startswith("check the path first") and "same bad path" in row["actions"][0]
    assert "replace this drive within the week" in row["actions"][1]
    assert row["action"].index("check the path") < row["action"].index("replace this drive")


def test_thermal_flag_adds_the_cooling_action():
    latest = _latest([("A", "m", "ash-1", "1", None, 10)])
    flags = _flags([("A", "hot", "watch", "thermal", "t", "58 C"), ("A", "realloc", "watch", "media", "t", "e")])
    row = rank_drives(latest, flags, None)[0].iloc[0]
    assert row["actions"] == ["check the bay's cooling (airflow, fans, ambient temperature)"]


def test_degraded_group_names_the_lost_member_and_when_it_was_last_seen():
    latest = _latest([("A", "QH-HD8T-A", "ash-1", "1", "g", 10), ("B", "QH-HD8T-A", "ash-1", "2", "g", 10)])
    flags = _flags([("A", "realloc", "replace-soon", "media", "reallocations", "reallocated 8 -> 40")])
    lost = pd.DataFrame({"group": ["g"], "serial": ["C"], "host": ["ash-1"], "slot": ["3"],
                         "last_seen": [pd.Timestamp("2026-11-27T02:10Z")]})
    drives, groups = rank_drives(latest, flags, None, lost=lost)
    action = drives.set_index("serial").loc["A", "action"]
    assert "lost C at ash-1/3, last seen 2026-11-27 02:10 UTC" in action
    assert action.index("follow the site's change procedure") < action.index("replace this drive")
    assert groups.set_index("group").loc["g", "lost_serials"] == ["C"]


def test_of_two_at_risk_members_of_a_degraded_group_the_likelier_to_fail_in_the_rebuild_goes_first():
    from scipy.stats import expon

    latest = _latest([("A", "m", "ash-1", "1", "g", 10), ("B", "m", "ash-1", "2", "g", 10),
                      ("C", "m", "ash-1", "3", "g", 10)])
    flags = _flags([(s, "realloc", "replace-soon", "media", "t", "e") for s in ("A", "B")])
    lost = pd.DataFrame({"group": ["g"], "serial": ["D"], "host": ["ash-1"], "slot": ["4"],
                         "last_seen": [pd.Timestamp("2026-11-27T02:10Z")]})
    p_fail = pd.Series({"A": 0.05, "B": 0.40, "C": 0.01})
    drives, _ = rank_drives(latest, flags, p_fail, horizon_days=30, lost=lost)
    by_serial = drives.set_index("serial")
    assert by_serial.loc["B", "group_first"] == 1 and by_serial.loc["A", "group_first"] == 2
    assert list(drives["serial"][:2]) == ["B", "A"]
    assert "at-risk member 1 of 2 in g" in by_serial.loc["B", "action"]
    # B's probability over the 24 h rebuild: constant hazard from P(30 d) = 0.40, i.e. the
    # exponential CDF at 1 day with rate -ln(0.6)/30 (scipy.stats.expon), combined with the
    # replace-soon prior 0.2 as an independent cause.
    p_window = expon.cdf(1.0, scale=30 / -np.log(0.6))
    assert by_serial.loc["B", "p_member"] == pytest.approx(1 - (1 - p_window) * (1 - 0.2))


def _sightings(rows):
    return pd.DataFrame(rows, columns=["serial", "taken_at", "model", "host", "slot", "group"])


def test_a_drive_silent_past_the_limit_is_not_reporting_unless_removed_or_replaced():
    from triage.risk.rank import silent_drives

    as_of = pd.Timestamp("2026-11-30T03:00Z")
    old = pd.Timestamp("2026-11-26T03:00Z")
    sightings = _sightings([
        ("FRESH", as_of, "m", "ash-1", "1", "g"),
        ("QUIET", old, "m", "ash-1", "2", "g"),
        ("PULLED", old, "m", "ash-1", "3", "g"),
        ("SWAPPED", old, "m", "ash-1", "4", "g"),
        ("NEWCOMER", as_of, "m", "ash-1", "4", "g"),  # took SWAPPED's slot
    ])
    removals = pd.DataFrame({"serial": ["PULLED"], "removed_at": [old], "reason": ["failed"]})
    silent = silent_drives(sightings, removals, as_of.to_pydatetime(), silent_hours=36)
    assert list(silent["serial"]) == ["QUIET"]
    assert silent.loc[0, "last_seen"] == old


def test_silence_rolls_up_to_host_and_site():
    from triage.risk.rank import not_reporting_summary, silent_drives

    as_of = pd.Timestamp("2026-11-30T03:00Z")
    old = pd.Timestamp("2026-11-25T03:00Z")
    sightings = _sightings([
        ("A1", old, "m", "birch-1", "1", None), ("A2", old, "m", "birch-2", "1", None),  # all of site birch
        ("B1", old, "m", "ash-1", "1", None), ("B2", old, "m", "ash-1", "2", None),      # all of host ash-1
        ("C1", old, "m", "ash-2", "1", None), ("C2", as_of, "m", "ash-2", "2", None),    # one drive of ash-2
    ])
    none = pd.DataFrame(columns=["serial", "removed_at", "reason"])
    silent = silent_drives(sightings, none, as_of.to_pydatetime())
    summary = not_reporting_summary(silent, sightings, none)
    assert [(r.scope, r.name, r.drives) for r in summary.itertuples()] == [
        ("host", "ash-1", 2), ("drive", "C1 at ash-2/1", 1), ("site", "birch", 2)]


def test_stale_newest_capture_is_a_warning():
    from datetime import datetime, timezone

    from triage.risk.rank import RankResult, silence_warnings

    result = RankResult(pd.DataFrame(), pd.DataFrame(), False, None, datetime(2026, 11, 28, 2, tzinfo=timezone.utc))
    now = datetime(2026, 11, 30, 2, tzinfo=timezone.utc)
    [line] = silence_warnings(result, now=now, stale_hours=36)
    assert "48 h old" in line and "2026-11-28 02:00 UTC" in line
    assert silence_warnings(result, now=now, stale_hours=72) == []
    assert silence_warnings(RankResult(pd.DataFrame(), pd.DataFrame(), False, None, None), now=now)
