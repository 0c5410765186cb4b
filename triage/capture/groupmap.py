"""The slot / group map: where each drive sits, which the drive itself cannot say.

Our own small format, CSV (RFC 4180 quoting, UTF-8), one drive per line::

    # key,slot,group
    key,slot,group
    QH8A7K2M,ash-r03-u12-bay04,ash-pool-a
    wwn:5000c50012ab34cd,ash-r03-u12-bay05,ash-pool-a
    CNV19200XQ41,ash-r03-u14-nvme0,

* ``key`` is the drive's serial number exactly as IDENTIFY reports it (surrounding spaces
  trimmed), or ``wwn:`` followed by the 16 hex digits of the ATA world wide name (words
  108-111). NVMe controllers have no WWN in Identify Controller: use the serial.
* ``slot`` and ``group`` may be empty (stored as null).
* Blank lines and lines starting with ``#`` are ignored; an optional header line ``key,slot,group``
  may come first. Keys must be unique.

When a drive matches both a ``wwn:`` line and a serial line, the WWN line wins: a WWN is unique by
construction, a serial only per vendor.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass, field
from pathlib import Path

HEADER = ["key", "slot", "group"]
_WWN_KEY = re.compile(r"^wwn:([0-9a-fA-F]{16})$")


class GroupMapError(ValueError):
    """A bad line in the group map; the message names file, line and field."""


@dataclass(frozen=True)
class Placement:
    slot: str | None
    group: str | None


@dataclass
class GroupMap:
    """Serial / WWN -> placement. An empty map places nothing (slot and group null)."""

    by_serial: dict[str, Placement] = field(default_factory=dict)
    by_wwn: dict[str, Placement] = field(default_factory=dict)

    def lookup(self, serial: str | None, wwn: str | None) -> Placement:
        if wwn and wwn.lower() in self.by_wwn:
            return self.by_wwn[wwn.lower()]
        if serial and serial.strip() in self.by_serial:
            return self.by_serial[serial.strip()]
        return Placement(None, None)

    def __len__(self) -> int:
        return len(self.by_serial) + len(self.by_wwn)


def load_group_map(path: Path) -> GroupMap:
    """Read a group map file; raise :class:`GroupMapError` ("file:line: ...") on the first bad line."""
    try:
        text = Path(path).read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise GroupMapError(f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start})") from exc
    except OSError as exc:
        raise GroupMapError(f"{path}: cannot read the group map: {exc.strerror or exc}") from exc
    return parse_group_map(text, str(path))


def parse_group_map(text: str, source: str = "<group map>") -> GroupMap:
    result = GroupMap()
    first_line: dict[str, int] = {}
    seen_row = False
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        for row in reader:
            line = reader.line_num
            if not row or not "".join(row).strip() or row[0].lstrip().startswith("#"):
                continue
            cells = [c.strip() for c in row]
            if not seen_row and [c.lower() for c in cells] == HEADER:
                seen_row = True
                continue
            seen_row = True
            if len(cells) != 3:
                raise GroupMapError(f"{source}:{line}: expected 3 fields key,slot,group, found {len(cells)}")
            key, slot, group = cells
            if not key:
                raise GroupMapError(f"{source}:{line}: field 'key' is empty")
            if any(ord(ch) < 0x20 or ord(ch) == 0x7F for ch in key):
                raise GroupMapError(f"{source}:{line}: field 'key' contains a control character")
            if key in first_line:
                raise GroupMapError(
                    f"{source}:{line}: field 'key': {key!r} already mapped on line {first_line[key]}"
                )
            placement = Placement(slot or None, group or None)
            if key.lower().startswith("wwn:"):
                match = _WWN_KEY.match(key)
                if not match:
                    raise GroupMapError(
                        f"{source}:{line}: field 'key': {key!r} is not wwn: followed by 16 hex digits"
                    )
                wwn = match.group(1).lower()
                canonical = f"wwn:{wwn}"
                if canonical in first_line:
                    raise GroupMapError(
                        f"{source}:{line}: field 'key': {key!r} already mapped on line {first_line[canonical]}"
                    )
                first_line[canonical] = line
                result.by_wwn[wwn] = placement
            else:
                first_line[key] = line
                result.by_serial[key] = placement
    except csv.Error as exc:
        raise GroupMapError(f"{source}:{reader.line_num}: {exc}") from exc
    return result
