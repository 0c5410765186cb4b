"""Shared pieces of the command line: the Typer app, the --store option and the one-line failure."""

from __future__ import annotations

import typer

from triage import __version__
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
