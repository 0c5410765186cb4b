"""``triage fit``, ``cohorts``, ``survival`` and ``compare``: failure rates and the risk model."""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import (EngineChoice, EngineOption, OutputFormat, SchedulerOption, StaleOption, StoreOption, app,
                               engine_text, fail, format_option, open_engine_options, open_store, pool_only_if_asked,
                               say)
from triage.exitcodes import Exit


# -- survival: fit, cohorts, survival (triage/survival, triage/report/survival.py, docs/survival.md) --
ByOption = typer.Option("model", "--by", metavar="KEYS", help="Cohort keys, comma-separated, among model, firmware, bus, user_capacity_bytes.")


class Events(str, Enum):
    """What ends a drive's life in curves, Weibull, compare and the risk model (docs/survival.md)."""

    failures = "failures"  # 'failed' removals; a proactive pull is censored
    replacements = "replacements"  # 'failed' and 'proactive' removals


EventsOption = typer.Option(
    Events.failures, "--events",
    help="Events for curves, Weibull, compare and fit: failures (failed removals; proactive pulls "
         "censored) or replacements (failed or proactive). cohorts shows AFR and ARR either way.")
MttfOption = typer.Option(None, "--mttf", min=1.0, metavar="HOURS", help="Datasheet MTTF in hours: show the AFR it implies.")


def _survival_call(function, *args, **kwargs):
    """Run a survival-layer function; its known errors become one line and the right exit code."""
    from triage.survival.cohorts import UnknownCohort
    from triage.survival.cox import CoxFitError
    from triage.survival.landmark import FitError
    from triage.engine import EngineError
    from triage.survival.run import EmptyStore

    try:
        return function(*args, **kwargs)
    except (EmptyStore, CoxFitError, FitError, EngineError) as exc:
        fail(str(exc), Exit.FAILURE)
    except UnknownCohort as exc:
        fail(str(exc), Exit.USAGE)
    except ValueError as exc:  # bad --by and other option values
        fail(str(exc), Exit.USAGE)
    except OSError as exc:
        fail(str(exc), Exit.FAILURE)


def _survival_notes(obs, as_of=None, command: str = "", stale_hours: float | None = None) -> None:
    """The as-of line, a stale-data warning, data-quality exclusions and drives back from repair, on stderr."""
    from triage.report.survival import exclusion_lines, return_lines
    from triage.risk.view import stale_warning
    from triage.risk.score import moment_text

    if command:
        say(f"{command}: as of {moment_text(as_of)} (newest capture used)")
        warning = stale_warning(as_of, stale_hours=stale_hours)
        if warning:
            say(f"warning: {warning}")
    for line in [*exclusion_lines(obs.exclusions), *return_lines(obs.returns)]:
        say(line)


@app.command(epilog="Example: triage fit --horizon-days 30 --by model --store /srv/triage/store")
def fit(
    horizon_days: float = typer.Option(30.0, "--horizon-days", min=1.0, metavar="DAYS", help="Predict failure within this many days."),
    by: str = ByOption,
    events: Events = EventsOption,
    fmt: OutputFormat = format_option("CSV: the covariate rate ratios; JSON: the whole summary"),
    store: Optional[Path] = StoreOption,
    engine: Optional[EngineChoice] = EngineOption,
    scheduler: Optional[str] = SchedulerOption,
) -> None:
    """Fit the fleet risk model (AFR, Weibull, stratified Cox) and save it under <store>/models."""
    from triage.report.console import progress_bar
    from triage.report.survival import exclusion_lines, render_fit
    from triage.survival.run import fit_store

    # the engine first: a scheduler that cannot be reached stops the run before the store is touched
    with open_engine_options(engine, scheduler) as opened:
        runner = pool_only_if_asked(opened, engine)
        target = open_store(store)
        say(f"fit: map steps on {engine_text(runner)}")
        with progress_bar("reading snapshots") as update:
            model, path = _survival_call(fit_store, target, horizon_days=horizon_days, by=by,
                                         count_proactive=events is Events.replacements,
                                         say=lambda message: say(f"fit: {message}"), progress=update,
                                         engine=runner)
    for line in exclusion_lines(model.exclusions_):
        say(line)
    render_fit(model, path, fmt)


