"""``triage rank``, ``triage tickets`` and ``triage nightly``: who to pull first."""

from __future__ import annotations

from functools import partial
from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import (
    EngineChoice,
    EngineOption,
    OutputFormat,
    SchedulerOption,
    StaleOption,
    StoreOption,
    Tier,
    app,
    fail,
    format_option,
    open_engine_options,
    open_store,
    os_failure,
    pool_only_if_asked,
    say,
)
from triage.exitcodes import Exit
from triage.risk.score import TIERS

#: Typer would print a repeatable choice as "<list[...]>"; the same choices, without the type name.
_TIER_CHOICES = "<" + "|".join(TIERS) + ">"


def _print_cautions(view) -> None:
    """Degraded groups (a RankView's), on stderr too: advice that could cost data defers to the
    site's procedure."""
    for group in view.degraded:
        say(f"caution: {group['caution']}")


def _print_notes(notes: list[str]) -> None:
    for note in notes:
        say(f"note: {note}")


def _print_warnings(warnings: list[str]) -> None:
    for line in warnings:
        say(f"warning: {line}")


# -- risk: rank, tickets, nightly (triage/risk, triage/report/rank.py, triage/report/tickets.py) --
RulesOption = typer.Option(None, "--rules", metavar="DIR",
                           help="Rule folder (repeatable); groups.toml is read from the first that has one.")
NoDefaultRulesOption = typer.Option(False, "--no-default-rules", help="Use only the rule folders given.")
GroupConfigOption = typer.Option(None, "--group-config", metavar="FILE",
                                 help="Group tolerance file (groups.toml format).")
MinSeverityOption = typer.Option(
    None, "--min-severity", case_sensitive=False,
    help="Leave drives below this action tier out of new tickets (tiers in order of urgency); "
         "open tickets stay open while flagged.")


def _load_risk_inputs(dirs: list[Path], include_defaults: bool, group_config: Optional[Path]):
    """(rule set, group configuration); ValueError with one line when either cannot be used."""
    from triage.risk.group_config import GroupConfig
    from triage.rules import load_rules

    ruleset = load_rules(dirs, include_defaults=include_defaults)
    errors = list(getattr(ruleset, "errors", []) or [])
    if errors:
        raise ValueError(f"rule error: {errors[0]}" + (f" (and {len(errors) - 1} more)" if len(errors) > 1 else ""))
    try:
        return ruleset, GroupConfig.find(dirs, group_config)
    except OSError as exc:
        raise ValueError(str(exc)) from exc


def _risk_inputs(rules: Optional[list[Path]], no_default_rules: bool, group_config: Optional[Path]):
    """Load the rule set and group configuration, or fail with one clear line."""
    try:
        return _load_risk_inputs(list(rules or []), not no_default_rules, group_config)
    except ImportError as exc:
        fail(f"the rules layer is not available: {exc}", Exit.FAILURE)
    except ValueError as exc:
        fail(str(exc), Exit.USAGE)


def _inputs_record(rules: Optional[list[Path]], no_default_rules: bool, group_config: Optional[Path],
                   stale_hours: float) -> dict:
    """How this command named its rules and options, saved with its ranking (absolute paths) so
    that the next ``triage ingest`` can rank again the same way (``refresh_saved_ranking``)."""
    return {"rules": [str(Path(d).resolve()) for d in rules or []], "default_rules": not no_default_rules,
            "group_config": str(group_config.resolve()) if group_config is not None else None,
            "stale_hours": float(stale_hours)}


def refresh_saved_ranking(store) -> str | None:
    """After an ingest that stored something: rank again with the rules and options of the
    ranking saved last, so that the next ``triage rank`` reads it instead of computing it.
    Returns a line to print (what was done, or why not), or None when no ranking was ever saved."""
    import time

    from triage.risk.rank import rank_store
    from triage.risk.saved import last_inputs

    inputs = last_inputs(store.derived_dir)
    if inputs is None:
        return None
    started = time.perf_counter()
    try:
        group_config = Path(inputs["group_config"]) if inputs.get("group_config") else None
        ruleset, config = _load_risk_inputs([Path(d) for d in inputs["rules"]], bool(inputs["default_rules"]),
                                            group_config)  # a rule folder gone or broken since: one line
        result = rank_store(store, ruleset, config=config, silent_hours=float(inputs["stale_hours"]), reuse=True,
                            inputs=inputs)
    except Exception as exc:  # noqa: BLE001  (best effort: the ingest before it stands, whatever this meets)
        return f"ranking not saved ahead: {type(exc).__name__}: {exc}"
    return (f"ranked {len(result.drives)} drive(s) ahead for 'triage rank' with the rules and options of the last "
            f"rank ({time.perf_counter() - started:.1f} s)")


