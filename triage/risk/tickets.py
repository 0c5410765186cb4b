"""Ticket export: one CSV row per flagged drive, tracked night to night.

* Key: a short hash of serial + the category of the drive's worst flag, so the same drive for the
  same reason keeps the same key every night (a ticket system can update instead of duplicating).
* State against the previous export: ``new`` (not open yesterday), ``ongoing`` (open yesterday
  and still flagged), ``not-reporting`` (open yesterday and the drive sent nothing since: silence is
  not evidence, the ticket stays open with the time the drive was last seen), ``cleared`` (open
  yesterday, and the drive reported tonight without the flag or was removed; reported once, then
  dropped). A ticket is cleared only by that evidence.
* ``min_severity`` keeps drives below a tier (e.g. watch-only) out of the queue; a ticket already
  open stays open while its flag fires, so raising the bar never clears a ticket by itself.
* File format: RFC 4180 (comma separated, CRLF line ends, fields quoted when they hold a comma,
  quote or line break). Written to a temporary file and renamed, so a reader never sees half.
* Every cell goes through ``triage.safety.cell`` (the one sanitiser): control characters
  escaped, long values cut with a marker, and a leading single quote before anything a
  spreadsheet could run as a formula. Serials, models and evidence come from drive firmware,
  host, slot and group from capture lines: none of it may run when an operator opens the file.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import pandas as pd

from triage.process import process_gone
from triage.risk.score import tier_index
from triage.safety import NAME_LIMIT, TEXT_LIMIT, cell, name, uncell

TICKET_COLUMNS = [
    "key", "state", "first_flagged", "last_seen", "severity", "category", "host", "slot", "group", "model",
    "serial", "summary", "evidence", "action", "score", "p_fail", "rules",
]
STATES = ("new", "ongoing", "not-reporting", "cleared")
OPEN_STATES = ("new", "ongoing", "not-reporting")
#: Identifier columns are cut shorter than free text (see triage.safety).
_NAME_COLUMNS = frozenset({"host", "slot", "group", "model", "serial"})


def ticket_key(serial: str, reason: str | None) -> str:
    """Stable 12-hex-digit key: SHA-256 of 'serial|reason' (same drive, same reason, same key)."""
    text = f"{serial}|{reason or ''}"
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:12]


@dataclass(frozen=True)
class TicketCounts:
    new: int
    ongoing: int
    not_reporting: int
    cleared: int


def _day(as_of: datetime | None) -> str:
    return (as_of or datetime.now()).strftime("%Y-%m-%d")


def _stamp(value) -> str:
    return "" if value is None or pd.isna(value) else pd.Timestamp(value).isoformat()


def drive_key(d) -> str:
    """The ticket key of a ranked drive row: its serial and the category of its most urgent flag."""
    return ticket_key(d.serial, d.category or d.severity)


def current_tickets(drives: pd.DataFrame, as_of: datetime | None = None) -> pd.DataFrame:
    """Tickets for tonight's flagged drives (rows of a ranked frame with at least one rule)."""
    flagged = drives[drives["rules"].map(lambda r: len(r) > 0)]
    day = _day(as_of)
    rows = []
    for d in flagged.itertuples(index=False):
        where = f"{name(d.host or '?')}/{name(d.slot or '?')}"  # each part cut on its own
        rows.append({
            "key": drive_key(d),
            "state": "new",
            "first_flagged": day,
            "last_seen": _stamp(getattr(d, "taken_at", None)),
            "severity": d.severity or "",
            "category": d.category or "",
            "host": d.host or "", "slot": d.slot or "", "group": d.group or "",
            "model": d.model or "", "serial": d.serial,
            "summary": f"{d.severity}: {name(d.model or 'drive')} {name(d.serial)} at {where}",
            "evidence": "; ".join(d.evidence),
            "action": d.action,
            "score": f"{d.score:.3f}",
            "p_fail": "" if pd.isna(d.p_fail) else f"{d.p_fail:.4f}",
            "rules": " ".join(d.rules),
        })
    return pd.DataFrame(rows, columns=TICKET_COLUMNS)


def read_tickets(path: Path) -> pd.DataFrame:
    """A previous export (our own format); an absent file means no previous night."""
    path = Path(path)
    if not path.exists():
        return pd.DataFrame(columns=TICKET_COLUMNS)
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        missing = {"key", "state"} - set(reader.fieldnames or [])
        if missing:
            raise ValueError(f"{path}: line 1: not a triage ticket export (no column {', '.join(sorted(missing))})")
        rows = [{k: uncell(v or "") for k, v in row.items() if k in TICKET_COLUMNS} for row in reader]
    return pd.DataFrame(rows, columns=TICKET_COLUMNS).fillna("")


