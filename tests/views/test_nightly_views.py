"""``nightly --openmetrics/--html`` write the same views as ``export`` and ``report``; hosts that
went quiet are found."""

from __future__ import annotations

import shutil

import pandas as pd
from typer.testing import CliRunner

from triage.cli import app
from triage.exitcodes import Exit
from triage.risk.fleet import not_reporting_hosts, stale_age_hours

runner = CliRunner()


def test_nightly_writes_the_openmetrics_file_and_the_page(fleet, tmp_path):
    from prometheus_client.openmetrics.parser import text_string_to_metric_families

    store = tmp_path / "store"
    shutil.copytree(fleet["root"], store)  # nightly writes tickets state and locks: not the shared store
    (tmp_path / "dumps").mkdir()
    om, page = tmp_path / "fleet.om", tmp_path / "tonight.html"
    result = runner.invoke(app, ["nightly", "--dumps", str(tmp_path / "dumps"), "--out", str(tmp_path / "t.csv"),
                                 "--openmetrics", str(om), "--html", str(page), "--store", str(store)])
    assert result.exit_code in (Exit.OK, Exit.NEW_FLAGS), result.output
    names = {f.name for f in text_string_to_metric_families(om.read_text(encoding="utf-8"))}
    assert "triage_drive_failure_probability" in names
    assert page.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def test_nightly_refuses_a_view_into_a_missing_folder_before_doing_anything(fleet, tmp_path):
    result = runner.invoke(app, ["nightly", "--dumps", str(tmp_path), "--out", str(tmp_path / "t.csv"),
                                 "--html", str(tmp_path / "no" / "p.html"), "--store", str(fleet["root"])])
    assert result.exit_code == Exit.USAGE and not (tmp_path / "t.csv").exists()


def test_a_host_silent_past_the_threshold_is_not_reporting_and_a_removed_drive_does_not_count():
    t = pd.Timestamp("2026-11-20T02:00Z")
    recent = pd.DataFrame({
        "serial": ["A1", "A2", "B1", "C1"],
        "host": ["ash-1", "ash-1", "ash-2", "ash-3"],
        "taken_at": [t, t, t - pd.Timedelta(hours=40), t - pd.Timedelta(hours=50)],
    })
    removals = pd.DataFrame({"serial": ["C1"], "removed_at": [t - pd.Timedelta(hours=49)]})
    quiet = not_reporting_hosts(recent, removals, t.to_pydatetime(), hours=36)
    assert quiet["host"].tolist() == ["ash-2"]
    assert quiet["silent_hours"].iloc[0] == 40 and quiet["drives"].iloc[0] == 1


def test_data_older_than_36_hours_is_stale_and_no_data_is_never_fresh():
    t = pd.Timestamp("2026-11-20T02:00Z")
    assert stale_age_hours(t, t + pd.Timedelta(hours=35)) is None
    assert stale_age_hours(t, t + pd.Timedelta(hours=37)) == 37
    assert stale_age_hours(None) == float("inf")
