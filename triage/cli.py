"""The ``triage`` command line: thin wiring over the library.

Every command calls one library function and hands its result to a renderer in
``triage.report``. Data goes to stdout; logs and progress go to stderr. Exit codes live in
``triage.exitcodes``.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

import typer

from triage import __version__
from triage.config import resolve_store
from triage.exitcodes import Exit

app = typer.Typer(
    name="triage",
    help="Fleet drive-health triage: ingest health captures, estimate risk, rank drives to replace.",
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,
)

StoreOption = typer.Option(
    None,
    "--store",
    help="Store directory (default: $TRIAGE_STORE, then 'store' in triage.toml, then ./triage-store).",
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"triage {__version__}")
        raise typer.Exit(0)


@app.callback()
def _root(
    version: bool = typer.Option(
        False, "--version", callback=_version, is_eager=True, help="Print the version and exit."
    ),
) -> None:
    """Fleet drive-health triage."""


def fail(message: str, code: Exit = Exit.FAILURE) -> None:
    """One clear line on stderr, then exit with ``code``."""
    typer.echo(f"triage: {message}", err=True)
    raise typer.Exit(int(code))


# -- commands ---------------------------------------------------------------------------------
# Helpers add their commands above the end marker below, each as one block.

@app.command(
    epilog="Example: triage ingest /srv/captures/2026-11-30 --store /srv/triage/store",
)
def ingest(
    paths: list[Path] = typer.Argument(..., help="Capture files (.jsonl, .jsonl.gz), removal logs (.csv), or folders of them."),
    store: Optional[Path] = StoreOption,
) -> None:
    """Store capture files and removal logs; bad lines go to quarantine with a reason."""
    from triage.ingest import ingest_paths
    from triage.report.console import progress_bar
    from triage.store.dataset import Store, StoreLocked

    target = Store(resolve_store(store))
    try:
        with target.lock(), progress_bar("ingesting files") as progress:
            report = ingest_paths(target, paths, progress=progress)
    except (FileNotFoundError, ValueError) as exc:
        fail(str(exc), Exit.USAGE)
    except StoreLocked as exc:
        fail(str(exc), Exit.LOCKED)
    for rejected in report.rejected[:20]:
        typer.echo(f"rejected: {rejected}", err=True)
    if len(report.rejected) > 20:
        typer.echo(f"rejected: ... {len(report.rejected) - 20} more in {target.quarantine_dir}", err=True)
    stored = ", ".join(f"{n} {t}" for t, n in sorted(report.stored.items())) or "nothing new"
    typer.echo(
        f"ingest: {report.files_read} file(s) read, {report.files_skipped} already stored; "
        f"stored {stored}; {len(report.rejected)} line(s) quarantined",
        err=True,
    )
    if report.rejected:
        raise typer.Exit(int(Exit.INPUT_REJECTED))

@app.command(
    epilog="Example: triage demo --seed 7 --drives 1200 --days 120 --work demo-work --top 15",
)
def demo(
    seed: int = typer.Option(7, help="Seed of the invented fleet; the same seed gives the same files."),
    drives: int = typer.Option(1200, min=10, help="Drives in the fleet."),
    days: int = typer.Option(120, min=2, help="Nightly captures per drive."),
    work: Path = typer.Option(Path("demo-work"), help="Folder for the capture files, the store and the tickets."),
    top: int = typer.Option(15, "--top", min=1, help="Drives shown in the closing ranked report."),
    fmt: str = typer.Option("table", "--format", help="table | csv | json (the ranked report)."),
) -> None:
    """Run the whole pipeline on an invented fleet: generate its capture files, ingest them, fit the
    model, rank the drives, write tickets; ends with the ranked report."""
    from triage.demo import FleetSpec, NotADemoFolder, generate_fleet, prepare_demo_folder, write_captures
    from triage.ingest import ingest_paths
    from triage.report.console import progress_bar
    from triage.report.rank import render_ranked
    from triage.risk.nightly import run_nightly
    from triage.risk.rank import filter_ranked
    from triage.store.dataset import Store

    if fmt not in ("table", "csv", "json"):
        fail(f"--format must be table, csv or json, not {fmt!r}", Exit.USAGE)
    spec = FleetSpec(seed=seed, n_drives=drives, days=days)
    try:
        folder, reused = prepare_demo_folder(work, spec)
    except NotADemoFolder as exc:
        fail(str(exc), Exit.USAGE)
    typer.echo(f"demo: simulating {drives} drives x {days} nights (seed {seed}) into {work}"
               + (" (same fleet as last time: the store is reused)" if reused else ""), err=True)
    fleet = generate_fleet(spec)
    with progress_bar("writing captures") as progress:
        write_captures(fleet, folder.captures, progress=progress)
    ruleset, config = _risk_inputs(None, False, None)
    with progress_bar("ingesting") as progress:
        report = run_nightly(
            Store(folder.store), folder.captures, folder.tickets, ruleset, refit_days=0.0, config=config,
            ingest=lambda store, paths: ingest_paths(store, paths, progress=progress),
            log=lambda line: typer.echo(f"demo: {line}", err=True))
    typer.echo(report.summary(), err=True)
    result = report.result
    _print_cautions(result)
    render_ranked(filter_ranked(result.drives, flagged_only=True, top=top), fmt, result.horizon_days)
    typer.echo(f"demo: tickets in {folder.tickets}; explore with: triage cohorts --store {folder.store}, "
               f"triage survival <cohort> --store {folder.store}, triage rank --store {folder.store}", err=True)
    if report.rejected:
        raise typer.Exit(int(Exit.INPUT_REJECTED))


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
    from triage.store.dataset import Store

    if fmt not in ("table", "csv", "json"):
        fail(f"--format must be table, csv or json, not {fmt!r}", Exit.USAGE)
    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    result = rank_store(Store(resolve_store(store)), ruleset, config=config)
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
    from triage.store.dataset import Store

    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    result = rank_store(Store(resolve_store(store)), ruleset, config=config)
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
    from triage.store.dataset import Store, StoreLocked

    ruleset, config = _risk_inputs(rules, no_default_rules, group_config)
    target = Store(resolve_store(store))
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


# -- rules: check and list rule files (triage/rules, docs/rules.md) ----------------------------
rules_app = typer.Typer(
    help="Rule files: check them, list the rules in effect (docs/rules.md).",
    no_args_is_help=True,
    rich_markup_mode=None,
)
app.add_typer(rules_app, name="rules")


def _load_ruleset(dirs: Optional[list[Path]], no_default_rules: bool):
    from triage.rules import load_rules, resolve_rules_dirs

    try:
        site_dirs = resolve_rules_dirs(dirs)
    except ValueError as exc:  # an unreadable triage.toml
        fail(str(exc), Exit.USAGE)
    return load_rules(site_dirs, include_defaults=not no_default_rules)


@rules_app.command("check", epilog="Example: triage rules check /etc/triage/rules")
def rules_check(
    dirs: Optional[list[Path]] = typer.Argument(
        None, help="Site rule folders or files (default: $TRIAGE_RULES, then 'rules' in triage.toml, then ./rules)."
    ),
    no_default_rules: bool = typer.Option(False, "--no-default-rules", help="Check without the packaged defaults."),
) -> None:
    """Validate rule files: one 'file:line: message' per problem on stdout; exit 1 if there is any."""
    ruleset = _load_ruleset(dirs, no_default_rules)
    for error in ruleset.errors:
        typer.echo(str(error))
    disabled = len(ruleset.all_rules) - len(ruleset.rules)
    if ruleset.errors:
        fail(f"{len(ruleset.errors)} error(s) in rule files; those rules are not loaded, "
             f"{len(ruleset.rules)} others are", Exit.FAILURE)
    typer.echo(f"{len(ruleset.rules)} rules OK" + (f", {disabled} disabled" if disabled else ""))


@rules_app.command("list", epilog="Example: triage rules list --dir /etc/triage/rules --format csv")
def rules_list(
    dirs: Optional[list[Path]] = typer.Option(
        None, "--dir", "--rules",
        help="Site rule folder or file (repeatable; default: $TRIAGE_RULES, then 'rules' in triage.toml, then ./rules).",
    ),
    no_default_rules: bool = typer.Option(False, "--no-default-rules", help="Leave out the packaged defaults."),
    fmt: str = typer.Option("table", "--format", help="table | csv | json"),
) -> None:
    """Show the rules in effect: defaults, site rules, overrides and disabled ones."""
    import csv
    import json

    from rich.markup import escape
    from rich.table import Table

    from triage.report.console import stdout_console
    from triage.rules import rules_table

    if fmt not in ("table", "csv", "json"):
        fail(f"--format must be table, csv or json, not {fmt!r}", Exit.USAGE)
    ruleset = _load_ruleset(dirs, no_default_rules)
    for error in ruleset.errors:
        typer.echo(f"rule error (not loaded): {error}", err=True)
    table = rules_table(ruleset)
    if fmt == "csv":
        writer = csv.writer(sys.stdout, lineterminator="\r\n")  # RFC 4180 line ends
        writer.writerow(table.columns)
        writer.writerows(table.itertuples(index=False))
    elif fmt == "json":
        typer.echo(json.dumps(table.to_dict(orient="records"), indent=2))
    else:
        console = stdout_console()
        # narrow terminals get the title under the id; the sources are in --format csv/json
        wide = console.width >= 140
        shown = Table(show_lines=False)
        shown.add_column("id" if wide else "id / title", overflow="fold", ratio=2)
        for column in ("severity", "category", "status"):
            shown.add_column(column, no_wrap=True)
        if wide:
            shown.add_column("title", overflow="fold", ratio=2)
            shown.add_column("source", overflow="fold", ratio=3)
        for row in table.itertuples(index=False):
            cells = [escape(str(getattr(row, c))) for c in ("id", "severity", "category", "status", "title", "source")]
            if wide:
                shown.add_row(*cells)
            else:
                shown.add_row(f"{cells[0]}\n[dim]{cells[4]}[/dim]", *cells[1:4])
        console.print(shown)
    if ruleset.errors:
        raise typer.Exit(int(Exit.FAILURE))


# -- capture: read this host's drives into one capture file (triage/capture, docs/capture.md) ---
@app.command(
    epilog="Example: triage capture --out /var/lib/triage/captures --group-map /etc/triage/slots.csv",
)
def capture(
    devices: Optional[list[str]] = typer.Argument(
        None, help="Device nodes to read, e.g. /dev/sda /dev/nvme0 (default: every local SATA and NVMe drive in sysfs)."
    ),
    out: Path = typer.Option(Path("."), "--out", help="Existing folder for <host>-<YYYY-MM-DD>.jsonl.gz."),
    group_map: Optional[Path] = typer.Option(
        None, "--group-map", help="CSV key,slot,group: drive serial or wwn:<16 hex> -> slot and redundancy group."
    ),
) -> None:
    """Read IDENTIFY and SMART / health data from this host's drives (read-only; needs root) into one
    capture file. Exit: 0 all read, 6 some drives could not be read (the rest were written), 7 not root."""
    from triage.capture import (
        GroupMapError,
        NeedsRoot,
        OutputError,
        capture_host,
        enumerate_targets,
        load_group_map,
        require_root,
        targets_for,
    )

    try:
        require_root()
    except NeedsRoot as exc:
        fail(str(exc), Exit.NEEDS_ROOT)
    if not out.is_dir():
        fail(f"--out {out}: no such directory", Exit.USAGE)
    placements = None
    if group_map is not None:
        try:
            placements = load_group_map(group_map)
        except GroupMapError as exc:
            fail(str(exc), Exit.FAILURE)
    if devices:
        try:
            targets = targets_for(devices)
        except ValueError as exc:
            fail(str(exc), Exit.USAGE)
    else:
        targets, skipped = enumerate_targets()
        for item in skipped:
            typer.echo(f"capture: left out {item.path}: {item.reason}", err=True)
        if not targets:
            fail("no local SATA or NVMe drive found under /sys/block and /sys/class/nvme; "
                 "name the devices on the command line", Exit.FAILURE)
    try:
        result = capture_host(targets, out, placements)
    except NeedsRoot as exc:
        fail(str(exc), Exit.NEEDS_ROOT)
    except (OutputError, FileNotFoundError, ValueError) as exc:
        fail(str(exc), Exit.FAILURE)
    for failure in result.failures:
        typer.echo(f"triage: capture: {failure.describe()}", err=True)
    for warning in result.warnings:
        typer.echo(f"capture: warning: {warning}", err=True)
    if result.path is None:
        typer.echo(f"capture: none of {len(targets)} drive(s) could be read; no file written", err=True)
    else:
        typer.echo(str(result.path))
        typer.echo(f"capture: {len(result.captured)} of {len(targets)} drive(s) written to {result.path}", err=True)
    raise typer.Exit(int(result.exit_code))


# -- survival: fit, cohorts, survival (triage/survival, triage/report/survival.py, docs/survival.md) --
ByOption = typer.Option("model", "--by", help="Cohort keys, comma-separated, among model, firmware, bus, capacity_bytes.")
ProactiveOption = typer.Option(
    True, "--count-proactive/--proactive-censored",
    help="Count drives pulled on a warning ('proactive') as failures (default), or as censored.")
MttfOption = typer.Option(None, "--mttf", min=1.0, help="Datasheet MTTF in hours: show the AFR it implies.")


def _survival_call(function, *args, **kwargs):
    """Run a survival-layer function; its known errors become one line and the right exit code."""
    from triage.survival.cohorts import UnknownCohort
    from triage.survival.cox import CoxFitError
    from triage.survival.run import EmptyStore

    try:
        return function(*args, **kwargs)
    except (EmptyStore, CoxFitError) as exc:
        fail(str(exc), Exit.FAILURE)
    except UnknownCohort as exc:
        fail(str(exc), Exit.USAGE)
    except ValueError as exc:  # bad --by and other option values
        fail(str(exc), Exit.USAGE)
    except OSError as exc:
        fail(str(exc), Exit.FAILURE)


def _survival_notes(exclusions) -> None:
    from triage.report.survival import exclusion_lines

    for line in exclusion_lines(exclusions):
        typer.echo(line, err=True)


@app.command(epilog="Example: triage fit --horizon-days 30 --by model --store /srv/triage/store")
def fit(
    horizon_days: float = typer.Option(30.0, "--horizon-days", min=1.0, help="Predict failure within this many days."),
    by: str = ByOption,
    count_proactive: bool = ProactiveOption,
    fmt: str = typer.Option("table", "--format", help="table | json (summary of the fitted model)."),
    store: Optional[Path] = StoreOption,
) -> None:
    """Fit the fleet risk model (AFR, Weibull, stratified Cox) and save it under <store>/models."""
    from triage.report.console import progress_bar
    from triage.report.survival import render_fit
    from triage.store.dataset import Store
    from triage.survival.run import fit_store

    if fmt not in ("table", "json"):
        fail(f"--format must be table or json, not {fmt!r}", Exit.USAGE)
    target = Store(resolve_store(store))
    with progress_bar("reading snapshots") as update:
        model, path = _survival_call(fit_store, target, horizon_days=horizon_days, by=by,
                                     count_proactive=count_proactive,
                                     say=lambda message: typer.echo(f"fit: {message}", err=True), progress=update)
    _survival_notes(model.exclusions_)
    render_fit(model, path, fmt)


@app.command(epilog="Example: triage cohorts --by model,firmware --format csv --mttf 2500000")
def cohorts(
    by: str = ByOption,
    fmt: str = typer.Option("table", "--format", help="table | csv | json"),
    mttf: Optional[float] = MttfOption,
    count_proactive: bool = ProactiveOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """One row per cohort: drives, drive-days, failures, AFR with exact 95 % limits, Weibull shape and phase."""
    from triage.report.console import progress_bar
    from triage.report.survival import render_cohorts
    from triage.store.dataset import Store
    from triage.survival.run import cohorts_of_store

    if fmt not in ("table", "csv", "json"):
        fail(f"--format must be table, csv or json, not {fmt!r}", Exit.USAGE)
    with progress_bar("reading snapshots") as update:
        table, obs = _survival_call(cohorts_of_store, Store(resolve_store(store)), by=by,
                                    count_proactive=count_proactive, mttf_hours=mttf, progress=update)
    _survival_notes(obs.exclusions)
    render_cohorts(table, fmt)


@app.command(epilog="Example: triage survival 'QH-HD8T-A' --plot qh-hd8t-a.png --mttf 2500000")
def survival(
    cohort: str = typer.Argument(..., help="Cohort label as 'triage cohorts' prints it (same --by)."),
    by: str = ByOption,
    fmt: str = typer.Option("table", "--format", help="table | json"),
    plot: Optional[Path] = typer.Option(None, "--plot", help="Also draw Kaplan-Meier with band and Weibull fit (.png or .svg)."),
    mttf: Optional[float] = MttfOption,
    count_proactive: bool = ProactiveOption,
    store: Optional[Path] = StoreOption,
) -> None:
    """Survival and cumulative hazard by age (delayed entry), hazard by age band, Weibull fit of one cohort."""
    from triage.report.console import progress_bar
    from triage.report.survival import plot_survival, render_survival
    from triage.store.dataset import Store
    from triage.survival.run import survival_of_store

    if fmt not in ("table", "json"):
        fail(f"--format must be table or json, not {fmt!r}", Exit.USAGE)
    if plot is not None and plot.suffix.lower() not in (".png", ".svg"):
        fail(f"{plot}: --plot must name a .png or .svg file", Exit.USAGE)
    with progress_bar("reading snapshots") as update:
        report, obs = _survival_call(survival_of_store, Store(resolve_store(store)), cohort, by=by,
                                     count_proactive=count_proactive, mttf_hours=mttf, progress=update)
    _survival_notes(obs.exclusions)
    render_survival(report, fmt)
    if plot is not None:
        _survival_call(plot_survival, report, plot)
        typer.echo(f"survival: plot written to {plot}", err=True)


# -- end of commands --------------------------------------------------------------------------


def main() -> None:
    app()


if __name__ == "__main__":
    sys.exit(main())
