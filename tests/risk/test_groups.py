"""Group loss probability, window rescaling, group config and degraded-group detection."""

from __future__ import annotations

import pandas as pd
import pytest
from scipy.stats import binom

from triage.risk.groups import (
    GroupConfig,
    group_risk,
    lost_members,
    prob_more_than,
    window_probability,
)


@pytest.mark.parametrize("n,p,t", [(4, 0.1, 1), (8, 0.03, 2), (12, 0.5, 5), (6, 0.2, 0)])
def test_equal_member_probabilities_match_the_binomial_tail(n, p, t):
    # Independent library: with equal p the Poisson-binomial is Binomial(n, p), and
    # scipy.stats.binom.sf(t, n, p) = P(X > t).
    assert prob_more_than([p] * n, t) == pytest.approx(binom.sf(t, n, p), rel=1e-12)


def test_unequal_three_member_group_matches_hand_computation():
    # p = 0.1, 0.2, 0.3; tolerance 1, so loss = two or three failures.
    #   all three:  0.1*0.2*0.3                    = 0.006
    #   exactly 2:  0.1*0.2*0.7 + 0.1*0.8*0.3 + 0.9*0.2*0.3
    #             = 0.014 + 0.024 + 0.054          = 0.092
    #   P(X > 1)  = 0.006 + 0.092                  = 0.098
    assert prob_more_than([0.1, 0.2, 0.3], 1) == pytest.approx(0.098, abs=1e-12)
    # tolerance 0: 1 - 0.9*0.8*0.7 = 1 - 0.504 = 0.496
    assert prob_more_than([0.1, 0.2, 0.3], 0) == pytest.approx(0.496, abs=1e-12)


def test_group_past_its_tolerance_is_certain_loss():
    assert prob_more_than([0.0, 0.0], -1) == 1.0


def test_probability_outside_unit_interval_is_refused():
    with pytest.raises(ValueError, match="within"):
        prob_more_than([0.2, 1.5], 1)


def test_window_probability_rescales_under_constant_hazard():
    # constant hazard: survival over 30 days = (survival over 1 day) ** 30, so going back down
    # from 30 days to 1 day must return the one-day probability.
    p_day = 0.002
    p_30 = 1 - (1 - p_day) ** 30
    assert window_probability(p_30, 30, 1) == pytest.approx(p_day, rel=1e-12)


def test_config_first_matching_pattern_wins_and_default_applies(tmp_path):
    path = tmp_path / "groups.toml"
    path.write_text('[[group]]\npattern = "ash-dp-*"\ntolerance = 2\nrebuild_hours = 36\n'
                    '[[group]]\npattern = "ash-*"\ntolerance = 1\n')
    config = GroupConfig.load(path)
    assert config.for_group("ash-dp-07").tolerance == 2
    assert config.for_group("ash-dp-07").rebuild_hours == 36
    assert config.for_group("ash-m-01").tolerance == 1
    assert config.for_group("birch-x").tolerance == 1  # the default


def test_config_bad_tolerance_names_file_and_entry(tmp_path):
    path = tmp_path / "groups.toml"
    path.write_text('[[group]]\npattern = "*"\ntolerance = -1\n')
    with pytest.raises(ValueError, match=r"groups.toml: group entry 1: field 'tolerance'"):
        GroupConfig.load(path)


def _snap(serial, group, slot, day, host="ash-r1-n01"):
    return {"serial": serial, "group": group, "host": host, "slot": slot,
            "taken_at": pd.Timestamp(f"2026-11-{day:02d}T02:00:00Z")}


EMPTY_REMOVALS = pd.DataFrame({"serial": pd.Series(dtype=str), "removed_at": pd.Series(dtype="datetime64[ns, UTC]"),
                               "reason": pd.Series(dtype=str)})


def test_member_missing_from_latest_night_makes_group_degraded():
    snaps = pd.DataFrame([_snap(s, "g1", f"s{i}", d) for d in (1, 2) for i, s in enumerate(["A", "B", "C"])]
                         + [_snap("A", "g1", "s0", 3), _snap("B", "g1", "s1", 3)])
    lost = lost_members(snaps, EMPTY_REMOVALS)
    assert list(lost["serial"]) == ["C"]


def test_member_replaced_in_its_slot_is_not_lost():
    snaps = pd.DataFrame([_snap(s, "g1", f"s{i}", 1) for i, s in enumerate(["A", "B", "C"])]
                         + [_snap(s, "g1", f"s{i}", 2) for i, s in enumerate(["A", "B", "D"])])
    assert lost_members(snaps, EMPTY_REMOVALS).empty


def test_retired_member_is_not_lost():
    snaps = pd.DataFrame([_snap(s, "g1", f"s{i}", 1) for i, s in enumerate(["A", "B", "C"])]
                         + [_snap(s, "g1", f"s{i}", 2) for i, s in enumerate(["A", "B"])])
    removals = pd.DataFrame({"serial": ["C"], "removed_at": [pd.Timestamp("2026-11-01T12:00Z")],
                             "reason": ["retired"]})
    assert lost_members(snaps, removals).empty


def test_member_removed_as_failed_and_not_replaced_is_lost():
    snaps = pd.DataFrame([_snap(s, "g1", f"s{i}", 1) for i, s in enumerate(["A", "B", "C"])]
                         + [_snap(s, "g1", f"s{i}", 2) for i, s in enumerate(["A", "B"])])
    removals = pd.DataFrame({"serial": ["C"], "removed_at": [pd.Timestamp("2026-11-01T12:00Z")],
                             "reason": ["failed"]})
    assert list(lost_members(snaps, removals)["serial"]) == ["C"]


def test_two_weak_members_in_one_group_weigh_more_than_a_lone_one():
    members = pd.DataFrame({
        "serial": ["A1", "A2", "A3", "B1", "B2", "B3"],
        "group": ["pair"] * 3 + ["lone"] * 3,
        "p_member": [0.5, 0.5, 0.0, 0.5, 0.0, 0.0],
    })
    empty = pd.DataFrame(columns=["group", "serial"])
    groups, importance = group_risk(members, empty, GroupConfig())
    loss = groups.set_index("group")["p_group_loss"]
    assert loss["pair"] == pytest.approx(0.25)  # both weak ones fail: 0.5 * 0.5
    assert loss["lone"] == pytest.approx(0.0)
    # importance = p_i * P(others fail exactly t) = 0.5 * 0.5 for a weak drive in "pair"
    assert importance["A1"] == pytest.approx(0.25)
    assert importance["B1"] == pytest.approx(0.0)


def test_lost_member_uses_up_tolerance():
    members = pd.DataFrame({"serial": ["A", "B"], "group": ["g", "g"], "p_member": [0.1, 0.2]})
    lost = pd.DataFrame({"group": ["g"], "serial": ["C"]})
    groups, _ = group_risk(members, lost, GroupConfig())
    row = groups.iloc[0]
    assert bool(row["degraded"]) and row["tolerance_left"] == 0
    assert row["p_group_loss"] == pytest.approx(1 - 0.9 * 0.8)  # any further failure loses data
