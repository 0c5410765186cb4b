"""Scoring and ranking: monotone score, group awareness, degraded caution, filters."""

from __future__ import annotations

from types import SimpleNamespace

import pandas as pd
import pytest

from triage.risk.groups import GroupConfig
from triage.risk.rank import filter_ranked, rank_drives, site_of
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
    assert list(filter_ranked(drives, site=["ash"])["serial"]) == ["C", "A"]
    assert list(filter_ranked(drives, host=["ash-1"])["serial"]) == ["A"]
    assert list(filter_ranked(drives, group=["g[bc]"])["serial"]) == ["C", "B"]
    assert list(filter_ranked(drives, severity=["watch"])["serial"]) == ["A"]
    assert list(filter_ranked(drives, top=1)["serial"]) == ["C"]
    with pytest.raises(ValueError, match="unknown severity"):
        filter_ranked(drives, severity=["urgent"])


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
