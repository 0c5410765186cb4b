"""`triage rules check` and `triage rules list`, run for real."""

from __future__ import annotations

import csv
import io
import json
import textwrap

from typer.testing import CliRunner

from triage.cli import app
from triage.exitcodes import Exit
from triage.rules import load_rules

runner = CliRunner()
DEFAULT_COUNT = len(load_rules([]).rules)


def test_check_of_a_clean_folder_says_how_many_rules_are_ok(tmp_path, monkeypatch):
    monkeypatch.delenv("TRIAGE_RULES", raising=False)
    (tmp_path / "site.toml").write_text('[[rule]]\nid = "thermal.ata-ssd-hot"\nenabled = false\n')
    result = runner.invoke(app, ["rules", "check", str(tmp_path)])
    assert result.exit_code == Exit.OK
    assert result.stdout.strip() == f"{DEFAULT_COUNT - 1} rules OK, 1 disabled"


def thermal_rule(when: str, explain: str) -> str:
    """A site rule whose `when` is on line 6 and `explain` on line 7."""
    return textwrap.dedent(f"""\
        [[rule]]
        id = "site.hot"
        title = "Hot"
        severity = "watch"
        category = "thermal"
        when = "{when}"
        explain = "{explain}"
        """)


def test_check_prints_each_error_as_file_line_message_and_fails(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(thermal_rule("temprature_c > 60", "{temperature_c} C"))
    result = runner.invoke(app, ["rules", "check", str(tmp_path)])
    assert result.exit_code == Exit.FAILURE
    assert result.stdout.splitlines() == [
        f"{bad}:6: rule 'site.hot': when: unknown field 'temprature_c' (did you mean 'temperature_c'?) "
        "(column 1 of the expression)"
    ]
    assert "1 error(s) in rule files" in result.stderr


def test_list_as_csv_marks_overrides_and_disabled_rules(tmp_path):
    (tmp_path / "site.toml").write_text(
        '[[rule]]\nid = "media.reallocated-present"\nseverity = "replace-soon"\n\n'
        '[[rule]]\nid = "thermal.hdd-hot"\nenabled = false\n'
    )
    result = runner.invoke(app, ["rules", "list", "--dir", str(tmp_path), "--format", "csv"])
    assert result.exit_code == Exit.OK
    rows = {row["id"]: row for row in csv.DictReader(io.StringIO(result.stdout))}
    assert len(rows) == DEFAULT_COUNT
    assert (rows["media.reallocated-present"]["status"], rows["media.reallocated-present"]["severity"]) == (
        "override", "replace-soon")
    assert rows["thermal.hdd-hot"]["status"] == "disabled"
    assert rows["media.pending-growth"]["status"] == "default"
    assert rows["media.pending-growth"]["source"].startswith("Pinheiro, Weber & Barroso, FAST 2007")


def test_list_as_json_without_defaults_shows_only_site_rules(tmp_path):
    (tmp_path / "site.toml").write_text(textwrap.dedent("""\
        [[rule]]
        id = "site.warm"
        title = "Warm"
        severity = "watch"
        category = "thermal"
        when = "temperature_c > 50"
        explain = "{temperature_c} C"
        """))
    result = runner.invoke(app, ["rules", "list", "--dir", str(tmp_path), "--no-default-rules", "--format", "json"])
    assert result.exit_code == Exit.OK
    listed = json.loads(result.stdout)
    assert [(r["id"], r["status"], r["defined_at"]) for r in listed] == [
        ("site.warm", "site", f"{tmp_path / 'site.toml'}:1")]


def test_list_rejects_an_unknown_format():
    result = runner.invoke(app, ["rules", "list", "--format", "yaml"])
    assert result.exit_code == Exit.USAGE


def test_check_of_a_file_with_old_function_names_fails_with_one_line_per_use(tmp_path):
    site = tmp_path / "site.toml"
    site.write_text(thermal_rule("min_over(temperature_c, 7) >= 50", "coolest {min_over(temperature_c, 7)} C"))
    result = runner.invoke(app, ["rules", "check", str(tmp_path)])
    assert result.exit_code == Exit.FAILURE
    assert result.stdout.splitlines() == [f"{site}:6: 'min_over' is now 'lowest'",
                                          f"{site}:7: 'min_over' is now 'lowest'"]
