"""``triage drive SERIAL``: the story of one drive, run for real over the shared simulated store."""

from __future__ import annotations

import json

import numpy as np
import pytest
from typer.testing import CliRunner

from tests.views.conftest import HOSTILE
from triage.cli import app
from triage.exitcodes import Exit
from triage.report.drive import SPARK_GLYPHS, sparkline
from triage.risk.drive import close_serials

runner = CliRunner()


def run(*args, **env):
    return runner.invoke(app, [*args], env={"COLUMNS": "120", **env})


def test_json_carries_the_contract_keys_and_every_capture(fleet):
    serial = fleet["hostile_serial"]
    result = run("drive", serial, "--format", "json", "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    record = json.loads(result.stdout)
    assert list(record)[:9] == ["serial", "model", "firmware", "host", "slot", "group", "p_fail", "flags", "history"]
    stored = fleet["snapshots"][fleet["snapshots"]["serial"] == serial]
    assert len(record["history"]) == len(stored)
    first = record["history"][0]
    assert {"taken_at", "power_on_hours", "temperature_c", "reallocated_sectors", "pending_sectors"} <= set(first)
    assert [h["power_on_hours"] for h in record["history"]] == sorted(stored["power_on_hours"].tolist())
    assert record["model"] == HOSTILE  # JSON keeps the raw string; json escapes it
    assert record["identity"]["user_capacity_bytes"] == stored["user_capacity_bytes"].iloc[-1]
    assert record["identity"]["wwn"] == stored["wwn"].iloc[-1]
    assert any(f["rule_id"] == "media.pending-present" for f in record["flags"])


def test_p_fail_is_the_ranked_lists(fleet):
    serial = fleet["hostile_serial"]
    record = json.loads(run("drive", serial, "--format", "json", "--store", str(fleet["root"])).stdout)
    ranked = json.loads(run("rank", "--top", "10000", "--format", "json", "--store", str(fleet["root"])).stdout)["drives"]
    assert record["p_fail"] == pytest.approx(next(r["p_fail"] for r in ranked if r["serial"] == serial))


def test_rate_factors_are_the_published_rate_ratios_and_multiply_to_the_drives_rate_ratio(fleet):
    # log link: each covariate multiplies the rate by exp(beta_k x_k) = rate_ratio_k ** x_k, and
    # the rate over the same drive with x = 0 is their product (McCullagh & Nelder, GLM, 2nd ed., 6.2)
    serial = fleet["hostile_serial"]
    record = json.loads(run("drive", serial, "--format", "json", "--store", str(fleet["root"])).stdout)
    model = fleet["model"]
    ratios = model.coefficients()["rate_ratio"]
    factors = {c["covariate"]: c for c in record["contributions"]}
    assert set(factors) == set(ratios.index)
    for name, row in factors.items():
        assert row["factor"] == pytest.approx(ratios[name] ** row["value"], rel=1e-9)
    history = fleet["snapshots"][fleet["snapshots"]["serial"] == serial].sort_values("taken_at")
    states = model.states(history.tail(1), history)
    zeroed = states.copy()
    zeroed[list(ratios.index)] = 0.0
    expected = model.landmark_.rate_per_day(states)[0] / model.landmark_.rate_per_day(zeroed)[0]
    assert record["rate_ratio"] == pytest.approx(expected, rel=1e-9)
    assert record["rate_ratio"] == pytest.approx(np.prod([c["factor"] for c in record["contributions"]]))


def test_an_unknown_serial_is_one_line_naming_it_with_a_close_match(fleet):
    serial = fleet["hostile_serial"]
    result = run("drive", serial[:-1] + "9X", "--store", str(fleet["root"]))
    assert result.exit_code == Exit.USAGE
    assert result.stdout == ""
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and serial[:-1] + "9X" in lines[0] and "did you mean" in lines[0]


def test_close_serials_prefers_a_case_slip_then_the_nearest_spelling():
    known = ["QHA14296903", "QHA14296930", "TLW55570QI"]
    assert close_serials("qha14296903", known)[0] == "QHA14296903"
    assert close_serials("TLW5557OQI", known) == ["TLW55570QI"]
    assert close_serials("ZZZZ", known) == []


def test_terminal_story_shows_hostile_strings_as_text_and_never_emits_escape_bytes(fleet):
    result = run("drive", fleet["hostile_serial"], "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    out = result.stdout
    assert "\x1b" not in out and "\u202e" not in out
    assert "\\x1b[31m[b]" in out  # the escape shown as text, the markup not eaten by rich
    assert "<script>" in out  # harmless on a terminal, shown as it is
    assert "P(fail within 30 d)" in out and "pending sectors" in out
    assert "captures may have stopped arriving" in out  # the simulated fleet ends in February 2026


def test_a_failed_drive_shows_its_removal_and_no_probability(fleet):
    truth = fleet["truth"]
    failed = sorted(truth.loc[truth["failed"], "serial"])[0]
    result = run("drive", failed, "--format", "json", "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    record = json.loads(result.stdout)
    assert record["removal"]["reason"] in ("failed", "proactive")
    assert record["p_fail"] is None and record["rank"] is None


def test_plot_is_written_and_a_missing_folder_is_an_error(fleet, tmp_path):
    serial = fleet["hostile_serial"]  # its model name holds "$^{$": drawn as text, not parsed as math
    target = tmp_path / "history.png"
    result = run("drive", serial, "--plot", str(target), "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    assert target.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948, 5.2)
    missing = tmp_path / "nowhere" / "history.png"
    result = run("drive", serial, "--plot", str(missing), "--store", str(fleet["root"]))
    assert result.exit_code == Exit.USAGE and not missing.parent.exists()


def test_a_store_that_does_not_exist_is_an_error_not_an_empty_fleet(tmp_path):
    result = run("drive", "QHS1", "--store", str(tmp_path / "typo"))
    assert result.exit_code == Exit.FAILURE and "typo" in result.stderr and result.stdout == ""


def test_csv_is_the_history_one_rfc4180_row_per_capture(fleet):
    import csv
    import io

    serial = fleet["hostile_serial"]
    result = run("drive", serial, "--format", "csv", "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    text = result.stdout_bytes.decode()
    assert text.endswith("\r\n")  # RFC 4180 section 2: CRLF line breaks
    rows = list(csv.DictReader(io.StringIO(text, newline="")))
    stored = fleet["snapshots"][fleet["snapshots"]["serial"] == serial]
    assert len(rows) == len(stored) and {r["serial"] for r in rows} == {serial}
    assert [int(r["power_on_hours"]) for r in rows] == sorted(stored["power_on_hours"].tolist())


def test_sparkline_maps_min_to_the_lowest_glyph_and_max_to_the_highest():
    assert sparkline([0, 7, 14]) == SPARK_GLYPHS[0] + SPARK_GLYPHS[4] + SPARK_GLYPHS[7]
    assert sparkline([5, 5, 5]) == SPARK_GLYPHS[0] * 3
    assert sparkline([1, None, 3]) == SPARK_GLYPHS[0] + " " + SPARK_GLYPHS[7]
    assert len(sparkline(range(100), width=12)) == 12


def test_a_member_of_a_degraded_group_shows_the_lost_member_and_the_caution(fleet):
    result = run("drive", fleet["survivor"], "--store", str(fleet["root"]), COLUMNS="200")
    assert result.exit_code == Exit.OK, result.output
    assert "DEGRADED" in result.stdout and fleet["lost_serial"] in result.stdout
    assert "site's change procedure" in result.stdout  # advice that can cost data defers to the site
    record = json.loads(run("drive", fleet["survivor"], "--format", "json", "--store", str(fleet["root"])).stdout)
    assert record["group_state"]["degraded"] is True
    assert [m["serial"] for m in record["group_lost"]] == [fleet["lost_serial"]]
