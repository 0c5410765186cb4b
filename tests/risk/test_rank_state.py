"""Ranking from the current-state table gives what ranking from the history gives.

The reference (``ranked_from_partitions``) is the way ``rank_store`` read the store before the
state existed: the day partitions of the look-back window, pandas' ``groupby().last()`` for each
drive's latest values, ``Store.last_times`` / ``last_rows`` for every drive's last sighting, the
model scored on every history row, and a straightforward per-member loop for lost members. The
vectorised pieces are checked against one-at-a-time or brute-force computations.
"""

from __future__ import annotations

import itertools
import shutil
import subprocess
import sys
from datetime import timedelta

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from tests.survival.fleetsim import simulate_fleet
from triage.risk.groups import (
    GroupConfig,
    GroupRule,
    group_risk,
    lost_members,
    member_probabilities,
    member_probability,
    prob_more_than,
    window_probability,
)
from triage.risk.rank import (
    GROUP_LOOKBACK_DAYS,
    MODEL_COLUMNS,
    STALE_HOURS,
    last_values,
    rank_drives,
    rank_store,
    silent_drives,
    summarise_flags,
)
from triage.risk.score import SEVERITY_WEIGHT, drive_actions, risk_score, risk_scores
from triage.rules import evaluate, load_rules
from triage.store import current
from triage.store.dataset import Store
from triage.survival.landmark import STATE_SOURCES
from triage.survival.run import fit_store

