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
    epilog="Example: triage demo --seed 7 --drives 1200 --days 120 --work demo-work",
)
def demo(
    seed: int = typer.Option(7, help="Seed of the invented fleet; the same seed gives the same files."),
    drives: int = typer.Option(1200, min=10, help="Drives in the fleet."),
    days: int = typer.Option(120, min=2, help="Nightly captures per drive."),
    work: Path = typer.Option(Path("demo-work"), help="Folder for the capture files and the store."),
) -> None:
    """Generate an invented fleet's capture files and ingest them into <work>/store."""
    from triage.demo import FleetSpec, generate_fleet, write_captures
    from triage.ingest import ingest_paths
    from triage.report.console import progress_bar
    from triage.store.dataset import Store

    typer.echo(f"demo: simulating {drives} drives x {days} nights (seed {seed})", err=True)
    fleet = generate_fleet(FleetSpec(seed=seed, n_drives=drives, days=days))
    with progress_bar("writing captures") as progress:
        files = write_captures(fleet, work / "captures", progress=progress)
    store = Store(work / "store")
    with store.lock(), progress_bar("ingesting") as progress:
        report = ingest_paths(store, files, progress=progress)
    typer.echo(
        f"demo: {len(files)} files, {report.stored.get('snapshots', 0)} captures and "
        f"{report.stored.get('removals', 0)} removals stored in {store.root}",
        err=True,
    )
    if report.rejected:
        raise typer.Exit(int(Exit.INPUT_REJECTED))


# -- end of commands --------------------------------------------------------------------------


def main() -> None:
    app()


if __name__ == "__main__":
    sys.exit(main())
