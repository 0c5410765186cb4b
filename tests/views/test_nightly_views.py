"""``nightly --openmetrics/--html`` write the same views as ``export`` and ``report``."""

from __future__ import annotations

import shutil

from typer.testing import CliRunner

from tests.views import omparse
from triage.cli import app
from triage.exitcodes import Exit

runner = CliRunner()


def test_nightly_writes_the_openmetrics_file_and_the_page(fleet, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(fleet["root"], store)  # nightly writes tickets state and locks: not the shared store
    (tmp_path / "dumps").mkdir()
    om, page = tmp_path / "fleet.om", tmp_path / "tonight.html"
    result = runner.invoke(app, ["nightly", "--dumps", str(tmp_path / "dumps"), "--out", str(tmp_path / "t.csv"),
                                 "--openmetrics", str(om), "--html", str(page), "--store", str(store)])
    assert result.exit_code == Exit.NOT_REPORTING, result.output  # a host went quiet; the views are still written
    names = {f.name for f in omparse.parse(om.read_text(encoding="utf-8"))}
    assert "triage_drive_failure_probability" in names
    assert page.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def test_nightly_refuses_a_view_into_a_missing_folder_before_doing_anything(fleet, tmp_path):
    result = runner.invoke(app, ["nightly", "--dumps", str(tmp_path), "--out", str(tmp_path / "t.csv"),
                                 "--html", str(tmp_path / "no" / "p.html"), "--store", str(fleet["root"])])
    assert result.exit_code == Exit.USAGE and not (tmp_path / "t.csv").exists()
