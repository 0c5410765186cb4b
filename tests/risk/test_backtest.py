"""triage backtest: drive-level recall, false alarms and lead time on a hand-built history, the JSON
contract, and bad input."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from triage.cli import app
from triage.exitcodes import Exit
from triage.risk.backtest import BacktestError, backtest_store
from triage.rules import load_rules
from triage.store.dataset import Store

runner = CliRunner()
T0 = pd.Timestamp("2026-01-01T02:00:00Z")
NIGHTS = 80
HORIZON = 10


def history():
    """Six drives captured nightly at 02:00 UTC for 80 nights.

    FAILS   pending sectors from night 50, removed 'failed' at night 60 + 12 h
    NOISY   pending sectors from night 40 on, never fails (a false alarm of the pending rule)
    SILENT  no counter at all, removed 'failed' at night 65 + 12 h
    EARLY   removed 'failed' at night 10 + 12 h (before any scored night: not in the denominator)
    CALM1/2 healthy throughout
    """
    rows = []
    life = {"FAILS": 60, "NOISY": NIGHTS, "SILENT": 65, "EARLY": 10, "CALM1": NIGHTS, "CALM2": NIGHTS}
    for i, (serial, end) in enumerate(life.items()):
        for night in range(min(end + 1, NIGHTS)):
            pending = 0
            if serial == "FAILS" and night >= 50:
                pending = 8 + night - 50
            if serial == "NOISY" and night >= 40:
                pending = 3
            rows.append({"serial": serial, "model": "QH-HD8T-A", "firmware": "QA02", "bus": "ata",
                         "host": f"ash-st0{i}", "slot": "bay01", "group": None,
                         "taken_at": T0 + pd.Timedelta(days=night), "power_on_hours": 10_000 + 24 * night,
                         "temperature_c": 35, "pending_sectors": pending, "reallocated_sectors": 0,
                         "prefail_tripped": serial == "FAILS" and night >= 58})
    removals = pd.DataFrame({"serial": ["FAILS", "SILENT", "EARLY"],
                             "removed_at": [T0 + pd.Timedelta(days=d, hours=10) for d in (60, 65, 10)],
                             "reason": "failed", "note": None})
    return pd.DataFrame(rows), removals


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    target = Store(tmp_path_factory.mktemp("backtest-store"))
    snapshots, removals = history()
    target.append("snapshots", snapshots)
    target.append("removals", removals)
    return target


@pytest.fixture(scope="module")
def result(store):
    return backtest_store(store, load_rules([], include_defaults=True), horizon_days=HORIZON, max_false_alarm=0.2)


def method(result, name):
    return result.methods.set_index("method").loc[name]


def test_the_training_period_and_last_night_follow_the_horizon(result):
    assert result.training_days == 28  # one horizon, at least four weeks
    assert result.first_night == pd.Timestamp("2026-01-29", tz="UTC")
    # the last night with ten full days of data after it: the data end on night 79 (2026-03-21 02:00)
    assert result.last_night == pd.Timestamp("2026-03-10", tz="UTC")


def test_the_pending_rule_catches_one_failure_of_two_and_raises_one_false_alarm(result):
    row = method(result, "rule:media.pending-present")
    assert row["failures"] == 2  # FAILS and SILENT; EARLY failed before the first scored night
    assert row["caught"] == 1 and row["recall"] == 0.5
    assert row["false_alarm_drives"] == 1  # NOISY
    # scored: every drive in service on a scored night (EARLY had left)
    assert row["scored_drives"] == 5
    assert row["false_alarm_rate"] == pytest.approx(1 / 5)


def test_lead_time_runs_from_the_first_flagged_night_within_the_horizon(result):
    # FAILS is removed 2026-03-02 12:00 (night 60's capture at 02:00 + 10 h); the first flagged
    # night within 10 days before it is night 50, 2026-02-20, whose end is 2026-02-21 00:00
    row = method(result, "rule:media.pending-present")
    assert row["lead_days_median"] == pytest.approx(9.5)


def test_the_drives_own_verdict_is_the_baseline(result):
    row = method(result, "drive-self-assessment")
    assert row["caught"] == 1 and row["false_alarm_drives"] == 0
    assert row["lead_days_median"] == pytest.approx(1.5)  # tripped from night 58 (ends 2026-03-01 00:00)


def test_a_severity_counts_its_rules_and_worse_ones(result):
    watch = method(result, "severity:watch")
    pending = method(result, "rule:media.pending-present")
    assert watch["caught"] >= pending["caught"]
    assert watch["false_alarm_drives"] >= pending["false_alarm_drives"]


def test_the_operating_point_respects_the_false_alarm_limit(result):
    point = result.operating_point
    assert point["false_alarm_rate"] <= 0.2
    combined = method(result, "combined")
    assert combined["recall"] == pytest.approx(point["recall"])
    curve = result.curve
    assert ((curve["recall"] >= 0) & (curve["recall"] <= 1)).all()
    assert curve.sort_values("score_threshold")["false_alarm_rate"].is_monotonic_decreasing


def test_the_model_is_refitted_on_the_first_night_and_every_refit_days(result):
    assert result.refits == ["2026-01-29", "2026-02-28"]  # EARLY's failure is enough to fit on


def test_a_false_alarm_limit_outside_zero_one_is_refused(store):
    with pytest.raises(BacktestError, match="max-false-alarm"):
        backtest_store(store, load_rules([], include_defaults=True), max_false_alarm=1.0)


def test_a_history_shorter_than_training_and_horizon_is_refused(store):
    with pytest.raises(BacktestError, match="too short"):
        backtest_store(store, load_rules([], include_defaults=True), horizon_days=40)


def test_the_command_prints_the_json_contract(store, tmp_path):
    plot = tmp_path / "curve.png"
    outcome = runner.invoke(app, ["backtest", "--horizon-days", str(HORIZON), "--max-false-alarm", "0.2",
                                  "--format", "json", "--plot", str(plot), "--store", str(store.root)])
    assert outcome.exit_code == Exit.OK, outcome.output
    record = json.loads(outcome.stdout)
    assert {"horizon_days", "first_night", "last_night", "methods", "operating_point", "curve"} <= set(record)
    assert record["first_night"] == "2026-01-29" and record["last_night"] == "2026-03-10"
    for row in record["methods"]:
        assert list(row) == ["method", "failures", "caught", "recall", "false_alarm_drives", "scored_drives",
                             "false_alarm_rate", "lead_days_median"]
    assert set(record["operating_point"]) == {"max_false_alarm", "score_threshold", "recall", "false_alarm_rate"}
    assert all(set(point) == {"score_threshold", "recall", "false_alarm_rate"} for point in record["curve"])
    assert plot.stat().st_size > 0


@pytest.mark.parametrize("args, words", [
    (["--max-false-alarm", "0"], "max-false-alarm"),
    (["--from", "2025-01-01"], "outside the stored history"),
    (["--from", "yesterday"], "not a date"),
])
def test_bad_options_give_one_line_and_a_usage_exit(store, args, words):
    outcome = runner.invoke(app, ["backtest", *args, "--store", str(store.root)])
    assert outcome.exit_code == Exit.USAGE
    assert words in outcome.output and "Traceback" not in outcome.output


def test_a_missing_store_is_an_error_not_an_empty_report(tmp_path):
    outcome = runner.invoke(app, ["backtest", "--store", str(tmp_path / "typo")])
    assert outcome.exit_code != Exit.OK
    assert "no such store" in outcome.output or "no snapshots" in outcome.output


def test_forecast_command_json_rows_add_up(store):
    outcome = runner.invoke(app, ["forecast", "--days", "30", "--as-of", "2026-03-01", "--format", "json",
                                  "--store", str(store.root)])
    # the hand-built history has three failures: enough to fit
    assert outcome.exit_code == Exit.OK, outcome.output
    rows = json.loads(outcome.stdout)
    assert all(list(r) == ["scope", "name", "drives", "expected", "interval_low", "interval_high", "spares"]
               for r in rows)
    fleet = next(r for r in rows if r["scope"] == "fleet")
    cohorts = [r for r in rows if r["scope"] == "cohort"]
    assert sum(r["drives"] for r in cohorts) == fleet["drives"]
    assert sum(r["expected"] for r in cohorts) == pytest.approx(fleet["expected"])
    assert np.isfinite(fleet["expected"])


@pytest.mark.parametrize("command", ["backtest", "forecast"])
def test_a_store_without_captures_is_a_failure_not_a_usage_error(tmp_path, command):
    empty = Store(tmp_path / "store")
    empty.append("removals", pd.DataFrame({"serial": ["X"], "removed_at": [T0], "reason": ["failed"], "note": [None]}))
    outcome = runner.invoke(app, [command, "--store", str(empty.root)])
    assert outcome.exit_code == Exit.FAILURE  # the same code as 'triage fit' on such a store
    assert "no snapshots stored" in outcome.output
