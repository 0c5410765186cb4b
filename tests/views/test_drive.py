"""``triage drive SERIAL``: the story of one drive, run for real over the shared simulated store."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from tests.views.conftest import HOSTILE
from triage.cli import app
from triage.exitcodes import Exit
from triage.report.drive import SPARK_GLYPHS, sparkline
from triage.risk.drive import close_serials, hazard_terms

runner = CliRunner()


def run(*args, **env):
    return runner.invoke(app, [*args], env={"COLUMNS": "120", **env})


def test_hazard_factors_multiply_to_the_relative_hazard_of_an_independent_cox_fit():
    # lifelines' CoxPHFitter.predict_partial_hazard is exp((x - mean(x_train)) . beta)
    # (lifelines docs, CoxPHFitter.predict_partial_hazard): the product of our factors must equal it.
    from lifelines import CoxPHFitter

    rng = np.random.default_rng(3)
    n = 400
    x = pd.DataFrame({"any_pending": rng.uniform(size=n) < 0.3, "log_reallocated": rng.exponential(1.0, n)},
                     dtype=float)
    duration = rng.exponential(1.0 / np.exp(0.8 * x["any_pending"] + 0.3 * x["log_reallocated"]))
    frame = x.assign(T=duration, E=1)
    cph = CoxPHFitter().fit(frame, duration_col="T", event_col="E")
    centre = pd.Series(cph._norm_mean, index=x.columns)
    for i in (0, 5, 17):
        terms = hazard_terms(x.iloc[i], cph.params_, centre)
        expected = float(cph.predict_partial_hazard(x.iloc[[i]]).iloc[0])
        assert np.exp(terms["term"].sum()) == pytest.approx(expected, rel=1e-9)
        assert terms["factor"].prod() == pytest.approx(expected, rel=1e-9)
    assert list(terms["term"].abs()) == sorted(terms["term"].abs(), reverse=True)  # largest effect first


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
    assert any(f["rule_id"] == "media.pending-present" for f in record["flags"])


def test_p_fail_is_the_saved_models_and_its_factors_give_the_models_relative_hazard(fleet):
    serial = fleet["hostile_serial"]
    record = json.loads(run("drive", serial, "--format", "json", "--store", str(fleet["root"])).stdout)
    model = fleet["model"]
    latest = fleet["snapshots"][fleet["snapshots"]["serial"] == serial].sort_values("taken_at").tail(1)
    assert record["p_fail"] == pytest.approx(float(model.predict_fail_probability(latest).iloc[0]))
    details = model.predict_details(latest)
    assert record["relative_hazard"] == pytest.approx(float(details["relative_hazard"].iloc[0]), rel=1e-6)
    product = np.prod([c["factor"] for c in record["contributions"]])
    assert product == pytest.approx(record["relative_hazard"], rel=1e-6)


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
    assert "captures have stopped arriving" in out  # the simulated fleet ends in February 2026


def test_a_failed_drive_shows_its_removal_and_no_probability(fleet):
    truth = fleet["truth"]
    failed = sorted(truth.loc[truth["failed"], "serial"])[0]
    result = run("drive", failed, "--format", "json", "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    record = json.loads(result.stdout)
    assert record["removal"]["reason"] in ("failed", "proactive")
    assert record["p_fail"] is None and record["rank"] is None


def test_plot_is_written_and_a_missing_folder_is_an_error(fleet, tmp_path):
    serial = fleet["hostile_serial"]
    target = tmp_path / "history.png"
    result = run("drive", serial, "--plot", str(target), "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    assert target.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948, 5.2)
    missing = tmp_path / "nowhere" / "history.png"
    result = run("drive", serial, "--plot", str(missing), "--store", str(fleet["root"]))
    assert result.exit_code == Exit.USAGE and not missing.parent.exists()


def test_a_store_that_does_not_exist_is_an_error_not_an_empty_fleet(tmp_path):
    result = run("drive", "QHS1", "--store", str(tmp_path / "typo"))
    assert result.exit_code == Exit.USAGE and "no such store" in result.stderr


def test_sparkline_maps_min_to_the_lowest_glyph_and_max_to_the_highest():
    assert sparkline([0, 7, 14]) == SPARK_GLYPHS[0] + SPARK_GLYPHS[4] + SPARK_GLYPHS[7]
    assert sparkline([5, 5, 5]) == SPARK_GLYPHS[0] * 3
    assert sparkline([1, None, 3]) == SPARK_GLYPHS[0] + " " + SPARK_GLYPHS[7]
    assert len(sparkline(range(100), width=12)) == 12
