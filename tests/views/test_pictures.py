"""Pictures: several cohorts' survival on one chart, hazard by age band, read back from the files."""

from __future__ import annotations

import json

import pandas as pd
from typer.testing import CliRunner

from triage.cli import app
from triage.exitcodes import Exit
from triage.report.pictures import hazard_figure, survival_figure

runner = CliRunner()
PNG = b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948, 5.2)


def test_survival_of_two_cohorts_draws_one_chart_and_the_bathtub(fleet, tmp_path):
    curves, bathtub = tmp_path / "survival.png", tmp_path / "bathtub.svg"
    result = runner.invoke(app, ["survival", "QH-HD8T-A", "Tallow 14T", "--plot", str(curves),
                                 "--hazard-plot", str(bathtub), "--format", "json", "--store", str(fleet["root"])])
    assert result.exit_code == Exit.OK, result.output
    reports = json.loads(result.stdout)
    assert [r["cohort"] for r in reports] == ["QH-HD8T-A", "Tallow 14T"]
    assert curves.read_bytes()[:8] == PNG
    assert bathtub.read_text().lstrip().startswith("<?xml") and "<svg" in bathtub.read_text()


def test_one_cohort_keeps_its_single_object_json(fleet):
    result = runner.invoke(app, ["survival", "QH-HD8T-A", "--format", "json", "--store", str(fleet["root"])])
    assert result.exit_code == Exit.OK, result.output
    assert json.loads(result.stdout)["cohort"] == "QH-HD8T-A"


def test_a_plot_into_a_missing_folder_is_an_error(fleet, tmp_path):
    result = runner.invoke(app, ["survival", "QH-HD8T-A", "--hazard-plot", str(tmp_path / "no" / "b.png"),
                                 "--store", str(fleet["root"])])
    assert result.exit_code == Exit.USAGE and not (tmp_path / "no").exists()


def _legend_texts(fig):
    return [t.get_text() for ax in fig.axes if ax.get_legend() for t in ax.get_legend().get_texts()]


def test_a_cohort_without_failures_says_so_instead_of_an_empty_curve(fleet):
    from triage.survival.run import survival_reports_of_store

    reports, _ = survival_reports_of_store(fleet["store"], ["QH-HD8T-A"])
    quiet = reports[0]
    quiet.failures = 0
    texts = _legend_texts(survival_figure([quiet]))
    assert any("0 failures" in t and "no curve" in t for t in texts)


def test_the_bathtub_leaves_out_bands_too_thin_to_read_and_says_so():
    bands = pd.DataFrame({"band": ["0-3 months", "3-12 months"], "drive_days": [800.0, 30.0],
                          "failures": [2, 0], "hazard": [36.5, 0.0], "hazard_low": [4.4, 0.0],
                          "hazard_high": [131.9, 4490.0]})
    fig = hazard_figure({"fleet": bands})
    assert "left out" in fig.axes[0].get_xlabel()
    assert len(fig.axes[0].patches) == 1  # one bar: the thin band is not drawn


def test_a_cohort_named_like_mathtext_is_drawn_as_text(fleet, tmp_path):
    from tests.views.conftest import HOSTILE

    target = tmp_path / "one.png"
    result = runner.invoke(app, ["survival", HOSTILE, "--plot", str(target), "--store", str(fleet["root"])])
    assert result.exit_code == Exit.OK, result.output
    assert target.read_bytes()[:8] == PNG