def reconcile(tonight: pd.DataFrame, previous: pd.DataFrame, *, reporting: set | frozenset,
              removed: set | frozenset = frozenset(), last_seen: dict | None = None) -> pd.DataFrame:
    """Set each ticket's state against the previous export; carry the open tickets not raised tonight.

    ``reporting``: serials that sent a capture tonight (flagged or not); ``removed``: serials in
    the removal log; ``last_seen``: serial -> newest capture time for drives that went silent.
    An open ticket not raised tonight is ``cleared`` only when its drive reported or was removed;
    otherwise it stays open as ``not-reporting``.
    """
    last_seen = last_seen or {}
    open_before = previous[previous["state"].isin(OPEN_STATES)].set_index("key")
    tonight = tonight.copy()
    was_open = tonight["key"].isin(open_before.index)
    tonight["state"] = ["ongoing" if w else "new" for w in was_open]
    if was_open.any():
        # keep the first night it was flagged
        tonight.loc[was_open, "first_flagged"] = tonight.loc[was_open, "key"].map(open_before["first_flagged"])
    carried = open_before[~open_before.index.isin(tonight["key"])].reset_index()
    evidence = carried["serial"].isin(set(reporting) | set(removed))
    carried["state"] = ["cleared" if e else "not-reporting" for e in evidence]
    carried["last_seen"] = [
        row.last_seen if e else (_stamp(last_seen[row.serial]) if row.serial in last_seen else row.last_seen)
        for e, row in zip(evidence, carried.itertuples(index=False))]
    return pd.concat([tonight, carried[TICKET_COLUMNS]], ignore_index=True)[TICKET_COLUMNS]


def count_states(tickets: pd.DataFrame) -> TicketCounts:
    counts = tickets["state"].value_counts()
    return TicketCounts(*(int(counts.get(s, 0)) for s in STATES))


def flag_states(drives: pd.DataFrame, previous: pd.DataFrame, as_of: datetime | None) -> pd.DataFrame:
    """Each flagged drive's state against a ticket export and the day its flag was first raised.

    ``new`` when the flag was first raised on the day of ``as_of`` (the newest capture), which
    holds whether ``previous`` is last night's export or tonight's; ``ongoing`` when raised earlier.
    """
    raised = previous[previous["state"].isin(OPEN_STATES)].set_index("key")["first_flagged"]
    day = _day(as_of)
    drives = drives.copy()
    states, first = [], []
    for d in drives.itertuples(index=False):
        if not d.rules:
            states.append(None)
            first.append(None)
            continue
        since = raised.get(drive_key(d)) or day
        states.append("new" if since >= day else "ongoing")
        first.append(since)
    drives["state"], drives["first_raised"] = states, first
    return drives


def silent_flags(silent: pd.DataFrame, previous: pd.DataFrame) -> pd.DataFrame:
    """Drives that stopped reporting, each with the flag it had open in ``previous`` (its most
    urgent severity and the day first raised; empty for a drive with no open ticket)."""
    open_before = previous[previous["state"].isin(OPEN_STATES)]
    open_before = open_before.assign(_tier=open_before["severity"].map(lambda s: tier_index(s or None)))
    worst = open_before.sort_values(["serial", "_tier"]).drop_duplicates("serial").set_index("serial")
    silent = silent.copy()
    silent["severity"] = silent["serial"].map(worst["severity"]) if len(worst) else None
    silent["first_raised"] = silent["serial"].map(worst["first_flagged"]) if len(worst) else None
    silent["state"] = "not-reporting"
    return silent


def to_csv_text(tickets: pd.DataFrame) -> str:
    """RFC 4180 text: header, CRLF line ends, minimal quoting, every cell neutralised."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, quoting=csv.QUOTE_MINIMAL, lineterminator="\r\n")
    writer.writerow(TICKET_COLUMNS)
    limits = [NAME_LIMIT if c in _NAME_COLUMNS else TEXT_LIMIT for c in TICKET_COLUMNS]
    for row in tickets[TICKET_COLUMNS].itertuples(index=False):
        writer.writerow([cell(value, limit) for value, limit in zip(row, limits)])
    return buffer.getvalue()


def atomic_write_text(path: Path, text: str) -> None:
    """Write atomically: a temporary file in the same folder, flushed, then renamed over ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    for stale in path.parent.glob(f".{path.name}.*.tmp"):  # left by a killed run
        owner = stale.name[len(path.name) + 2:-len(".tmp")]
        if owner.isdigit() and process_gone(int(owner)):
            stale.unlink(missing_ok=True)
    temp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with temp.open("w", newline="", encoding="utf-8") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(temp, path)


def write_tickets(tickets: pd.DataFrame, path: Path) -> None:
    """The RFC 4180 export, written atomically (a reader never sees half a file)."""
    atomic_write_text(path, to_csv_text(tickets))


def export_tickets(drives: pd.DataFrame, out: Path, previous: Path | None = None,
                   as_of: datetime | None = None, *, removed: set | frozenset = frozenset(),
                   silent: pd.DataFrame | None = None,
                   min_severity: str | None = None) -> tuple[pd.DataFrame, TicketCounts]:
    """Read the previous export (``previous`` or ``out`` itself), reconcile, write ``out``.

    ``drives``: tonight's ranked frame (every reporting drive, flagged or not); ``removed``: serials
    in the removal log; ``silent``: rank.silent_drives (serial, last_seen); ``min_severity``: leave
    drives below this tier out of new tickets.
    """
    before = read_tickets(previous if previous is not None else out)
    tonight = current_tickets(drives, as_of)
    if min_severity is not None:
        limit = tier_index(min_severity)
        still_open = set(before.loc[before["state"].isin(OPEN_STATES), "key"])
        keep = tonight["severity"].map(lambda s: tier_index(s or None) <= limit) | tonight["key"].isin(still_open)
        tonight = tonight[keep]
    last_seen = {} if silent is None else dict(zip(silent["serial"], silent["last_seen"]))
    tickets = reconcile(tonight, before, reporting=set(drives["serial"]), removed=removed, last_seen=last_seen)
    write_tickets(tickets, out)
    return tickets, count_states(tickets)
