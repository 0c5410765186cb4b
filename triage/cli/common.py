"""Shared pieces of the command line: the Typer app, the options every group uses, the one-line failure."""

from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import TYPE_CHECKING, Optional

import typer
from typer.core import TyperArgument

from triage import __version__
from triage.exitcodes import Exit
from triage.safety import visible
from triage.risk.score import TIERS

if TYPE_CHECKING:
    from triage.store.dataset import Store

# Typer prints a positional argument's Python annotation (e.g. "<list[Path]>") beside its name in
# --help; the metavar we give each argument already says what to pass, so leave the type out.
TyperArgument.display_type_rich = lambda self, ctx: None

app = typer.Typer(
    name="triage",
    help="Fleet drive-health triage: ingest health captures, estimate risk, rank drives to replace.",
    no_args_is_help=True,
    add_completion=False,
    rich_markup_mode=None,
)


class OutputFormat(str, Enum):
    """``--format`` of every command that prints a table: declared once, validated and listed by Typer."""

    table = "table"
    csv = "csv"
    json = "json"


def format_option(what: str = "") -> OutputFormat:
    """The one ``--format`` option; ``what`` names what the format applies to, for --help."""
    return typer.Option(
        OutputFormat.table, "--format", case_sensitive=False,
        help="Output: a table for people, CSV (RFC 4180) or JSON" + (f" ({what})." if what else "."),
    )


#: Action tiers as --severity / --min-severity choices, from the one list in triage.risk.score.
Tier = Enum("Tier", {name.replace("-", "_"): name for name in TIERS}, type=str)

StoreOption = typer.Option(
    None,
    "--store",
    metavar="DIR",
    help="Store directory (default: $TRIAGE_STORE, then 'store' in triage.toml, then ./triage-store).",
)


StaleOption = typer.Option(
    36.0, "--stale-hours", min=1.0, metavar="HOURS",
    help="Warn when the newest capture is older than this (rank, tickets and nightly also exit 8, and "
         "call drives silent this long against the newest capture 'not reporting').")


class EngineChoice(str, Enum):
    """``--engine`` of the commands whose map steps can run elsewhere (triage/engine.py)."""

    local = "local"
    dask = "dask"


EngineOption = typer.Option(
    None, "--engine", case_sensitive=False,
    help="Where the map steps run: this machine's cores, or a Dask cluster (needs the 'dask' extra). "
         "Default: dask when a scheduler is named, else local.")
SchedulerOption = typer.Option(
    None, "--scheduler", metavar="ADDRESS",
    help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 (default: $TRIAGE_SCHEDULER; with --engine dask "
         "and neither, a cluster of local processes). Workers must see the store and inputs at the same paths.")


def open_engine_options(engine: Optional[EngineChoice], scheduler: Optional[str]):
    """The engine the options ask for, or one line and FAILURE (nothing has been written yet)."""
    from triage.engine import EngineError, open_engine

    try:
        return open_engine(engine.value if engine else None, scheduler)
    except EngineError as exc:
        fail(str(exc), Exit.FAILURE)


def pool_only_if_asked(runner, engine: Optional[EngineChoice]):
    """``runner``, or None (the command's own process) when no --engine was given and no
    scheduler named: for ``fit`` and ``backtest`` a pool of local processes pays for itself
    only on idle cores (docs/scale.md), so by default they run as before, in one process."""
    from triage.engine import LocalEngine

    return None if engine is None and isinstance(runner, LocalEngine) else runner


def engine_text(runner) -> str:
    """Where the map steps run, for stderr."""
    return "this process" if runner is None else runner.describe()


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


def open_store(option: Optional[Path], *, create: bool = False) -> "Store":
    """The store the --store option names, brought up to the current format (docs/store.md).

    Only ``ingest`` passes ``create=True``: for every other command a store that does not exist
    is one line and FAILURE, so a typo never reads as an empty, healthy fleet.
    """
    from triage.config import resolve_store
    from triage.store.dataset import Store, StoreFormatError, StoreLocked, StoreMissing

    try:
        root = resolve_store(option)
    except ValueError as exc:  # an unreadable triage.toml
        fail(str(exc), Exit.USAGE)
    try:
        store = Store(root) if create else Store.existing(root)
    except StoreMissing as exc:
        fail(str(exc), Exit.FAILURE)
    try:
        store.upgrade()
    except StoreLocked as exc:
        fail(f"{exc}; an older store is converted only under the writer lock", Exit.LOCKED)
    except (StoreFormatError, OSError) as exc:
        fail(str(exc), Exit.FAILURE)
    return store


def say(line: object) -> None:
    """One line on stderr, through the one sanitiser (file names and input text included)."""
    typer.echo(visible(line), err=True)


def os_failure(exc: OSError) -> str:
    """One line for a failed read or write (full disk, permissions): what, where, and that
    committed data is whole (a commit becomes visible only when complete)."""
    where = f"{exc.filename}: " if exc.filename else ""
    return f"{where}{exc.strerror or exc}; nothing half-written is visible, rerun once this is fixed"


def fail(message: str, code: Exit = Exit.FAILURE) -> None:
    """One clear line on stderr, then exit with ``code``."""
    say(f"triage: {message}")
    raise typer.Exit(int(code))


def check_output_file(path: Path | None, suffixes: tuple[str, ...], option: str) -> None:
    """An output file's folder must exist (never created silently) and its suffix be one we write."""
    if path is None:
        return
    if suffixes and path.suffix.lower() not in suffixes:
        fail(f"{path}: {option} must name a {' or '.join(suffixes)} file", Exit.USAGE)
    folder = path.absolute().parent
    if not folder.is_dir():
        fail(f"{path}: {option} folder {folder} does not exist (create it first)", Exit.USAGE)
