"""``triage ingest``, ``triage capture`` and ``triage demo``: getting captures into the store."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from triage.cli.common import (
    EngineChoice,
    EngineOption,
    OutputFormat,
    SchedulerOption,
    StoreOption,
    app,
    fail,
    format_option,
    open_engine_options,
    open_store,
    os_failure,
    say,
)
from triage.cli.risk import _print_cautions, _risk_inputs
from triage.exitcodes import Exit
from triage.safety import visible


@app.command(
    epilog="Example: triage ingest /srv/captures/2026-11-30 --store /srv/triage/store "
           "--scheduler tcp://10.0.0.5:8786",
)
def ingest(
    paths: list[Path] = typer.Argument(..., metavar="INPUT", help="Capture files (.jsonl, .jsonl.gz), removal logs (.csv), or folders of them."),
    store: Optional[Path] = StoreOption,
    engine: Optional[EngineChoice] = EngineOption,
    scheduler: Optional[str] = SchedulerOption,
) -> None:
    """Store capture files and removal logs; bad lines go to quarantine with a reason. Files are
    decoded on this machine's cores or on a Dask cluster; only this process writes the store.
    In a store ranked before, then ranks ahead with the last ranking's rules and options, so that
    the next 'triage rank' reads the result instead of computing it."""
    from triage.engine import EngineError
    from triage.ingest import ingest_paths
    from triage.ingest.captures import InputNotVisible
    from triage.report.console import progress_bar
    from triage.store.dataset import StoreLocked

    from triage.ingest.run import check_named_inputs

    try:  # a mistyped path stops the run before a store is created for it
        check_named_inputs(paths)
    except (FileNotFoundError, ValueError) as exc:
        fail(str(exc), Exit.USAGE)
    # the engine next: a scheduler that cannot be reached stops the run before the store is touched
    runner = open_engine_options(engine, scheduler)
    try:
        target = open_store(store, create=True)  # the one command that may create a store
        with target.lock(), progress_bar("ingesting", in_bytes=True) as progress:
            report = ingest_paths(target, paths, progress=progress, engine=runner)
    except (FileNotFoundError, ValueError) as exc:
        fail(str(exc), Exit.USAGE)
    except StoreLocked as exc:
        fail(str(exc), Exit.LOCKED)
    except (EngineError, InputNotVisible) as exc:  # commits made before stay whole; the rest is read next run
        fail(str(exc), Exit.FAILURE)
    except OSError as exc:  # a full disk, a store folder we may not write
        fail(os_failure(exc), Exit.FAILURE)
    finally:
        runner.close()
    for note in report.empty_folders:
        say(f"ingest: {note}")
    for rejected in report.rejected[:20]:
        say(f"quarantined: {rejected}")
    if len(report.rejected) > 20:
        say(f"quarantined: ... {len(report.rejected) - 20} more in {target.quarantine_dir}")
    stored = ", ".join(f"{n} {t}" for t, n in sorted(report.stored.items())) or "nothing new"
    say(
        f"ingest: {report.files_read} file(s) read, {report.files_skipped} already stored; "
        f"stored {stored}; {len(report.rejected)} line(s) quarantined"
    )
    if any(report.stored.values()):  # rank ahead for on-call, as the last rank did (when one was ever saved)
        from triage.cli.risk import refresh_saved_ranking

        line = refresh_saved_ranking(target)
        if line:
            say(f"ingest: {line}")
    if report.repeated:
        say(f"ingest: {report.repeated} capture(s) repeated a (serial, taken_at) already read; "
            "the first one read is kept")
    if report.clamped:
        say(f"ingest: {report.clamped} capture(s) hold a counter beyond 2^63-1, stored as "
            "2^63-1 with counters_clamped set")
    if report.empty_folders:
        raise typer.Exit(int(Exit.USAGE))
    if report.rejected:
        raise typer.Exit(int(Exit.INPUT_REJECTED))



# -- capture: read this host's drives into one capture file (triage/capture, docs/capture.md) ---
@app.command(
    epilog="Example: triage capture --out /var/lib/triage/captures --group-map /etc/triage/slots.csv",
)
def capture(
    devices: Optional[list[str]] = typer.Argument(
        None, metavar="DEVICE", help="Device nodes to read, e.g. /dev/sda /dev/nvme0 (default: every local SATA and NVMe drive in sysfs)."
    ),
    out: Path = typer.Option(Path("."), "--out", metavar="DIR", help="Existing folder for <host>-<YYYY-MM-DD>.jsonl.gz."),
    group_map: Optional[Path] = typer.Option(
        None, "--group-map", metavar="FILE", help="CSV key,slot,group: drive serial or wwn:<16 hex> -> slot and redundancy group."
    ),
) -> None:
    """Read IDENTIFY and SMART / health data from this host's drives (read-only; needs root) into one
    capture file. Exit: 0 all read, 6 some drives could not be read (the rest were written), 1 no drive
    could be read at all (no file written), 7 not root."""
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
            say(f"capture: left out {item.path}: {item.reason}")
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
        say(f"triage: capture: {failure.describe()}")
    for warning in result.warnings:
        say(f"capture: warning: {warning}")
    if result.path is None:  # nothing read is a failed capture, not "some drives unreadable"
        fail(f"capture: none of {len(targets)} drive(s) could be read; no file written", Exit.FAILURE)
    typer.echo(visible(result.path, None))
    say(f"capture: {len(result.captured)} of {len(targets)} drive(s) written to {result.path}")
    raise typer.Exit(int(result.exit_code))




@app.command(
    epilog="Example: triage demo --seed 7 --drives 1200 --days 120 --work demo-work --top 15",
)
def demo(
    seed: int = typer.Option(7, metavar="N", help="Seed of the invented fleet; the same seed gives the same files."),
    drives: int = typer.Option(1200, min=10, metavar="N", help="Drives in the fleet."),
    days: int = typer.Option(120, min=2, metavar="N", help="Nightly captures per drive."),
    work: Path = typer.Option(Path("demo-work"), metavar="DIR", help="Folder for the capture files, the store and the tickets."),
    top: int = typer.Option(15, "--top", min=1, metavar="N", help="Drives shown in the closing ranked report."),
    fmt: OutputFormat = format_option("the closing ranked report"),
) -> None:
    """Run the whole pipeline on an invented fleet: generate its capture files, ingest them, fit the
    model, rank the drives, write tickets; ends with the ranked report."""
    from triage.demo import FleetSpec, NotADemoFolder, generate_fleet, prepare_demo_folder, write_captures
    from triage.ingest import ingest_paths
    from triage.report.console import progress_bar
    from triage.report.rank import render_ranked
    from triage.risk.nightly import run_nightly
    from triage.risk.rank import filter_ranked
    from triage.risk.view import RowFilter, view_of
    from triage.store.dataset import Store

    spec = FleetSpec(seed=seed, n_drives=drives, days=days)
    try:
        folder, reused = prepare_demo_folder(work, spec)
    except NotADemoFolder as exc:
        fail(str(exc), Exit.USAGE)
    say(f"demo: simulating {drives} drives x {days} nights (seed {seed}) into {work}"
               + (" (same fleet as last time: the store is reused)" if reused else ""))
    fleet = generate_fleet(spec)
    with progress_bar("writing captures") as progress:
        write_captures(fleet, folder.captures, progress=progress)
    ruleset, config = _risk_inputs(None, False, None)
    with progress_bar("ingesting", in_bytes=True) as progress:
        # the invented fleet lives in the past: its last night is "now", so staleness is not checked
        report = run_nightly(
            Store(folder.store), folder.captures, folder.tickets, ruleset, refit_days=0.0, config=config,
            ingest=lambda store, paths: ingest_paths(store, paths, progress=progress),
            log=lambda line: say(f"demo: {line}"), stale_hours=None)
    say(report.summary())
    result = report.result
    view = view_of(result, filter_ranked(result.drives, RowFilter(flagged_only=True, top=top)))
    _print_cautions(view)
    render_ranked(view, fmt, report.silence)
    say(f"demo: tickets in {folder.tickets}; explore with: triage cohorts --store {folder.store}, "
               f"triage survival <cohort> --store {folder.store}, triage rank --store {folder.store}")
    if report.rejected:
        raise typer.Exit(int(Exit.INPUT_REJECTED))
