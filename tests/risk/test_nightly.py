"""The nightly run: one at a time, exit codes cron can act on."""

from __future__ import annotations

from datetime import datetime, timezone
from types import SimpleNamespace

import pandas as pd
import pytest

from triage.exitcodes import Exit
from triage.risk.nightly import NIGHTLY_LOCK, run_nightly
from triage.risk.rank import RankResult, rank_drives
from triage.store.dataset import Store, StoreLocked

LATEST = pd.DataFrame({"serial": ["QN1"], "model": ["Corvid NV1920"], "host": ["cedar-r1-n02"],
                       "slot": ["nvme0"], "group": [None], "power_on_hours": [5000]})


def _rank_with(flagged):
    def rank(store, ruleset, config=None, **_):
        flags = pd.DataFrame([(s, "media-errors", "replace-soon", "media", "t", "media errors 0 -> 3") for s in flagged],
                             columns=["serial", "rule_id", "severity", "category", "title", "evidence"])
        drives, groups = rank_drives(LATEST, flags, None)
        return RankResult(drives, groups, False, None, datetime.now(timezone.utc), ["rules alone"])
    return rank


def _ingest(rejected=0):
    return lambda store, paths: SimpleNamespace(files_read=1, new_rows=5, rejected=["x"] * rejected)


def _run(tmp_path, flagged, rejected=0):
    return run_nightly(Store(tmp_path / "store"), tmp_path, tmp_path / "t.csv", ruleset=None,
                       ingest=_ingest(rejected), rank=_rank_with(flagged), refit=lambda s: None)


def test_second_run_while_one_holds_the_lock_is_refused(tmp_path):
    store = Store(tmp_path / "store")
    with store.lock(NIGHTLY_LOCK):
        with pytest.raises(StoreLocked, match="held by another"):
            _run(tmp_path, ["QN1"])


def test_new_flag_then_nothing_new_then_rejected_input(tmp_path):
    assert _run(tmp_path, ["QN1"]).exit == Exit.NEW_FLAGS
    assert _run(tmp_path, ["QN1"]).exit == Exit.OK  # same ticket, ongoing
    # rejected input outranks new flags (lower code wins, exitcodes.py)
    assert _run(tmp_path, [], rejected=2).exit == Exit.INPUT_REJECTED


def test_summary_line_names_counts_and_exit(tmp_path):
    report = _run(tmp_path, ["QN1"])
    assert report.refitted  # no saved model yet: refit due
    line = report.summary()
    assert "1 new / 0 ongoing / 0 not-reporting / 0 cleared tickets" in line and "NEW_FLAGS" in line


def test_nightly_refit_keeps_the_settings_of_the_model_the_operator_fitted(tmp_path):
    from tests.survival.fleetsim import simulate_fleet
    from triage.risk.nightly import refit_like_latest
    from triage.survival import fit_and_save, latest_model

    snapshots, removals, _ = simulate_fleet(n_drives=300, days=60, seed=13, scale_hours=25_000)
    store = Store(tmp_path / "store")
    store.append("snapshots", snapshots)
    store.append("removals", removals)
    fit_and_save(store, horizon_days=14, by=("model", "user_capacity_bytes"), count_proactive=False)
    refit_like_latest(store)
    refitted = latest_model(store)
    assert refitted.path_.name.startswith("fleet-risk-v2-")
    assert (refitted.horizon_days, tuple(refitted.by), refitted.count_proactive) == (
        14, ("model", "user_capacity_bytes"), False)


def test_the_worst_outcome_wins_and_every_outcome_is_listed(tmp_path):
    # docs/ranking.md, "Exit codes": 1, 5, 8, 3, 4 in that order
    assert Exit.combine(Exit.NEW_FLAGS, Exit.INPUT_REJECTED, Exit.NOT_REPORTING) == Exit.NOT_REPORTING
    assert Exit.combine(Exit.NEW_FLAGS, Exit.INPUT_REJECTED) == Exit.INPUT_REJECTED
    assert Exit.combine(Exit.NOT_REPORTING, Exit.FAILURE) == Exit.FAILURE
    assert Exit.combine(Exit.OK) == Exit.OK
    report = _run(tmp_path, ["QN1"], rejected=2)
    assert report.exit == Exit.INPUT_REJECTED
    assert report.outcomes == [Exit.INPUT_REJECTED, Exit.NEW_FLAGS]
    assert report.summary_record()["outcomes"] == ["INPUT_REJECTED", "NEW_FLAGS"]
