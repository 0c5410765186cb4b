"""The removal log: RFC 4180 CSV with header ``serial,removed_at,reason`` and optional ``note``."""

from __future__ import annotations

import csv
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd

from triage.ingest.captures import DATE_FLOOR, FUTURE_TOLERANCE, Rejected, normalise_timestamp
from triage.ingest.reading import display_name, excerpt, is_utf8_text
from triage.store.schema import REMOVAL_REASONS

REQUIRED = ("serial", "removed_at", "reason")
OPTIONAL = ("note",)


def parse_removed_at(text: str) -> datetime:
    """RFC 3339 date-time with offset, or a bare date (taken as 00:00 UTC); ValueError otherwise
    (also for a date-time whose UTC moment falls outside years 1-9999)."""
    text = text.strip()
    stamp = normalise_timestamp(text)
    try:
        if stamp is not None:
            return datetime.fromisoformat(stamp).astimezone(timezone.utc)
        moment = datetime.strptime(text, "%Y-%m-%d")  # raises ValueError on anything else
    except OverflowError:
        raise ValueError(f"{text!r} is outside the years 1-9999 in UTC") from None
    return moment.replace(tzinfo=timezone.utc)


def parse_removal_files(paths: list[Path], now: datetime | None = None) -> tuple[pd.DataFrame, list[Rejected], int]:
    """Rows of the removal logs, the rejected lines, and the count of lines read. A line that is
    not UTF-8, or dated outside [``DATE_FLOOR``, ``now`` + ``FUTURE_TOLERANCE``], is rejected."""
    now = now or datetime.now(timezone.utc)
    rows, rejected, lines = [], [], 0
    for path in paths:
        source = display_name(path)
        try:
            fh = path.open(newline="", encoding="utf-8-sig", errors="surrogateescape")
        except OSError as exc:
            rejected.append(Rejected(source, 1, None, f"file unreadable: {exc.strerror or exc}", ""))
            continue
        with fh:
            reader = csv.reader(fh, strict=True)
            try:
                header = [h.strip() for h in next(reader)]
            except StopIteration:
                continue
            except (csv.Error, OSError) as exc:
                rejected.append(Rejected(source, 1, None, f"bad CSV header: {exc}", ""))
                continue
            if not all(is_utf8_text(h) for h in header):
                rejected.append(Rejected(source, 1, None, "bad header: not UTF-8", _text(header)))
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
                except OSError as exc:
                    rejected.append(Rejected(source, start, None, f"file unreadable after line {start - 1}: {exc}", ""))
                    break
                lines += 1
                if not any(cell.strip() for cell in record):
                    continue
                text = _text(record)
                if not all(is_utf8_text(cell) for cell in record):
                    rejected.append(Rejected(source, start, None, "not UTF-8", text))
                    continue
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
                                             f"not an RFC 3339 timestamp or YYYY-MM-DD date: {cells['removed_at'][:80]!r}", text))
                    continue
                if removed_at < DATE_FLOOR:
                    rejected.append(Rejected(source, start, "removed_at", f"dated before {DATE_FLOOR:%Y-%m-%d}", text))
                    continue
                if removed_at > now + FUTURE_TOLERANCE:
                    rejected.append(Rejected(source, start, "removed_at",
                                             f"dated {removed_at:%Y-%m-%dT%H:%M:%SZ}, after this machine's clock "
                                             f"({now:%Y-%m-%dT%H:%M:%SZ})", text))
                    continue
                rows.append((serial, removed_at, reason, cells.get("note") or None, source))
    frame = pd.DataFrame(rows, columns=["serial", "removed_at", "reason", "note", "source_file"])
    frame["removed_at"] = pd.to_datetime(frame["removed_at"], utc=True)
    return frame, rejected, lines


def _text(record: list[str]) -> str:
    """A CSV record as quarantine text: bytes that are not UTF-8 shown replaced, at most
    ``EXCERPT_BYTES`` of it."""
    raw = ",".join(record).encode("utf-8", errors="surrogateescape")
    return excerpt(raw)