HOSTS = np.array(["qh-r1-n01", "qh-r1-n02", "qh-r2-n01", "qh-r2-n02"])


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    """An invented Quillmere fleet committed night by night (the state kept incrementally), with
    places, groups, a host gone quiet, a lost group member and a fitted model."""
    snapshots, removals, _ = simulate_fleet(n_drives=240, days=36, seed=5, scale_hours=20_000)
    position = snapshots["serial"].map({s: i for i, s in enumerate(sorted(snapshots["serial"].unique()))})
    snapshots["host"] = HOSTS[position % len(HOSTS)]
    snapshots["slot"] = "bay" + (position // len(HOSTS)).astype(str).str.zfill(2)
    snapshots["group"] = snapshots["host"] + "-g" + (position // len(HOSTS) % 5).astype(str)
    last_night = snapshots["taken_at"].max().floor("D")
    quiet = (snapshots["host"] == HOSTS[3]) & (snapshots["taken_at"] >= last_night - np.timedelta64(2, "D"))
    vanished = position.eq(0) & (snapshots["taken_at"] >= last_night - np.timedelta64(1, "D"))
    snapshots = snapshots[~quiet & ~vanished].copy()
    root = tmp_path_factory.mktemp("rank-state")
    store = Store(root)
    nights = snapshots["taken_at"].dt.floor("D")
    order = sorted(nights.unique())
    order = order[:-3] + [order[-1], order[-3], order[-2]]  # a late file for an older night
    for number, night in enumerate(order):
        frames = {"snapshots": snapshots[nights == night]}
        if number == len(order) // 2:
            frames["removals"] = removals
        store.commit(frames)
    model, _ = fit_store(store)
    return {"root": root, "model": model}


def ranked_from_partitions(store: Store, ruleset, model, silent_hours: float = STALE_HOURS):
    """The reference: rank as done before the state (module docstring)."""
    newest = pd.Timestamp(store.days("snapshots")[-1], tz="UTC")
    lookback = max(ruleset.window_days, GROUP_LOOKBACK_DAYS, int(silent_hours // 24) + 1)
    history = store.read("snapshots", since=(newest - timedelta(days=lookback)).to_pydatetime())
    removals = store.read("removals")
    as_of = history["taken_at"].max().to_pydatetime()
    latest = history.sort_values("taken_at").groupby("serial", as_index=False).last()
    detail = ["serial", "taken_at", "model", "host", "slot", "group"]
    removed = set(removals["serial"])
    last_seen = store.last_times("snapshots", "serial")
    older = last_seen[~last_seen["serial"].isin(set(latest["serial"]) | removed)]
    sightings = pd.concat([latest[detail], store.last_rows("snapshots", "serial", detail[2:], last=older)],
                          ignore_index=True)
    silent = silent_drives(sightings, removals, as_of, silent_hours)
    lost = lost_one_by_one(history, removals)
    gone = set(lost["serial"]) | set(silent["serial"])
    removed_at = removals.groupby("serial")["removed_at"].max()
    left = latest["serial"].map(removed_at) >= latest["taken_at"]
    gone |= set(latest.loc[left.fillna(False).astype(bool), "serial"])
    latest = latest[~latest["serial"].isin(gone)]
    flags = evaluate(ruleset, history, now=as_of)
    p_fail = None if model is None else model.predict_fail_probability(latest, history=history)
    horizon = None if model is None else float(model.horizon_days)
    drives, groups = rank_drives(latest, flags, p_fail, horizon_days=horizon, lost=lost)
    return drives, groups, silent, lost, as_of


def lost_one_by_one(history: pd.DataFrame, removals: pd.DataFrame) -> pd.DataFrame:
    """lost_members' rule (triage.risk.groups), member by member in plain Python."""
    rows = []
    placed = history.dropna(subset=["group"])
    for (group, serial), part in placed.sort_values("taken_at").groupby(["group", "serial"]):
        seen = part["taken_at"].max()
        group_night = placed.loc[placed["group"] == group, "taken_at"].max().floor("D")
        mine = removals[removals["serial"] == serial].sort_values("removed_at")
        reason = mine["reason"].iloc[-1] if len(mine) else None
        removed_after = len(mine) and reason in ("failed", "proactive") and mine["removed_at"].iloc[-1] >= seen
        if not ((seen.floor("D") < group_night and reason != "retired") or removed_after):
            continue
        host, slot = part["host"].dropna().iloc[-1], part["slot"].dropna().iloc[-1]
        others = history[(history["host"] == host) & (history["slot"] == slot) & (history["serial"] != serial)]
        if len(others) and (others.groupby("serial")["taken_at"].min() > seen).any():
            continue
        rows.append((group, serial, host, slot, seen))
    lost = pd.DataFrame(rows, columns=["group", "serial", "host", "slot", "last_seen"])
    return lost.astype({"last_seen": history["taken_at"].dtype})


def test_rank_from_the_state_equals_rank_from_the_partitions(fleet):
    store = Store(fleet["root"])
    ruleset = load_rules([], include_defaults=True)
    result = rank_store(store, ruleset, model=fleet["model"])
    drives, groups, silent, lost, as_of = ranked_from_partitions(store, ruleset, fleet["model"])
    assert not any("rebuilt" in n for n in result.notes)  # the commits kept the state
    assert result.as_of == as_of
    assert len(lost) and len(silent) and drives["rules"].map(len).gt(0).any()  # the fleet has all three
    pd.testing.assert_frame_equal(result.drives, drives)
    pd.testing.assert_frame_equal(result.groups, groups)
    pd.testing.assert_frame_equal(result.lost, lost)
    assert list(result.silent["serial"]) == list(silent["serial"])


def test_rank_after_a_rebuild_is_the_same(fleet, tmp_path):
    store = Store(fleet["root"])
    ruleset = load_rules([], include_defaults=True)
    kept = rank_store(store, ruleset, model=fleet["model"])
    copy = tmp_path / "copy"
    shutil.copytree(fleet["root"], copy)
    shutil.rmtree(copy / current.CURRENT_DIR)
    rebuilt = rank_store(Store(copy), ruleset, model=fleet["model"])
    assert any(n.startswith("current state rebuilt") for n in rebuilt.notes)
    pd.testing.assert_frame_equal(kept.drives, rebuilt.drives)
    pd.testing.assert_frame_equal(kept.not_reporting, rebuilt.not_reporting)


def test_a_rule_window_longer_than_the_state_reads_the_partitions(fleet, monkeypatch):
    store = Store(fleet["root"])
    ruleset = load_rules([], include_defaults=True)
    monkeypatch.setattr(type(ruleset), "window_days", property(lambda self: current.RECENT_DAYS + 5))
    result = rank_store(store, ruleset, model=None)
    drives, *_ = ranked_from_partitions(store, ruleset, None)
    pd.testing.assert_frame_equal(result.drives, drives)


def test_rank_never_imports_the_fitting_stack(fleet):
    """Reading the saved model and scoring it is numpy and pandas only."""
    code = ("import sys\nfrom triage.cli import main\n"
            f"sys.argv = ['triage', 'rank', '--store', {str(fleet['root'])!r}, '--format', 'json']\n"
            "try:\n    main()\nexcept SystemExit:\n    pass\n"
            "heavy = [m for m in ('lifelines', 'scipy', 'sklearn', 'statsmodels', 'matplotlib') if m in sys.modules]\n"
            "print('HEAVY', heavy, file=sys.stderr)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert '"p_fail"' in out.stdout and "HEAVY []" in out.stderr, out.stderr[-2000:]


def test_model_columns_are_what_the_model_scores_on():
    assert set(MODEL_COLUMNS) == set(STATE_SOURCES)


# -- the vectorised pieces against one-at-a-time or brute-force computations -------------------
def brute_force_more_than(p: list[float], tolerance: int) -> float:
    """P(X > t) by summing over all 2**n outcomes (the definition, no recurrence)."""
    total = 0.0
    for outcome in itertools.product((0, 1), repeat=len(p)):
        if sum(outcome) > tolerance:
            total += np.prod([pi if o else 1 - pi for pi, o in zip(p, outcome)])
    return total


def test_group_risk_matches_brute_force_and_the_one_group_recurrence():
    rng = np.random.default_rng(3)
    sizes = rng.integers(1, 8, size=40)
    members = pd.DataFrame({
        "serial": [f"QM{i:04d}" for i in range(sizes.sum())],
        "group": np.repeat([f"qh-{'dp' if g % 3 == 0 else 'sp'}-{g:02d}" for g in range(len(sizes))], sizes),
        "p_member": rng.choice([0.0, 0.01, 0.2, 0.5, 0.9], size=sizes.sum()),
    }).sample(frac=1.0, random_state=1)  # members of a group not next to each other
    lost = pd.DataFrame({"group": ["qh-sp-01", "qh-dp-03", "qh-dp-03"], "serial": ["x", "y", "z"]})
    config = GroupConfig((GroupRule("*-dp-*", tolerance=2),))
    groups, importance = group_risk(members, lost, config)
    for row in groups.itertuples():
        part = members[members["group"] == row.group]
        p = part["p_member"].tolist()
        assert row.p_group_loss == prob_more_than(p, row.tolerance_left)  # the same recurrence, bit for bit
        if row.tolerance_left >= 0:
            assert row.p_group_loss == pytest.approx(brute_force_more_than(p, row.tolerance_left), abs=1e-12)
        for i, serial in enumerate(part["serial"]):
            without = p[:i] + [0.0] + p[i + 1:]
            assert importance[serial] == row.p_group_loss - prob_more_than(without, row.tolerance_left)


def test_member_probabilities_and_scores_equal_the_one_drive_formulas():
    rng = np.random.default_rng(4)
    n = 300
    p_fail = pd.Series(np.where(rng.uniform(size=n) < 0.1, np.nan, rng.uniform(0, 0.3, n)))
    severity = pd.Series(rng.choice(np.array(["replace-now", "watch", "check-path", None], dtype=object), n))
    group = pd.Series(rng.choice(np.array(["qh-dp-1", "qh-sp-2", None], dtype=object), n))
    config = GroupConfig((GroupRule("*-dp-*", tolerance=2, rebuild_hours=48),))
    got = member_probabilities(p_fail, severity, group, 30.0, config)
    for k in range(n):
        p_window = None
        if not pd.isna(p_fail[k]) and isinstance(group[k], str):
            p_window = window_probability(p_fail[k], 30.0, config.for_group(group[k]).rebuild_hours / 24.0)
        assert got[k] == member_probability(p_window, severity[k])
    weight = severity.map(lambda s: SEVERITY_WEIGHT.get(s, 0.0)).to_numpy(dtype=float)
    importance = rng.uniform(0, 0.1, n)
    scores = risk_scores(weight, p_fail.to_numpy(), importance)
    assert all(scores[k] == risk_score(weight[k], p_fail[k], importance[k]) for k in range(n))


def test_flag_summary_equals_a_drive_by_drive_summary():
    rng = np.random.default_rng(5)
    flags = pd.DataFrame({
        "serial": rng.choice(["QA", "QB", "QC", "QD"], size=30),
        "rule_id": rng.choice(["pending-growth", "crc-burst", "hot-bay", "spare-low"], size=30),
        "severity": rng.choice(["replace-now", "replace-soon", "check-path", "watch"], size=30),
        "category": rng.choice(np.array(["media", "path", "thermal", None], dtype=object), size=30),
        "title": "a finding",
        "evidence": rng.choice(np.array(["", "pending 0 -> 8", None], dtype=object), size=30),
    })
    summary = summarise_flags(flags).set_index("serial")
    order = {"replace-now": 0, "replace-soon": 1, "check-path": 2, "watch": 3}
    for serial, part in flags.groupby("serial"):
        part = part.assign(o=part["severity"].map(order)).sort_values(["o", "rule_id"], kind="stable")
        row = summary.loc[serial]
        assert row["severity"] == part["severity"].iloc[0]
        assert row["rules"] == list(dict.fromkeys(part["rule_id"]))
        assert row["categories"] == list(dict.fromkeys(c for c in part["category"] if c))
        assert row["actions"] == drive_actions(zip(part["severity"], part["category"]))
        assert row["evidence"] == [e if isinstance(e, str) and e else "a finding" for e in part["evidence"]]


def test_last_values_equal_pandas_groupby_last_with_nulls_and_dtypes():
    rng = np.random.default_rng(6)
    n = 500
    frame = pd.DataFrame({
        "serial": rng.choice(["QA", "QB", "QC", "QD", "QE"], size=n),
        "taken_at": pd.to_datetime("2026-11-01", utc=True) + pd.to_timedelta(rng.permutation(n), unit="min"),
        "host": rng.choice(np.array(["qh-1", "qh-2", None], dtype=object), size=n),
        "power_on_hours": pd.array(np.where(rng.uniform(size=n) < 0.3, None, rng.integers(0, 9000, n)), dtype="Int64"),
        "prefail_tripped": pd.array(np.where(rng.uniform(size=n) < 0.3, None, rng.uniform(size=n) < 0.5),
                                    dtype="boolean"),
    })
    table = pa.Table.from_pandas(frame, preserve_index=False).replace_schema_metadata(None)  # as the store holds it
    expected = table.to_pandas().sort_values("taken_at").groupby("serial", as_index=False).last()
    got = last_values(table, ["serial", "taken_at", "host", "power_on_hours", "prefail_tripped"])
    pd.testing.assert_frame_equal(got, expected[got.columns])


def test_lost_members_equal_the_member_by_member_rule():
    snapshots, removals, _ = simulate_fleet(n_drives=60, days=12, seed=9, scale_hours=8_000)
    position = snapshots["serial"].map({s: i for i, s in enumerate(sorted(snapshots["serial"].unique()))})
    snapshots["host"] = HOSTS[position % 2]
    snapshots["slot"] = "bay" + (position // 2 % 9).astype(str)  # slots shared over time: replacements
    snapshots["group"] = np.where(position % 7 == 0, None, snapshots["host"] + "-g" + (position % 3).astype(str))
    got = lost_members(snapshots, removals)
    expected = lost_one_by_one(snapshots, removals)
    assert len(expected)
    pd.testing.assert_frame_equal(got.reset_index(drop=True), expected)