def _rank(store, ruleset, config, tickets: Optional[Path], stale_hours: float, inputs: dict | None = None):
    """Rank the store (reading the saved ranking when its inputs are the same, else computing and
    saving it); returns the RankResult, or fails with one line."""
    import pyarrow as pa

    from triage.risk.rank import rank_store

    # Arrow buffers from the C allocator: the large ones go back to the system when freed, so the
    # look-back window read as Arrow is returned once converted (measured: 100 MB less peak at
    # 100k drives, benchmarks/rank_scale.py) instead of being held by Arrow's own pool.
    pa.set_memory_pool(pa.system_memory_pool())

    try:
        result = rank_store(store, ruleset, config=config, tickets=tickets, silent_hours=stale_hours, reuse=True,
                            inputs=inputs)
    except (OSError, ValueError) as exc:  # e.g. --tickets names a file that is not our export
        fail(str(exc), Exit.FAILURE)
    return result


@app.command(
    epilog="Example: triage rank --top 20 --site ash --severity replace-now --tickets /srv/triage/tickets.csv",
)
def rank(
    top: int = typer.Option(25, "--top", min=1, metavar="N", help="Show this many drives."),
    host: Optional[list[str]] = typer.Option(None, "--host", metavar="PATTERN", help="Host name pattern (fnmatch, repeatable)."),
    site: Optional[list[str]] = typer.Option(None, "--site", metavar="PATTERN", help="Site pattern: host name up to its first '-' (repeatable)."),
    group: Optional[list[str]] = typer.Option(None, "--group", metavar="PATTERN", help="Redundancy group pattern (repeatable)."),
    severity: Optional[list[Tier]] = typer.Option(None, "--severity", case_sensitive=False, metavar=_TIER_CHOICES,
                                                  help="Only this action tier (repeatable)."),
    fmt: OutputFormat = format_option(),
    tickets: Optional[Path] = typer.Option(None, "--tickets", metavar="FILE",
                                           help="Last ticket export: show each flag as new or ongoing, and since when."),
    stale_hours: float = StaleOption,
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = NoDefaultRulesOption,
    group_config: Optional[Path] = GroupConfigOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Rank drives: action tier first (replace now, replace soon, check the path, watch), then the
    risk score; lists drives, hosts and sites not reporting. Exit: 0, 8 something is not reporting
    or the data is stale, 1 failure (a missing store)."""
    from triage.report.rank import render_ranked
    from triage.risk.saved import saved_view
    from triage.risk.view import RowFilter, silence_lines

    target = open_store(store)
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    shown = RowFilter(host=host or (), site=site or (), group=group or (),
                      severity=[s.value for s in severity or ()], top=top)
    # the saved ranking's rows straight from Arrow when there is one (no pandas: the common case
    # answers in well under a second at 100k drives); ticket states need the whole ranking
    view = saved_view(target, ruleset, config, stale_hours, shown) if tickets is None else None
    if view is None:
        from triage.risk.rank import filter_ranked
        from triage.risk.view import view_of

        result = _rank(target, ruleset, config, tickets, stale_hours,
                       _inputs_record(rules, no_default_rules, group_config, stale_hours))
        view = view_of(result, filter_ranked(result.drives, shown))
    warnings = silence_lines(view.as_of, view.not_reporting, stale_hours=stale_hours)
    _print_notes(view.notes)
    _print_cautions(view)
    _print_warnings(warnings)
    render_ranked(view, fmt, warnings)
    if warnings:
        raise typer.Exit(int(Exit.NOT_REPORTING))


@app.command(
    epilog="Example: triage tickets --out /srv/triage/tickets.csv --min-severity check-path --store /srv/triage/store",
)
def tickets(
    out: Path = typer.Option(..., "--out", metavar="FILE", help="Ticket CSV to write (RFC 4180); its old content is the previous night."),
    previous: Optional[Path] = typer.Option(None, "--previous", metavar="FILE", help="Previous export, if not --out itself."),
    min_severity: Optional[Tier] = MinSeverityOption,
    stale_hours: float = StaleOption,
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = NoDefaultRulesOption,
    group_config: Optional[Path] = GroupConfigOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Write one ticket row per flagged drive: new / ongoing / not-reporting / cleared against the
    previous export (cleared only when the drive reported without the flag or was removed).
    Exit: 0 nothing new, 4 new tickets, 8 something is not reporting (wins over 4), 1 failure."""
    from triage.report.tickets import summary_line
    from triage.risk.rank import silence_warnings
    from triage.risk.tickets import export_tickets

    target = open_store(store)
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    result = _rank(target, ruleset, config, None, stale_hours,
                   _inputs_record(rules, no_default_rules, group_config, stale_hours))
    warnings = silence_warnings(result, stale_hours=stale_hours)
    _print_notes(result.notes)
    try:
        _, counts = export_tickets(result.drives, out, previous, as_of=result.as_of, removed=result.removed,
                                   silent=result.silent, min_severity=min_severity.value if min_severity else None)
    except (OSError, ValueError) as exc:
        fail(str(exc), Exit.FAILURE)
    _print_warnings(warnings)
    say(summary_line(counts, out, result.as_of))
    raise typer.Exit(int(Exit.combine(Exit.NOT_REPORTING if warnings else Exit.OK,
                                      Exit.NEW_FLAGS if counts.new else Exit.OK)))


@app.command(
    epilog="Example: triage nightly --dumps /srv/captures/incoming --out /srv/triage/tickets.csv "
           "--summary /srv/triage/nightly.json --store /srv/triage/store",
)
def nightly(
    dumps: Path = typer.Option(..., "--dumps", metavar="DIR", help="Folder of capture files and removal logs to ingest."),
    out: Path = typer.Option(Path("tickets.csv"), "--out", metavar="FILE", help="Ticket CSV (read as last night's, then rewritten)."),
    summary: Optional[Path] = typer.Option(None, "--summary", metavar="FILE",
                                           help="Also write the run's outcomes as JSON (every outcome, not only the exit code's)."),
    refit_days: float = typer.Option(7.0, "--refit-days", min=0.0, metavar="DAYS", help="Refit the model when the saved one is this old."),
    min_severity: Optional[Tier] = MinSeverityOption,
    stale_hours: float = StaleOption,
    openmetrics: Optional[Path] = typer.Option(None, "--openmetrics", metavar="FILE",
                                               help="Also write the OpenMetrics file (as 'triage export')."),
    html: Optional[Path] = typer.Option(None, "--html", metavar="FILE", help="Also write the HTML page (as 'triage report')."),
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = NoDefaultRulesOption,
    group_config: Optional[Path] = GroupConfigOption,
    engine: Optional[EngineChoice] = EngineOption,
    scheduler: Optional[str] = SchedulerOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Ingest new captures, refit when due, rank, write tickets. Exit (worst outcome): 1 failure,
    5 another run holds the lock, 8 something is not reporting or stale, 3 some input quarantined,
    4 new flags, 0 nothing new; --summary FILE lists every outcome."""
    from triage.cli.common import check_output_file
    from triage.cli.export import write_views
    from triage.risk.nightly import run_nightly
    from triage.risk.rank import rank_store
    from triage.store.dataset import StoreLocked

    check_output_file(openmetrics, (), "--openmetrics")
    check_output_file(html, (".html", ".htm"), "--html")
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    # the engine before the store: a scheduler that cannot be reached stops the run with nothing written
    with open_engine_options(engine, scheduler) as runner:
        target = open_store(store)
        try:
            inputs = _inputs_record(rules, no_default_rules, group_config, stale_hours)
            report = run_nightly(target, dumps, out, ruleset, refit_days=refit_days, config=config,
                                 rank=partial(rank_store, reuse=True, inputs=inputs),
                                 log=lambda line: say(line), stale_hours=stale_hours,
                                 min_severity=min_severity.value if min_severity else None,
                                 ingest_engine=runner, fit_engine=pool_only_if_asked(runner, engine))
            if summary is not None:
                report.write_summary(summary)
        except StoreLocked as exc:
            fail(f"{exc}; this run did nothing", Exit.LOCKED)
        except (FileNotFoundError, ValueError) as exc:
            fail(str(exc), Exit.USAGE)
        except OSError as exc:  # a full disk, a folder we may not write
            fail(os_failure(exc), Exit.FAILURE)
        except Exception as exc:  # cron must see one clear line and FAILURE, not a traceback
            fail(f"nightly run failed: {type(exc).__name__}: {exc}", Exit.FAILURE)
    try:
        write_views(target, ruleset, config, openmetrics=openmetrics, html=html, ranking=report.result)
    except typer.Exit:
        raise
    except Exception as exc:  # the tickets are written; the extra views failing is still a failed run
        fail(f"nightly views failed: {type(exc).__name__}: {exc}", Exit.FAILURE)
    say(report.summary())
    raise typer.Exit(int(report.exit))
