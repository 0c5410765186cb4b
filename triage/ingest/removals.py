"""The removal log: RFC 4180 CSV with header ``serial,removed_at,reason`` and optional ``note``."""

from __future__ import annotations

import csv
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from triage.ingest.captures import RFC3339, Rejected
from triage.store.schema import REMOVAL_REASONS

REQUIRED = ("serial", "removed_at", "reason")
OPTIONAL = ("note",)


def parse_removed_at(text: str) -> datetime:
    """RFC 3339 date-time with offset, or a bare date (taken as 00:00 UTC)."""
    text = text.strip()
    if RFC3339.match(text):
        return datetime.fromisoformat(text.replace("z", "Z")).astimezone(timezone.utc)
    moment = datetime.strptime(text, "%Y-%m-%d")  # raises ValueError on anything else
    return moment.replace(tzinfo=timezone.utc)


def parse_removal_files(paths: list[Path]) -> tuple[pd.DataFrame, list[Rejected], int]:
    rows, rejected, lines = [], [], 0
    for path in paths:
        source = str(path)
        with path.open(newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh, strict=True)
            try:
                header = [h.strip() for h in next(reader)]
            except StopIteration:
                continue
            except csv.Error as exc:
                rejected.append(Rejected(source, 1, None, f"bad CSV header: {exc}", ""))
                continue
            missing = [h for h in REQUIRED if h not in header]
            unknown = [h for h in header if h not in REQUIRED + OPTIONAL]
            if missing or unknown:
                what = f"missing column(s) {', '.join(missing)}" if missing else f"unknown column(s) {', '.join(unknown)}"
                rejected.append(Rejected(source, 1, None, f"bad header: {what}", ",".join(header)))
                continue
            while True:
                start = reader.line_num + 1
                try:
                    record = next(reader)
                except StopIteration:
                    break
                except csv.Error as exc:
                    rejected.append(Rejected(source, start, None, f"bad CSV: {exc}", ""))
                    continue
                lines += 1
                if not any(cell.strip() for cell in record):
                    continue
                text = ",".join(record)
                if len(record) != len(header):
                    rejected.append(Rejected(source, start, None,
                                             f"{len(record)} fields, header has {len(header)}", text))
                    continue
                cells = dict(zip(header, record))
                serial = cells["serial"].strip()
                reason = cells["reason"].strip()
                if not serial:
                    rejected.append(Rejected(source, start, "serial", "missing", text))
                    continue
                if reason not in REMOVAL_REASONS:
                    rejected.append(Rejected(source, start, "reason",
                                             f"unknown reason {reason!r} (expected one of {', '.join(REMOVAL_REASONS)})", text))
                    continue
                try:
                    removed_at = parse_removed_at(cells["removed_at"])
                except ValueError:
                    rejected.append(Rejected(source, start, "removed_at",
                                             f"not an RFC 3339 timestamp or YYYY-MM-DD date: {cells['removed_at']!r}", text))
                    continue
                rows.append((serial, removed_at, reason, cells.get("note") or None, source))
    frame = pd.DataFrame(rows, columns=["serial", "removed_at", "reason", "note", "source_file"])
    frame["removed_at"] = pd.to_datetime(frame["removed_at"], utc=True)
    return frame, rejected, lines
