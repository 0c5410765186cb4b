"""The fit / cohorts / survival commands, run for real over a small simulated store."""

from __future__ import annotations

import csv
import io
import json

import pandas as pd
import pytest
from typer.testing import CliRunner

from tests.survival.fleetsim import simulated_store
from triage.cli import app
from triage.exitcodes import Exit
from triage.store.dataset import Store
from triage.survival import latest_model
from triage.survival.cohorts import COHORT_KEYS

runner = CliRunner()


@pytest.fixture(scope="module")
def store_root(tmp_path_factory):
    root = tmp_path_factory.mktemp("store")
    simulated_store(root, n_drives=500, days=70, seed=13, scale_hours=25_000)
    return root


def run(*args):
    return runner.invoke(app, [*args])


def test_cohorts_json_is_a_list_of_objects_with_exactly_the_contract_keys(store_root):
    result = run("cohorts", "--format", "json", "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    rows = json.loads(result.stdout)
    assert [row["cohort"] for row in rows] == ["QH-HD8T-A", "Tallow 14T"]
    for row in rows:
        assert list(row)[: len(COHORT_KEYS)] == list(COHORT_KEYS)
        assert row["afr_low"] <= row["afr"] <= row["afr_high"]


def test_cohorts_csv_parses_as_rfc4180_with_a_header(store_root):
    result = run("cohorts", "--format", "csv", "--by", "model,user_capacity_bytes", "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    text = result.stdout_bytes.decode()  # raw bytes: the runner's .stdout folds CRLF to LF
    assert text.endswith("\r\n") and text.count("\r\n") == 3  # RFC 4180 section 2: CRLF line breaks
    rows = list(csv.DictReader(io.StringIO(text, newline="")))
    assert [r["cohort"] for r in rows] == ["QH-HD8T-A / 8 TB", "Tallow 14T / 14 TB"]
    assert set(COHORT_KEYS) <= set(rows[0])


def test_cohorts_with_mttf_show_the_datasheet_afr(store_root):
    result = run("cohorts", "--format", "json", "--mttf", "1000000", "--store", str(store_root))
    rows = json.loads(result.stdout)
    # Schroeder & Gibson, FAST 2007, section 2: 1,000,000 h MTTF is about 0.88 % AFR
    assert all(0.87 <= row["datasheet_afr"] <= 0.88 for row in rows)


def test_cohorts_table_names_every_cohort(store_root):
    result = run("cohorts", "--store", str(store_root))
    assert result.exit_code == Exit.OK
    assert "QH-HD8T-A" in result.stdout and "Tallow 14T" in result.stdout


def test_cohorts_lead_with_the_interval_and_the_phase_then_exposure_and_counts(store_root):
    result = run("cohorts", "--format", "csv", "--store", str(store_root))
    header = result.stdout.splitlines()[0].split(",")
    assert header[:8] == ["cohort", "afr", "afr_low", "afr_high", "arr", "arr_low", "arr_high", "phase"]
    assert header.index("drives") > header.index("shape_high")
    heads = next(line for line in run("cohorts", "--store", str(store_root)).stdout.splitlines() if "AFR %/yr" in line)
    assert (heads.index("AFR %/yr") < heads.index("ARR %/yr") < heads.index("phase") < heads.index("drives")
            < heads.index("failed"))


def test_the_old_capacity_cohort_key_names_the_new_one(store_root):
    result = run("cohorts", "--by", "model,capacity_bytes", "--store", str(store_root))
    assert result.exit_code == Exit.USAGE
    assert result.output.strip() == "triage: cohort key 'capacity_bytes' is now 'user_capacity_bytes'"


def test_unknown_cohort_key_is_a_usage_error(store_root):
    result = run("cohorts", "--by", "slot", "--store", str(store_root))
    assert result.exit_code == Exit.USAGE
    assert "cohort keys must be among" in result.output


def test_survival_json_has_the_curve_and_age_bands(store_root):
    result = run("survival", "Tallow 14T", "--format", "json", "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    report = json.loads(result.stdout)
    assert {"age_hours", "survival", "survival_low", "survival_high", "at_risk"} <= set(report["curve"][0])
    assert [b["band"] for b in report["age_bands"]][0] == "0-3 months"
    assert sum(b["failures"] for b in report["age_bands"]) == report["failures"]


def test_survival_writes_the_plot(store_root, tmp_path):
    plot = tmp_path / "tallow.svg"
    result = run("survival", "tallow 14t", "--plot", str(plot), "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    assert plot.read_text().lstrip().startswith("<?xml")


def test_unknown_cohort_is_one_line_and_a_usage_error(store_root):
    result = run("survival", "Corvid NV1920", "--store", str(store_root))
    assert result.exit_code == Exit.USAGE
    assert result.output.count("\n") == 1 and "no cohort 'Corvid NV1920'" in result.output


def test_plot_must_be_png_or_svg(store_root, tmp_path):
    result = run("survival", "Tallow 14T", "--plot", str(tmp_path / "x.gif"), "--store", str(store_root))
    assert result.exit_code == Exit.USAGE


def test_fit_saves_a_model_that_latest_model_finds(store_root):
    result = run("fit", "--format", "json", "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    summary = json.loads(result.stdout)
    model = latest_model(Store(store_root))
    assert str(model.path_) == summary["path"]
    assert summary["holdout"]["drives"] > 0 and len(summary["calibration"]) == 10


def test_empty_store_is_a_clear_failure(tmp_path):
    # a store holding only a removal log: it exists, but there is nothing to estimate from
    Store(tmp_path).append("removals", pd.DataFrame({
        "serial": ["QS1"], "removed_at": pd.to_datetime(["2026-11-01T02:00Z"]), "reason": ["failed"]}))
    for command in (["cohorts"], ["survival", "QH-HD8T-A"], ["fit"]):
        result = run(*command, "--store", str(tmp_path))
        assert result.exit_code == Exit.FAILURE
        assert "no snapshots stored" in result.output


def test_cohorts_show_failures_and_replacements_with_both_rates(store_root):
    rows = json.loads(run("cohorts", "--format", "json", "--store", str(store_root)).stdout)
    for row in rows:
        assert row["replacements"] >= row["failures"] and row["arr"] >= row["afr"]
        assert row["arr_low"] <= row["arr"] <= row["arr_high"]
    assert sum(row["replacements"] > row["failures"] for row in rows) >= 1  # fleetsim pulls 20 % early


def test_cohorts_vs_fleet_adds_each_cohorts_rate_ratio(store_root):
    rows = json.loads(run("cohorts", "--vs-fleet", "--format", "json", "--store", str(store_root)).stdout)
    for row in rows:
        assert row["vs_fleet_low"] <= row["vs_fleet"] <= row["vs_fleet_high"] and 0 <= row["vs_fleet_p"] <= 1


def test_events_replacements_count_proactive_pulls_in_the_curves(store_root):
    failures = json.loads(run("survival", "Tallow 14T", "--format", "json", "--store", str(store_root)).stdout)
    replaced = json.loads(run("survival", "Tallow 14T", "--format", "json", "--events", "replacements",
                              "--store", str(store_root)).stdout)
    assert failures["events"] == "failures" and replaced["events"] == "replacements"
    assert sum(b["failures"] for b in replaced["age_bands"]) == replaced["replacements"]
    assert replaced["replacements"] > failures["failures"]


def test_compare_json_has_the_contract_keys(store_root):
    result = run("compare", "Tallow 14T", "QH-HD8T-A", "--format", "json", "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    record = json.loads(result.stdout)
    assert {"rate_ratio", "rate_ratio_low", "rate_ratio_high", "p_value", "hazard_ratio", "hazard_ratio_low",
            "hazard_ratio_high"} <= set(record)
    assert {"failures", "drive_days"} <= set(record["a_side"]) and {"failures", "drive_days"} <= set(record["b_side"])
    assert record["rate_ratio_low"] <= record["rate_ratio"] <= record["rate_ratio_high"]


def test_compare_table_starts_with_a_plain_words_verdict(store_root):
    result = run("compare", "Tallow 14T", "QH-HD8T-A", "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    first = result.stdout.splitlines()[0]
    assert first.startswith("Tallow 14T fails ") and "as often as QH-HD8T-A" in first and "p = " in first


def test_compare_of_an_unknown_cohort_is_a_usage_error(store_root):
    result = run("compare", "Tallow 14T", "Corvid NV1920", "--store", str(store_root))
    assert result.exit_code == Exit.USAGE and "no cohort 'Corvid NV1920'" in result.output


def test_plot_into_a_missing_folder_is_refused_and_creates_nothing(store_root, tmp_path):
    target = tmp_path / "no-such-folder" / "tallow.png"
    result = run("survival", "Tallow 14T", "--plot", str(target), "--store", str(store_root))
    assert result.exit_code == Exit.USAGE and "does not exist" in result.output
    assert not target.parent.exists()


def test_a_folder_that_is_not_a_store_is_a_clear_failure(tmp_path):
    for command in (["cohorts"], ["survival", "QH-HD8T-A"], ["fit"]):
        result = run(*command, "--store", str(tmp_path))
        assert result.exit_code == Exit.FAILURE
        assert "not a triage store" in result.output


def test_cohorts_state_the_newest_capture_and_warn_when_it_is_stale(store_root):
    result = run("cohorts", "--stale-hours", "1", "--store", str(store_root))
    assert result.exit_code == Exit.OK, result.output
    newest = Store(store_root).read("snapshots", columns=["taken_at"])["taken_at"].max()
    assert f"cohorts: as of {newest:%Y-%m-%d %H:%M} UTC" in result.stderr
    assert "warning: the newest capture is" in result.stderr


def test_survival_writes_its_curve_as_csv_too(store_root):
    curve = run("survival", "QH-HD8T-A", "--format", "csv", "--store", str(store_root))
    assert curve.exit_code == Exit.OK, curve.output
    text = curve.stdout_bytes.decode()  # raw bytes: the runner's .stdout folds CRLF to LF
    assert text.endswith("\r\n")  # RFC 4180 section 2: CRLF line breaks
    rows = list(csv.DictReader(io.StringIO(text, newline="")))
    assert rows and {"age_hours", "survival", "at_risk"} <= set(rows[0])
