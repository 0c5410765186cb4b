"""The nightly run: ingest new captures, refit when due, rank, write tickets; one run at a time.

Exit code (``Exit.combine`` of what happened, worst first; see triage/exitcodes.py):
  FAILURE         the run failed
  LOCKED          another nightly run holds ``NIGHTLY_LOCK``; nothing was done
  NOT_REPORTING   drives, hosts or sites stopped reporting, or the newest capture is stale
  INPUT_REJECTED  some input lines were quarantined (every good line was stored)
  NEW_FLAGS       some ticket is ``new`` tonight
  OK              nothing new needs attention

A run can have several of these at once; ``NightlyReport.outcomes`` (written by ``--summary``)
names every one, so a wrapper never has to guess what the winning code hid.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from functools import partial
from pathlib import Path
from typing import Callable

from triage.exitcodes import Exit
from triage.risk.rank import STALE_HOURS, RankResult, rank_store, silence_warnings
from triage.risk.tickets import TicketCounts, atomic_write_text, export_tickets, flag_states

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
    silence: list[str] = field(default_factory=list)  # rank.silence_warnings: what went quiet
    exit: Exit = Exit.OK
    result: RankResult | None = None  # tonight's ranking, for a caller that also prints it

    @property
    def outcomes(self) -> list[Exit]:
        """Every outcome of the run that has an exit code, worst first (the first is ``exit``)."""
        found = [Exit.NOT_REPORTING if self.silence else Exit.OK,
                 Exit.INPUT_REJECTED if self.rejected else Exit.OK,
                 Exit.NEW_FLAGS if self.tickets and self.tickets.new else Exit.OK]
        from triage.exitcodes import PRECEDENCE  # noqa: PLC0415

        return [c for c in PRECEDENCE if c in found]

    def summary(self) -> str:
        t = self.tickets
        tickets = (f"{t.new} new / {t.ongoing} ongoing / {t.not_reporting} not-reporting / {t.cleared} cleared tickets"
                   if t else "no tickets")
        as_of = self.result.as_of if self.result is not None else None
        also = ", ".join(c.name for c in self.outcomes) or "nothing"
        return (f"nightly: {self.files_read} file(s) read, {self.new_rows} new row(s), "
                f"{self.rejected} line(s) quarantined, model {'refitted' if self.refitted else 'kept'}, "
                f"{self.ranked} drive(s) ranked, {tickets}, {len(self.silence)} silence warning(s); "
                f"as of {as_of.isoformat() if as_of else 'no capture'}; "
                f"exit {int(self.exit)} ({self.exit.name}; outcomes: {also})")

    def summary_record(self) -> dict:
        """The machine-readable summary (``nightly --summary FILE``): every outcome, not only the code."""
        t = self.tickets
        as_of = self.result.as_of if self.result is not None else None
        return {
            "as_of": as_of.isoformat() if as_of else None,
            "exit": int(self.exit), "exit_name": self.exit.name,
            "outcomes": [c.name for c in self.outcomes],
            "files_read": self.files_read, "new_rows": self.new_rows, "quarantined": self.rejected,
            "model_refitted": self.refitted, "ranked": self.ranked,
            "tickets": None if t is None else {"new": t.new, "ongoing": t.ongoing,
                                               "not_reporting": t.not_reporting, "cleared": t.cleared},
            "not_reporting": self.silence,
            "notes": self.notes,
        }

    def write_summary(self, path: Path) -> None:
        atomic_write_text(path, json.dumps(self.summary_record(), indent=2) + "\n")


def model_age_days(store, now: float | None = None) -> float | None:
    """Days since the newest file under the store's models folder was written; None if none."""
    files = [p for p in store.models_dir.rglob("*") if p.is_file()] if store.models_dir.is_dir() else []
    if not files:
        return None
    return ((now or time.time()) - max(p.stat().st_mtime for p in files)) / 86400.0


def refit_like_latest(store, previous=None, engine=None):
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
    return survival.fit_and_save(store, **settings, engine=engine)


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
    stale_hours: float | None = STALE_HOURS,
    now: datetime | None = None,
    min_severity: str | None = None,
    ingest_engine=None,
    fit_engine=None,
) -> NightlyReport:
    """Hold NIGHTLY_LOCK (raises StoreLocked if held), then ingest, refit when due, rank, export.

    ``stale_hours``: a newest capture older than this (against ``now``) and drives silent for
    longer count as not reporting (None: staleness not checked, as in the demo's invented past).
    ``ingest_engine`` / ``fit_engine``: where the ingest's decoding and the refit's map steps run
    (triage/engine.py; None: ingest's default local pool, the refit in this process).
    """
    import triage.survival as survival  # noqa: PLC0415  (survival layer, to our left)

    if ingest is None:
        from triage.ingest import ingest_paths  # noqa: PLC0415

        ingest = partial(ingest_paths, engine=ingest_engine)
    rank = rank or partial(rank_store, reuse=True)  # saved for on-call's 'triage rank' after the run
    report = NightlyReport()
    with store.lock(NIGHTLY_LOCK):
        with store.lock():
            got = ingest(store, [dumps])
        report.files_read, report.new_rows, report.rejected = got.files_read, got.new_rows, len(got.rejected)
        log(f"ingest: {got.files_read} file(s), {got.new_rows} new row(s), {len(got.rejected)} line(s) quarantined")
        report.notes += getattr(got, "empty_folders", [])

        previous, _ = survival.readable_latest_model(store)  # None also when it cannot be read
        if previous is None or model_age_days(store) >= refit_days:
            try:
                refit(store) if refit else refit_like_latest(store, previous, engine=fit_engine)
                report.refitted = True
            except ValueError as exc:  # e.g. no failures yet: rank on rules alone, say so
                report.notes.append(f"refit skipped: {exc}")
        result = rank(store, ruleset, config=config, silent_hours=stale_hours or STALE_HOURS)
        report.result = result
        report.notes += result.notes
        report.ranked = len(result.drives)
        exported, report.tickets = export_tickets(result.drives, out, as_of=result.as_of or datetime.now(timezone.utc),
                                           removed=result.removed, silent=result.silent,
                                           min_severity=min_severity)
        result.drives = flag_states(result.drives, exported, result.as_of)  # new / ongoing, since when
    report.silence = silence_warnings(result, now=now, stale_hours=stale_hours)
    for note in report.notes:
        log(f"note: {note}")
    for line in report.silence:
        log(f"warning: {line}")
    report.exit = Exit.combine(*report.outcomes)
    return report
