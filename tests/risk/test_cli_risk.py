"""The rank / tickets / nightly commands, run for real over a small hand-built store.

The rules layer is replaced by a stand-in (one rule: pending sectors grew) so these tests pin
down the commands' wiring, not the rule engine.
"""

from __future__ import annotations

import csv
import json
from datetime import timedelta

import pandas as pd
import pytest
from typer.testing import CliRunner

import triage.store.dataset
from tests.risk.standins import use_stand_ins
from triage.cli import app
from triage.exitcodes import Exit
from triage.risk.nightly import NIGHTLY_LOCK
from triage.store.dataset import Store


def _stand_in_evaluate(ruleset, history, now=None):
    rows = []
    for serial, part in history.sort_values("taken_at").groupby("serial"):
        first, last = part["pending_sectors"].iloc[0], part["pending_sectors"].iloc[-1]
        if last > first:
            rows.append((serial, "pending-growth", "replace-now", "media", "pending sectors grew",
                         f"pending {first:g} -> {last:g} in {len(part) - 1} days"))
    return pd.DataFrame(rows, columns=["serial", "rule_id", "severity", "category", "title", "evidence"])


@pytest.fixture
def store(tmp_path, monkeypatch):
    use_stand_ins(monkeypatch, _stand_in_evaluate)
    s = Store(tmp_path / "store")
    s.append("snapshots", pd.DataFrame(_nights(["=QZ-0001", "QZ-0002", "QZ-0003"], host="ash-r1-n01")))
    return s


def _nights(serials, host, last=None):
    """Four nightly captures ending an hour ago (or at ``last``): fresh data, not stale."""
    last = last if last is not None else pd.Timestamp.now(tz="UTC").floor("h") - pd.Timedelta(hours=1)
    rows = []
    for day in (1, 2, 3, 4):
        for i, serial in enumerate(serials):
            rows.append({"serial": serial, "model": "QH-[b]8T" if serial == "=QZ-0001" else "QH-HD8T-A",
                         "host": host, "slot": str(i), "group": f"{host}-pool",
                         "taken_at": last - pd.Timedelta(days=4 - day), "power_on_hours": 9000 + 24 * day,
                         "pending_sectors": (8 * day if serial == "=QZ-0001" else 0)})
    return rows


def _run(*args):
    return CliRunner().invoke(app, list(args))


def test_rank_json_lists_the_flagged_drive_first_and_says_rules_alone(store):
    result = _run("rank", "--format", "json", "--store", str(store.root))
    assert result.exit_code == 0, result.output
    report = json.loads(result.stdout)
    assert report["as_of"] and report["warnings"] == [] and report["not_reporting"] == []
    rows = report["drives"]
    assert rows[0]["serial"] == "=QZ-0001" and rows[0]["rules"] == ["pending-growth"]
    assert rows[0]["evidence"] == ["pending 8 -> 32 in 3 days"]
    assert rows[0]["p_fail"] is None
    assert {"rank", "serial", "model", "host", "slot", "group", "score", "p_fail", "severity",
            "category", "action", "rules", "evidence"} <= set(rows[0])
    assert "rules alone" in result.stderr


