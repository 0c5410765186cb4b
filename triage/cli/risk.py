"""``triage rank``, ``triage tickets`` and ``triage nightly``: who to pull first."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import StoreOption, app, fail, open_store
from triage.exitcodes import Exit


def _print_cautions(result) -> None:
    """Degraded groups, on stderr: advice that could cost data defers to the site's procedure."""
    from triage.risk.score import DEGRADED_CAUTION  # the same words as each member's action

    groups = result.groups
    if not len(groups):
        return
    for row in groups[groups["degraded"]].itertuples(index=False):
        typer.echo(f"caution: {DEGRADED_CAUTION.format(group=row.group, lost=row.lost)}", err=True)


# -- risk: rank, tickets, nightly (triage/risk, triage/report/rank.py, triage/report/tickets.py) --
RulesOption = typer.Option(None, "--rules", help="Rule folder (repeatable); groups.toml is read from the first that has one.")


def _risk_inputs(rules: Optional[list[Path]], no_default_rules: bool, group_config: Optional[Path]):
    """Load the rule set and group configuration, or fail with one clear line."""
    from triage.risk.groups import GroupConfig

    try:
        from triage.rules import load_rules
    except ImportError as exc:
        fail(f"the rules layer is not available: {exc}", Exit.FAILURE)
    dirs = list(rules or [])
    ruleset = load_rules(dirs, include_defaults=not no_default_rules)
    errors = list(getattr(ruleset, "errors", []) or [])
    if errors:
        fail(f"rule error: {errors[0]}" + (f" (and {len(errors) - 1} more)" if len(errors) > 1 else ""), Exit.USAGE)
    try:
        config = GroupConfig.find(dirs, group_config)
    except (OSError, ValueError) as exc:
        fail(str(exc), Exit.USAGE)
    return ruleset, config


@app.command(
    epilog="Example: triage rank --top 20 --site ash --severity replace-now --format table",
)
def rank(
    top: int = typer.Option(25, "--top", min=1, help="Show this many drives."),
    host: Optional[list[str]] = typer.Option(None, "--host", help="Host name pattern (fnmatch, repeatable)."),
    site: Optional[list[str]] = typer.Option(None, "--site", help="Site pattern: host name up to its first '-' (repeatable)."),
    group: Optional[list[str]] = typer.Option(None, "--group", help="Redundancy group pattern (repeatable)."),
    severity: Optional[list[str]] = typer.Option(None, "--severity", help="replace-now | replace-soon | watch | check-path (repeatable)."),
    fmt: str = typer.Option("table", "--format", help="table | csv | json"),
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = typer.Option(False, "--no-default-rules", help="Use only the rule folders given."),
    group_config: Optional[Path] = typer.Option(None, "--group-config", help="Group tolerance file (groups.toml format)."),
    store: Optional[Path] = StoreOption,
) -> None:
    """Rank drives for proactive replacement: rule severity, P(fail) and redundancy groups."""
    from triage.report.rank import render_ranked
    from triage.risk.rank import filter_ranked, rank_store

    if fmt not in ("table", "csv", "json"):
        fail(f"--format must be table, csv or json, not {fmt!r}", Exit.USAGE)
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    result = rank_store(open_store(store), ruleset, config=config)
    for note in result.notes:
        typer.echo(f"note: {note}", err=True)
    try:
        shown = filter_ranked(result.drives, host=host or (), site=site or (), group=group or (),
                              severity=severity or (), top=top)
    except ValueError as exc:
        fail(str(exc), Exit.USAGE)
    _print_cautions(result)
    render_ranked(shown, fmt, result.horizon_days)


@app.command(
    epilog="Example: triage tickets --out /srv/triage/tickets.csv --store /srv/triage/store",
)
def tickets(
    out: Path = typer.Option(..., "--out", help="Ticket CSV to write (RFC 4180); its old content is the previous night."),
    previous: Optional[Path] = typer.Option(None, "--previous", help="Previous export, if not --out itself."),
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = typer.Option(False, "--no-default-rules", help="Use only the rule folders given."),
    group_config: Optional[Path] = typer.Option(None, "--group-config", help="Group tolerance file (groups.toml format)."),
    store: Optional[Path] = StoreOption,
) -> None:
    """Write one ticket row per flagged drive, marked new / ongoing / cleared against the previous export."""
    from triage.report.tickets import summary_line
    from triage.risk.rank import rank_store
    from triage.risk.tickets import export_tickets

    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    result = rank_store(open_store(store), ruleset, config=config)
    for note in result.notes:
        typer.echo(f"note: {note}", err=True)
    try:
        _, counts = export_tickets(result.drives, out, previous, as_of=result.as_of)
    except (OSError, ValueError) as exc:
        fail(str(exc), Exit.FAILURE)
    typer.echo(summary_line(counts, out), err=True)
    if counts.new:
        raise typer.Exit(int(Exit.NEW_FLAGS))


@app.command(
    epilog="Example: triage nightly --dumps /srv/captures/incoming --out /srv/triage/tickets.csv --store /srv/triage/store",
)
def nightly(
    dumps: Path = typer.Option(..., "--dumps", help="Folder of capture files and removal logs to ingest."),
    out: Path = typer.Option(Path("tickets.csv"), "--out", help="Ticket CSV (read as last night's, then rewritten)."),
    refit_days: float = typer.Option(7.0, "--refit-days", min=0.0, help="Refit the model when the saved one is this old."),
    rules: Optional[list[Path]] = RulesOption,
    no_default_rules: bool = typer.Option(False, "--no-default-rules", help="Use only the rule folders given."),
    group_config: Optional[Path] = typer.Option(None, "--group-config", help="Group tolerance file (groups.toml format)."),
    store: Optional[Path] = StoreOption,
) -> None:
    """Ingest new captures, refit when due, rank, write tickets. Exit: 0 nothing new, 4 new flags,
    3 some input rejected, 5 another run holds the lock, 1 failure."""
    from triage.risk.nightly import run_nightly
    from triage.store.dataset import StoreLocked

    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    target = open_store(store)
    try:
        report = run_nightly(target, dumps, out, ruleset, refit_days=refit_days, config=config,
                             log=lambda line: typer.echo(line, err=True))
    except StoreLocked as exc:
        fail(f"{exc}; this run did nothing", Exit.LOCKED)
    except (FileNotFoundError, ValueError) as exc:
        fail(str(exc), Exit.USAGE)
    except Exception as exc:  # cron must see one clear line and FAILURE, not a traceback
        fail(f"nightly run failed: {type(exc).__name__}: {exc}", Exit.FAILURE)
    typer.echo(report.summary(), err=True)
    raise typer.Exit(int(report.exit))