@app.command(epilog="Example: triage cohorts --by model,firmware --vs-fleet --format csv --mttf 2500000")
def cohorts(
    by: str = ByOption,
    fmt: OutputFormat = format_option(),
    mttf: Optional[float] = MttfOption,
    vs_fleet: bool = typer.Option(False, "--vs-fleet", help="Add each cohort's failure-rate ratio against the "
                                                            "rest of the fleet, exact 95 % range and p-value."),
    events: Events = EventsOption,
    stale_hours: float = StaleOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """One row per cohort: AFR and ARR with exact 95 % limits, life phase and Weibull shape, then drives,
    drive-days, failures and replacements."""
    from triage.report.console import progress_bar
    from triage.report.survival import render_cohorts
    from triage.survival.run import cohorts_of_store

    target = open_store(store)
    with progress_bar("reading snapshots") as update:
        table, obs = _survival_call(cohorts_of_store, target, by=by,
                                    count_proactive=events is Events.replacements, mttf_hours=mttf,
                                    vs_fleet=vs_fleet, progress=update)
    _survival_notes(obs, obs.as_of, "cohorts", stale_hours)
    render_cohorts(table, fmt)


@app.command(epilog="Example: triage survival 'QH-HD8T-A' 'Tallow 14T' --plot survival.png --hazard-plot bathtub.png")
def survival(
    cohorts: list[str] = typer.Argument(..., metavar="COHORT...",
                                        help="Cohort label(s) as 'triage cohorts' prints them (same --by)."),
    by: str = ByOption,
    fmt: OutputFormat = format_option("CSV: the survival curve; JSON: everything; a list for several cohorts"),
    plot: Optional[Path] = typer.Option(None, "--plot", metavar="FILE", help="Also draw survival (.png or .svg, in an "
                                        "existing folder): one cohort with its Weibull fit, several on one chart."),
    hazard_plot: Optional[Path] = typer.Option(None, "--hazard-plot", metavar="FILE",
                                               help="Also draw hazard by age band, the bathtub (.png or .svg)."),
    mttf: Optional[float] = MttfOption,
    events: Events = EventsOption,
    stale_hours: float = StaleOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Survival and cumulative hazard by age (delayed entry), hazard by age band, Weibull fit of each cohort."""
    from triage.cli.common import check_output_file
    from triage.report.console import progress_bar
    from triage.report.pictures import hazard_figure, save_figure, survival_figure
    from triage.report.survival import plot_survival, render_survivals
    from triage.survival.run import survival_reports_of_store

    check_output_file(plot, (".png", ".svg"), "--plot")
    check_output_file(hazard_plot, (".png", ".svg"), "--hazard-plot")
    with progress_bar("reading snapshots") as update:
        reports, obs = _survival_call(survival_reports_of_store, open_store(store), cohorts, by=by,
                                      count_proactive=events is Events.replacements, mttf_hours=mttf,
                                      progress=update)
    _survival_notes(obs, obs.as_of, "survival", stale_hours)
    render_survivals(reports, fmt)
    if plot is not None:
        if len(reports) == 1:
            _survival_call(plot_survival, reports[0], plot)
        else:
            _survival_call(save_figure, survival_figure(reports), plot)
        say(f"survival: plot written to {plot}")
    if hazard_plot is not None:
        _survival_call(save_figure, hazard_figure({r.cohort: r.bands for r in reports}), hazard_plot)
        say(f"survival: hazard plot written to {hazard_plot}")


@app.command(epilog="Example: triage compare 'QH-HD8T-A / QA03' 'QH-HD8T-A / QA02' --by model,firmware")
def compare(
    a: str = typer.Argument(..., metavar="A", help="Cohort A, as 'triage cohorts' prints it (same --by)."),
    b: str = typer.Argument(..., metavar="B", help="Cohort B, the one A is measured against."),
    by: str = ByOption,
    fmt: OutputFormat = format_option("CSV: one row with both sides"),
    events: Events = EventsOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Is cohort A worse than cohort B? Failure-rate ratio (exact 95 % range, p-value) and the hazard ratio
    adjusted for age (Cox)."""
    from triage.report.console import progress_bar
    from triage.report.survival import render_compare
    from triage.survival.run import compare_of_store

    with progress_bar("reading snapshots") as update:
        comparison, obs = _survival_call(compare_of_store, open_store(store), a, b, by=by,
                                         count_proactive=events is Events.replacements, progress=update)
    _survival_notes(obs)
    render_compare(comparison, fmt.value)
