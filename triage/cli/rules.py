"""``triage rules check|list``: rule files."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import OutputFormat, app, fail, format_option, say
from triage.exitcodes import Exit
from triage.safety import visible


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
        None, metavar="DIR", help="Site rule folders or files (default: $TRIAGE_RULES, then 'rules' in triage.toml, then ./rules)."
    ),
    no_default_rules: bool = typer.Option(False, "--no-default-rules", help="Check without the packaged defaults."),
) -> None:
    """Validate rule files: one 'file:line: message' per problem on stdout; exit 1 if there is any."""
    ruleset = _load_ruleset(dirs, no_default_rules)
    for error in ruleset.errors:
        typer.echo(visible(error))
    disabled = len(ruleset.all_rules) - len(ruleset.rules)
    if ruleset.errors:
        fail(f"{len(ruleset.errors)} error(s) in rule files; those rules are not loaded, "
             f"{len(ruleset.rules)} others are", Exit.FAILURE)
    typer.echo(f"{len(ruleset.rules)} rules OK" + (f", {disabled} disabled" if disabled else ""))


@rules_app.command("list", epilog="Example: triage rules list --dir /etc/triage/rules --format csv")
def rules_list(
    dirs: Optional[list[Path]] = typer.Option(
        None, "--dir", "--rules", metavar="DIR",
        help="Site rule folder or file (repeatable; default: $TRIAGE_RULES, then 'rules' in triage.toml, then ./rules).",
    ),
    no_default_rules: bool = typer.Option(False, "--no-default-rules", help="Leave out the packaged defaults."),
    fmt: OutputFormat = format_option(),
) -> None:
    """Show the rules in effect: defaults, site rules, overrides and disabled ones."""
    import csv
    import json

    from rich.table import Table

    from triage.report.console import markup_text, stdout_console
    from triage.safety import cell
    from triage.rules import rules_table

    ruleset = _load_ruleset(dirs, no_default_rules)
    for error in ruleset.errors:
        say(f"rule error (not loaded): {error}")
    table = rules_table(ruleset)
    if fmt is OutputFormat.csv:
        writer = csv.writer(sys.stdout, lineterminator="\r\n")  # RFC 4180 line ends
        writer.writerow(table.columns)
        writer.writerows([cell(value) for value in row] for row in table.itertuples(index=False))
    elif fmt is OutputFormat.json:
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
            cells = [markup_text(getattr(row, c)) for c in ("id", "severity", "category", "status", "title", "source")]
            if wide:
                shown.add_row(*cells)
            else:
                shown.add_row(f"{cells[0]}\n[dim]{cells[4]}[/dim]", *cells[1:4])
        console.print(shown)
    if ruleset.errors:
        raise typer.Exit(int(Exit.FAILURE))