def test_rank_table_escapes_firmware_strings(store, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")
    result = _run("rank", "--top", "1", "--store", str(store.root))
    assert result.exit_code == 0, result.output
    # unescaped, rich would take "[b]" as markup and drop it from the model name
    assert "QH-[b]8T" in result.stdout and "=QZ-0001" in result.stdout
    assert "pending 8 -> 32" in result.stdout


def test_rank_refuses_an_unknown_format(store):
    result = _run("rank", "--format", "xml", "--store", str(store.root))
    assert result.exit_code == Exit.USAGE


def test_tickets_writes_new_then_ongoing(store, tmp_path):
    out = tmp_path / "tickets.csv"
    first = _run("tickets", "--out", str(out), "--store", str(store.root))
    assert first.exit_code == Exit.NEW_FLAGS, first.output
    second = _run("tickets", "--out", str(out), "--store", str(store.root))
    assert second.exit_code == Exit.OK, second.output
    with out.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [(r["serial"], r["state"]) for r in rows] == [("'=QZ-0001", "ongoing")]
    assert "as of" in second.stderr


def test_nightly_refuses_to_run_while_another_holds_the_lock(store, tmp_path):
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    with store.lock(NIGHTLY_LOCK):
        result = _run("nightly", "--dumps", str(dumps), "--out", str(tmp_path / "t.csv"), "--store", str(store.root))
    assert result.exit_code == Exit.LOCKED
    assert "held by another triage run" in result.stderr


def test_nightly_reports_new_flags_and_a_summary_line(store, tmp_path):
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    result = _run("nightly", "--dumps", str(dumps), "--out", str(tmp_path / "t.csv"), "--store", str(store.root))
    assert result.exit_code == Exit.NEW_FLAGS, result.output
    assert "nightly: 0 file(s) read" in result.stderr and "1 new / 0 ongoing / 0 not-reporting / 0 cleared" in result.stderr
    assert "no capture file" in result.stderr  # an empty dumps folder is said, never a quiet night


@pytest.mark.parametrize("command", [
    ["rank"], ["tickets", "--out", "t.csv"], ["nightly", "--dumps", "."], ["cohorts"], ["fit"],
    ["survival", "QH-HD8T-A"], ["backtest"], ["forecast"],
])
def test_a_store_that_does_not_exist_is_an_error_not_an_empty_fleet(tmp_path, command, monkeypatch):
    monkeypatch.chdir(tmp_path)
    result = _run(*command, "--store", str(tmp_path / "stroe"))
    assert result.exit_code == Exit.FAILURE
    assert f"{tmp_path / 'stroe'}: no such store" in result.stderr
    assert not (tmp_path / "stroe").exists() and not (tmp_path / "t.csv").exists()


def test_a_folder_that_is_not_a_store_is_an_error_too(tmp_path):
    result = _run("rank", "--store", str(tmp_path))
    assert result.exit_code == Exit.FAILURE and "not a triage store" in result.stderr


def test_a_host_that_stopped_reporting_is_news_and_its_ticket_stays_open(store, tmp_path, monkeypatch):
    out = tmp_path / "tickets.csv"
    assert _run("tickets", "--out", str(out), "--store", str(store.root)).exit_code == Exit.NEW_FLAGS
    # three nights on, site birch reports and site ash (which holds the flagged drive) has been silent
    later = pd.Timestamp.now(tz="UTC").floor("h") + pd.Timedelta(days=3)
    store.append("snapshots", pd.DataFrame(_nights(["QZ-0101", "QZ-0102"], host="birch-r1-n01", last=later)))
    # and the clock has moved on with them (captures dated ahead of the clock are not "now")
    monkeypatch.setattr(triage.store.dataset, "_utc_now", lambda: later.to_pydatetime() + timedelta(hours=2))
    result = _run("rank", "--format", "json", "--tickets", str(out), "--store", str(store.root))
    assert result.exit_code == Exit.NOT_REPORTING, result.output
    report = json.loads(result.stdout)
    assert {r["serial"] for r in report["not_reporting"]} == {"=QZ-0001", "QZ-0002", "QZ-0003"}
    assert all(r["last_seen"] and r["state"] == "not-reporting" for r in report["not_reporting"])
    # the flag the silent drive had open in the ticket export, and since when
    [flagged] = [r for r in report["not_reporting"] if r["severity"]]
    assert flagged["serial"] == "=QZ-0001" and flagged["severity"] == "replace-now" and flagged["first_raised"]
    table = _run("rank", "--tickets", str(out), "--store", str(store.root))
    assert "not reporting, flagged before: =QZ-0001" in table.stdout
    assert any(w.startswith("not reporting: site ash (1 host(s), 3 drive(s)), last seen") for w in report["warnings"])
    assert [d["serial"] for d in report["drives"]] == ["QZ-0101", "QZ-0102"]
    tickets = _run("tickets", "--out", str(out), "--store", str(store.root))
    assert tickets.exit_code == Exit.NOT_REPORTING
    with out.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [(r["serial"], r["state"]) for r in rows] == [("'=QZ-0001", "not-reporting")]
    assert rows[0]["last_seen"]


def test_stale_data_warns_with_its_time_and_exits_not_reporting(store):
    result = _run("rank", "--stale-hours", "1", "--store", str(store.root))
    assert result.exit_code == Exit.NOT_REPORTING
    assert "h old (as of" in result.stderr and "as of" in result.stdout


def test_rank_states_new_then_ongoing_against_the_ticket_export(store, tmp_path):
    out = tmp_path / "tickets.csv"
    _run("tickets", "--out", str(out), "--store", str(store.root))
    result = _run("rank", "--format", "csv", "--tickets", str(out), "--store", str(store.root))
    assert result.exit_code == Exit.OK, result.output
    rows = list(csv.DictReader(result.stdout.splitlines()))
    first = rows[0]
    assert first["serial"] == "'=QZ-0001" and first["state"] == "new" and first["first_raised"]
    assert first["as_of"] and first["severity"] == "replace-now" and first["score"]


def test_nightly_summary_file_names_every_outcome_and_the_worst_wins(store, tmp_path):
    dumps = tmp_path / "dumps"
    dumps.mkdir()
    (dumps / "ash-r1-n01-2026-11-30.jsonl").write_text("this is not a capture\n")
    summary = tmp_path / "nightly.json"
    result = _run("nightly", "--dumps", str(dumps), "--out", str(tmp_path / "t.csv"), "--summary", str(summary),
                  "--store", str(store.root))
    record = json.loads(summary.read_text())
    # quarantined input outranks new flags (exitcodes.PRECEDENCE); the file names both
    assert result.exit_code == Exit.INPUT_REJECTED, result.output
    assert record["outcomes"] == ["INPUT_REJECTED", "NEW_FLAGS"] and record["exit"] == 3
    assert record["quarantined"] == 1 and record["tickets"]["new"] == 1 and record["as_of"]
    assert "1 line(s) quarantined" in result.stderr


@pytest.mark.parametrize("command", [["rank"], ["cohorts"], ["fit"], ["survival", "x"],
                                     ["rules", "list"], ["demo"], ["backtest"], ["forecast"]])
def test_every_table_command_takes_the_same_format_choices(command):
    help_text = _run(*command, "--help").stdout
    assert "--format <table|csv|json>" in help_text
    refused = _run(*command, "--format", "xml")
    assert refused.exit_code == Exit.USAGE and "'xml' is not one of" in refused.stderr


@pytest.mark.parametrize("command", [["ingest"], ["capture"], ["demo"], ["fit"], ["cohorts"], ["survival"],
                                     ["rank"], ["tickets"], ["nightly"], ["rules", "check"], ["rules", "list"],
                                     ["backtest"], ["forecast"]])
def test_help_shows_no_python_type_names(command):
    import re

    help_text = _run(*command, "--help").stdout
    assert not re.search(r"\b(INTEGER|TEXT|PATH|FLOAT|BOOLEAN)\b|list\[|<str>|<int>|<float>|<Path>", help_text), help_text
