"""Shared pieces of the command line: the Typer app, the --store option and the one-line failure."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import typer

from triage import __version__
from triage.exitcodes import Exit

if TYPE_CHECKING:
    from triage.store.dataset import Store

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


def open_store(option: Path | None) -> "Store":
    """The store the --store option names, brought up to the current format (docs/store.md)."""
    from triage.config import resolve_store
    from triage.store.dataset import Store, StoreFormatError, StoreLocked

    store = Store(resolve_store(option))
    try:
        store.upgrade()
    except StoreLocked as exc:
        fail(f"{exc}; an older store is converted only under the writer lock", Exit.LOCKED)
    except (StoreFormatError, OSError) as exc:
        fail(str(exc), Exit.FAILURE)
    return store


def fail(message: str, code: Exit = Exit.FAILURE) -> None:
    """One clear line on stderr, then exit with ``code``."""
    typer.echo(f"triage: {message}", err=True)
    raise typer.Exit(int(code))
