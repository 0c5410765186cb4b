"""The nightly run: ingest new captures, refit when due, rank, write tickets; one run at a time.

Exit code (``Exit.combine`` of what happened; see triage/exitcodes.py):
  OK              nothing new needs attention
  NEW_FLAGS       some ticket is ``new`` tonight
  INPUT_REJECTED  some input lines were quarantined (every good line was stored)
  LOCKED          another nightly run holds ``NIGHTLY_LOCK``; nothing was done
  FAILURE         the run failed
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

from triage.exitcodes import Exit
from triage.risk.rank import RankResult, rank_store
from triage.risk.tickets import TicketCounts, export_tickets

#: Separate from the store's writer lock, which ingest takes inside the run.
NIGHTLY_LOCK = "_nightly.lock"


@dataclass
class NightlyReport:
    files_read: int = 0
    new_rows: int = 0
    rejected: int = 0
    refitted: bool = False
    ranked: int = 0
    tickets: TicketCounts | None = None
    notes: list[str] = field(default_factory=list)
    exit: Exit = Exit.OK
    result: RankResult | None = None  # tonight's ranking, for a caller that also prints it

    def summary(self) -> str:
        t = self.tickets
        tickets = f"{t.new} new / {t.ongoing} ongoing / {t.cleared} cleared tickets" if t else "no tickets"
        return (f"nightly: {self.files_read} file(s) read, {self.new_rows} new row(s), "
                f"{self.rejected} line(s) rejected, model {'refitted' if self.refitted else 'kept'}, "
                f"{self.ranked} drive(s) ranked, {tickets}; exit {int(self.exit)} ({self.exit.name})")


def model_age_days(store, now: float | None = None) -> float | None:
    """Days since the newest file under the store's models folder was written; None if none."""
    files = [p for p in store.models_dir.rglob("*") if p.is_file()] if store.models_dir.is_dir() else []
    if not files:
        return None
    return ((now or time.time()) - max(p.stat().st_mtime for p in files)) / 86400.0


def refit_like_latest(store, previous=None):
    """Refit the survival model with the settings of ``previous`` (default: the newest saved
    model) -- horizon, cohort keys, proactive counting -- so the nightly refit never silently
    replaces a model an operator fitted with other settings; the defaults when there is none
    or it cannot be read (e.g. a newer format)."""
    import triage.survival as survival  # noqa: PLC0415  (survival layer, to our left)

    if previous is None:
        previous, _ = survival.readable_latest_model(store)
    settings = {} if previous is None else {
        "horizon_days": previous.horizon_days, "by": tuple(previous.by),
        "count_proactive": previous.count_proactive}
    return survival.fit_and_save(store, **settings)


def run_nightly(
    store,
    dumps: Path,
    out: Path,
    ruleset,
    *,
    refit_days: float = 7.0,
    config=None,
    ingest: Callable | None = None,
    rank: Callable[..., RankResult] | None = None,
    refit: Callable | None = None,
    log: Callable[[str], None] = lambda line: None,
) -> NightlyReport:
    """Hold NIGHTLY_LOCK (raises StoreLocked if held), then ingest, refit when due, rank, export."""
    import triage.survival as survival  # noqa: PLC0415  (survival layer, to our left)

    if ingest is None:
        from triage.ingest import ingest_paths as ingest  # noqa: PLC0415
    rank = rank or rank_store
    report = NightlyReport()
    with store.lock(NIGHTLY_LOCK):
        with store.lock():
            got = ingest(store, [dumps])
        report.files_read, report.new_rows, report.rejected = got.files_read, got.new_rows, len(got.rejected)
        log(f"ingest: {got.files_read} file(s), {got.new_rows} new row(s), {len(got.rejected)} rejected")

        previous, _ = survival.readable_latest_model(store)  # None also when it cannot be read
        if previous is None or model_age_days(store) >= refit_days:
            try:
                refit(store) if refit else refit_like_latest(store, previous)
                report.refitted = True
            except ValueError as exc:  # e.g. no failures yet: rank on rules alone, say so
                report.notes.append(f"refit skipped: {exc}")
        result = rank(store, ruleset, config=config)
        report.result = result
        report.notes += result.notes
        report.ranked = len(result.drives)
        _, report.tickets = export_tickets(result.drives, out, as_of=result.as_of or datetime.now(timezone.utc))
    for note in report.notes:
        log(f"note: {note}")
    report.exit = Exit.combine(
        Exit.INPUT_REJECTED if report.rejected else Exit.OK,
        Exit.NEW_FLAGS if report.tickets and report.tickets.new else Exit.OK,
    )
    return report
