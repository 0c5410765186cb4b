"""Ticket export: one CSV row per flagged drive, tracked night to night.

* Key: a short hash of serial + the category of the drive's worst flag, so the same drive for the
  same reason keeps the same key every night (a ticket system can update instead of duplicating).
* State against the previous export: ``new`` (not open yesterday), ``ongoing`` (open yesterday
  and still flagged), ``cleared`` (open yesterday, not flagged tonight; reported once, then dropped).
* File format: RFC 4180 (comma separated, CRLF line ends, fields quoted when they hold a comma,
  quote or line break). Written to a temporary file and renamed, so a reader never sees half.
* Spreadsheet formula injection: any cell starting with ``= + - @``, TAB or CR gets a leading
  single quote, as the OWASP "CSV Injection" page advises
  (https://owasp.org/www-community/attacks/CSV_Injection). Serials, models and evidence come from
  drive firmware and must not run as formulas when an operator opens the file.
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

TICKET_COLUMNS = [
    "key", "state", "first_flagged", "severity", "category", "host", "slot", "group", "model",
    "serial", "summary", "evidence", "action", "score", "p_fail", "rules",
]
STATES = ("new", "ongoing", "cleared")
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def ticket_key(serial: str, reason: str | None) -> str:
    """Stable 12-hex-digit key: SHA-256 of 'serial|reason' (same drive, same reason, same key)."""
    text = f"{serial}|{reason or ''}"
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:12]


def neutralise(cell: object) -> str:
    """A cell safe to open in a spreadsheet: a leading ' before = + - @ TAB CR (OWASP)."""
    text = "" if cell is None or (isinstance(cell, float) and pd.isna(cell)) else str(cell)
    return "'" + text if text.startswith(_FORMULA_START) else text


def restore(cell: str) -> str:
    """Undo ``neutralise`` when reading our own export back."""
    if len(cell) >= 2 and cell[0] == "'" and cell[1] in "=+-@\t\r":
        return cell[1:]
    return cell


@dataclass(frozen=True)
class TicketCounts:
    new: int
    ongoing: int
    cleared: int


def current_tickets(drives: pd.DataFrame, as_of: datetime | None = None) -> pd.DataFrame:
    """Tickets for tonight's flagged drives (rows of a ranked frame with at least one rule)."""
    flagged = drives[drives["rules"].map(lambda r: len(r) > 0)]
    day = (as_of or datetime.now()).strftime("%Y-%m-%d")
    rows = []
    for d in flagged.itertuples(index=False):
        reason = d.category or d.severity
        where = f"{d.host or '?'}/{d.slot or '?'}"
        rows.append({
            "key": ticket_key(d.serial, reason),
            "state": "new",
            "first_flagged": day,
            "severity": d.severity or "",
            "category": d.category or "",
            "host": d.host or "", "slot": d.slot or "", "group": d.group or "",
            "model": d.model or "", "serial": d.serial,
            "summary": f"{d.severity}: {d.model or 'drive'} {d.serial} at {where}",
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
        rows = [{k: restore(v or "") for k, v in row.items() if k in TICKET_COLUMNS} for row in reader]
    return pd.DataFrame(rows, columns=TICKET_COLUMNS).fillna("")


def reconcile(tonight: pd.DataFrame, previous: pd.DataFrame) -> pd.DataFrame:
    """Set each ticket's state against the previous export; add tickets that cleared."""
    open_before = previous[previous["state"].isin(["new", "ongoing"])].set_index("key")
    tonight = tonight.copy()
    was_open = tonight["key"].isin(open_before.index)
    tonight["state"] = ["ongoing" if w else "new" for w in was_open]
    if was_open.any():
        # keep the first night it was flagged
        tonight.loc[was_open, "first_flagged"] = tonight.loc[was_open, "key"].map(open_before["first_flagged"])
    cleared = open_before[~open_before.index.isin(tonight["key"])].reset_index()
    cleared = cleared.assign(state="cleared")[TICKET_COLUMNS]
    return pd.concat([tonight, cleared], ignore_index=True)[TICKET_COLUMNS]


def count_states(tickets: pd.DataFrame) -> TicketCounts:
    counts = tickets["state"].value_counts()
    return TicketCounts(*(int(counts.get(s, 0)) for s in STATES))


def to_csv_text(tickets: pd.DataFrame) -> str:
    """RFC 4180 text: header, CRLF line ends, minimal quoting, every cell neutralised."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, quoting=csv.QUOTE_MINIMAL, lineterminator="\r\n")
    writer.writerow(TICKET_COLUMNS)
    for row in tickets[TICKET_COLUMNS].itertuples(index=False):
        writer.writerow([neutralise(cell) for cell in row])
    return buffer.getvalue()


def write_tickets(tickets: pd.DataFrame, path: Path) -> None:
    """Write atomically: a temporary file in the same folder, flushed, then renamed over ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    temp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with temp.open("w", newline="", encoding="utf-8") as fh:
        fh.write(to_csv_text(tickets))
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(temp, path)


def export_tickets(drives: pd.DataFrame, out: Path, previous: Path | None = None,
                   as_of: datetime | None = None) -> tuple[pd.DataFrame, TicketCounts]:
    """Read the previous export (``previous`` or ``out`` itself), reconcile, write ``out``."""
    before = read_tickets(previous if previous is not None else out)
    tickets = reconcile(current_tickets(drives, as_of), before)
    write_tickets(tickets, out)
    return tickets, count_states(tickets)
