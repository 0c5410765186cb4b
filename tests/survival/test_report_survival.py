"""What the cohort, survival and compare renderers print: 80-column tables, plots that say why."""

from __future__ import annotations

import io
import re

import pandas as pd
from rich.console import Console

from tests.survival.test_compare import _periods_fleet
from tests.survival.test_observations import build, nightly
from triage.report.survival import cohort_grid, plot_survival, render_compare, render_survival
from triage.survival.cohorts import cohort_table, survival_report
from triage.survival.compare import compare_cohorts, versus_fleet


def _print(renderable_or_fn, width=80) -> str:
    out = io.StringIO()
    console = Console(file=out, width=width, no_color=True, force_terminal=False)
    if callable(renderable_or_fn):
        renderable_or_fn(console)
    else:
        console.print(renderable_or_fn)
    return out.getvalue()


def _cohorts():
    obs = _periods_fleet()
    return cohort_table(obs).merge(versus_fleet(obs), on="cohort"), obs


def test_the_cohort_table_fits_80_columns_without_breaking_a_figure():
    table, _ = _cohorts()
    text = _print(cohort_grid(table, 80))
    assert max(len(line) for line in text.splitlines()) <= 80
    for row in table.to_dict("records"):
        # every figure appears whole on one line (never folded mid-number)
        for figure in (f"{row['afr']:.2f}", f"{row['arr']:.2f}", f"{row['afr_low']:.2f} - {row['afr_high']:.2f}"):
            assert figure in text, figure


def test_the_wide_cohort_table_has_one_column_per_figure():
    table, _ = _cohorts()
    text = _print(cohort_grid(table, 200), width=200)
    assert "ARR %/yr" in text and "replaced" in text and "p 1.00" in text


def test_the_survival_report_fits_80_columns():
    _, obs = _cohorts()
    report = survival_report(obs, "QH-HD8T-A / QF12")
    text = _print(lambda console: render_survival(report, "table", console=console))
    assert max(len(line) for line in text.splitlines()) <= 80
    assert "events in the curves and the fit: failures (proactive pulls censored)" in text.replace("\n", " ")


def test_compare_prints_the_verdict_first():
    c = compare_cohorts(_periods_fleet(), "QH-HD8T-A / QF14", "QH-HD8T-A / QF12")
    text = _print(lambda console: render_compare(c, "table", console=console), width=200)
    assert text.startswith("QH-HD8T-A / QF14 fails ")
    assert "only 2 failures in all" in text


def test_a_plot_of_a_cohort_without_failures_says_so(tmp_path):
    import matplotlib

    obs = build(pd.concat([nightly(f"QHA{i}", 1_000 + 50 * i, nights=10) for i in range(12)]))
    report = survival_report(obs, "QH-HD8T-A")
    with matplotlib.rc_context({"svg.fonttype": "none"}):  # keep text as text in the SVG
        path = plot_survival(report, tmp_path / "none.svg")
    svg = path.read_text()
    assert "no failures in" in svg and "no survival curve to draw" in svg
    assert not re.search(r"Kaplan-Meier", svg)
