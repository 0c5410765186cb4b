"""``triage backtest`` and ``triage forecast``: proving the flags on the fleet's own history, and
how many failures and spares to expect."""

from __future__ import annotations

from datetime import date, datetime, timedelta, timezone
from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import (EngineChoice, EngineOption, OutputFormat, SchedulerOption, StoreOption, app,
                               engine_text, fail, format_option, open_engine_options, open_store,
                               pool_only_if_asked, say)
from triage.cli.risk import NoDefaultRulesOption, RulesOption, _risk_inputs
from triage.exitcodes import Exit


def _night(value: Optional[str], option: str) -> Optional[datetime]:
    """A YYYY-MM-DD option as that UTC date's midnight; a clear line when it is not a date."""
    if value is None:
        return None
    try:
        day = date.fromisoformat(value)
    except ValueError:
        fail(f"{option} {value!r} is not a date (YYYY-MM-DD)", Exit.USAGE)
    return datetime(day.year, day.month, day.day, tzinfo=timezone.utc)


@app.command(epilog="Example: triage backtest --horizon-days 30 --max-false-alarm 0.01 --plot backtest.png")
def backtest(
    horizon_days: float = typer.Option(30.0, "--horizon-days", min=1.0, metavar="DAYS", help="A flag counts when the drive fails within this many days."),
    max_false_alarm: float = typer.Option(0.01, "--max-false-alarm", metavar="SHARE", help="Operating point: the highest recall whose false-alarm rate stays within this share of drives (between 0 and 1)."),
    first: Optional[str] = typer.Option(None, "--from", metavar="DAY", help="First scored night, YYYY-MM-DD (default: after the training period)."),
    last: Optional[str] = typer.Option(None, "--to", metavar="DAY", help="Last scored night, YYYY-MM-DD (default: the last with a full horizon of data after it)."),
    refit_days: int = typer.Option(30, "--refit-days", min=1, metavar="DAYS", help="Refit the model on the data before the night every this many days."),
    fmt: OutputFormat = format_option("CSV: one row per method; JSON: everything"),
    plot: Optional[Path] = typer.Option(None, "--plot", metavar="FILE", help="Also draw the recall / false-alarm curve (.png or .svg)."),
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = NoDefaultRulesOption,
    store: Optional[Path] = StoreOption,
    engine: Optional[EngineChoice] = EngineOption,
    scheduler: Optional[str] = SchedulerOption,
) -> None:
    """Replay the stored history night by night: would each rule, each severity, the drive's own
    verdict and the combined score have flagged the drives that failed, and how many healthy ones?"""
    from triage.engine import EngineError
    from triage.report.console import progress_bar
    from triage.report.predict import plot_backtest, render_backtest
    from triage.risk.backtest import BacktestError, BacktestOptionError, backtest_store

    if not 0 < max_false_alarm < 1:
        fail(f"--max-false-alarm must lie strictly between 0 and 1, got {max_false_alarm}", Exit.USAGE)
    if plot is not None and plot.suffix.lower() not in (".png", ".svg"):
        fail(f"{plot}: --plot must name a .png or .svg file", Exit.USAGE)
    if plot is not None and not plot.parent.resolve().is_dir():
        fail(f"{plot}: folder {plot.parent} does not exist", Exit.USAGE)
    ruleset, _ = _risk_inputs(rules, no_default_rules, None)
    first_night, last_night = _night(first, "--from"), _night(last, "--to")
    # the engine before the store: a scheduler that cannot be reached stops the run untouched
    with open_engine_options(engine, scheduler) as opened:
        runner = pool_only_if_asked(opened, engine)
        target = open_store(store)
        say(f"backtest: nights replayed on {engine_text(runner)}")
        try:
            with progress_bar("replaying nights") as update:
                result = backtest_store(target, ruleset, horizon_days=horizon_days, max_false_alarm=max_false_alarm,
                                        first_night=first_night, last_night=last_night, refit_days=refit_days,
                                        progress=update, engine=runner)
        except BacktestOptionError as exc:
            fail(str(exc), Exit.USAGE)
        except (BacktestError, EngineError) as exc:
            fail(str(exc), Exit.FAILURE)
    render_backtest(result, fmt)
    if plot is not None:
        plot_backtest(result, plot)
        say(f"backtest: plot written to {plot}")


@app.command(epilog="Example: triage forecast --days 90 --service-level 0.95 --by model --format table")
def forecast(
    days: float = typer.Option(90.0, "--days", min=1.0, metavar="DAYS", help="Forecast failures within this many days."),
    as_of: Optional[str] = typer.Option(None, "--as-of", metavar="DAY", help="Forecast from the end of this UTC date (YYYY-MM-DD) using only data up to then (default: the newest capture)."),
    service_level: float = typer.Option(0.95, "--service-level", metavar="SHARE", help="Spares so that running out is at most 1 - this likely (between 0 and 1)."),
    by: str = typer.Option("model", "--by", metavar="KEYS", help="Cohort keys, comma-separated, among model, firmware, bus, user_capacity_bytes."),
    fmt: OutputFormat = format_option(),
    store: Optional[Path] = StoreOption,
) -> None:
    """Expected failures per cohort, per site and fleet-wide over the next N days, with a 90 %
    prediction interval, and the spares to stock."""
    from triage.report.console import progress_bar
    from triage.report.predict import render_forecast
    from triage.risk.forecast import ForecastError, ForecastOptionError, forecast_store
    from triage.survival.observations import check_by

    if not 0 < service_level < 1:
        fail(f"--service-level must lie strictly between 0 and 1, got {service_level}", Exit.USAGE)
    try:
        keys = check_by(by)
    except ValueError as exc:
        fail(str(exc), Exit.USAGE)
    moment = _night(as_of, "--as-of")
    if moment is not None:
        moment += timedelta(days=1)  # a date means the end of that day, UTC
    target = open_store(store)
    try:
        with progress_bar("reading drive states") as update:
            result = forecast_store(target, days=days, as_of=moment, by=keys, service_level=service_level,
                                    progress=update)
    except ForecastOptionError as exc:
        fail(str(exc), Exit.USAGE)
    except ForecastError as exc:
        fail(str(exc), Exit.FAILURE)
    render_forecast(result, fmt)
