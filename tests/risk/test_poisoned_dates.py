"""Dates already stored (by an older triage, before ingest checked them) never break a command.

The store below holds a fleet's real nights plus what a host with a wrong clock once wrote: a
capture dated 2300 (beyond what pandas can hold), one dated a month ahead, a removal dated
9999-12-31, and partitions named ``day=10000-01-01`` and ``day=0000-01-01``. Every reader command
must run, and report "as of" the newest capture that is not in the future.
"""

from __future__ import annotations

import csv
from datetime import datetime, timedelta, timezone

import pyarrow as pa
import pytest
from typer.testing import CliRunner

from tests.survival.fleetsim import simulated_store
from triage.cli import app
from triage.exitcodes import Exit
from triage.store.schema import REMOVALS, SNAPSHOTS


@pytest.fixture(scope="module")
def poisoned(tmp_path_factory):
    root = tmp_path_factory.mktemp("poisoned")
    store, snapshots = simulated_store(root, n_drives=300, days=40, seed=3, scale_hours=20_000)
    newest = snapshots["taken_at"].max()
    victim = snapshots.sort_values("taken_at").iloc[-1].to_dict()
    ahead = datetime.now(timezone.utc) + timedelta(days=30)
    rows = [{"serial": victim["serial"], "model": victim["model"], "taken_at": moment,
             "power_on_hours": int(victim["power_on_hours"]) + 24, "pending_sectors": 999}
            for moment in (datetime(2300, 1, 1, tzinfo=timezone.utc), ahead)]
    store.commit({"snapshots": pa.Table.from_pylist(rows, schema=SNAPSHOTS)})
    store.commit({"removals": pa.Table.from_pylist(
        [{"serial": victim["serial"], "removed_at": datetime(9999, 12, 31, tzinfo=timezone.utc),
          "reason": "failed"}], schema=REMOVALS)})
    for odd in ("day=10000-01-01", "day=0000-01-01"):
        (root / "snapshots" / odd).mkdir()
    return root, newest


def _run(*args):
    return CliRunner().invoke(app, list(args))


def test_rank_runs_and_notes_the_ignored_days(poisoned):
    root, _ = poisoned
    result = _run("rank", "--format", "json", "--store", str(root))
    assert result.exit_code == Exit.NOT_REPORTING, result.output  # months-old captures are stale
    assert "capture day(s) dated in the future" in result.stderr
    assert "Traceback" not in result.output


def test_tickets_are_dated_by_the_newest_capture_not_in_the_future(poisoned, tmp_path):
    root, newest = poisoned
    out = tmp_path / "tickets.csv"
    result = _run("tickets", "--out", str(out), "--store", str(root))
    assert result.exit_code == Exit.NOT_REPORTING, result.output  # stale, as for rank
    with out.open(newline="") as fh:
        days = {row["first_flagged"] for row in csv.DictReader(fh)}
    assert days <= {newest.strftime("%Y-%m-%d")}


@pytest.mark.parametrize("command", [["cohorts"], ["fit", "--horizon-days", "30"]])
def test_survival_commands_run(poisoned, command):
    root, _ = poisoned
    result = _run(*command, "--store", str(root))
    assert result.exit_code == Exit.OK, result.output
    assert "2300" not in result.stdout and "9999" not in result.stdout


def test_nightly_runs_and_reports_the_staleness_a_future_capture_would_hide(poisoned, tmp_path):
    root, newest = poisoned
    dumps = tmp_path / "incoming"
    dumps.mkdir()
    result = _run("nightly", "--dumps", str(dumps), "--out", str(tmp_path / "t.csv"), "--store", str(root))
    # the fleet's real captures are months old: stale (exit 8), which a capture dated ahead must not hide
    assert result.exit_code == Exit.NOT_REPORTING, result.output
    assert f"as of {newest:%Y-%m-%d}" in result.stderr
