"""Group configuration: how many members each redundancy group can lose and how long its rebuild
takes (the format is in ``triage.risk.groups``' docstring and docs/ranking.md). Apart from the
group arithmetic so that loading it imports no pandas."""

from __future__ import annotations

import fnmatch
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

#: Single parity / two-way mirror: the most common layout, so the cautious default.
DEFAULT_TOLERANCE = 1
#: A day to rebuild a large HDD member: common practice, no source.
DEFAULT_REBUILD_HOURS = 24.0

GROUP_CONFIG_FILE = "groups.toml"


@dataclass(frozen=True)
class GroupRule:
    pattern: str
    tolerance: int = DEFAULT_TOLERANCE
    rebuild_hours: float = DEFAULT_REBUILD_HOURS


@dataclass(frozen=True)
class GroupConfig:
    rules: tuple[GroupRule, ...] = field(default_factory=tuple)

    def for_group(self, group: str) -> GroupRule:
        for rule in self.rules:
            if fnmatch.fnmatchcase(group, rule.pattern):
                return rule
        return GroupRule(pattern="*")

    @classmethod
    def load(cls, path: Path) -> "GroupConfig":
        """Read a groups.toml; a bad entry raises ValueError naming the file and entry."""
        try:
            data = tomllib.loads(Path(path).read_text(encoding="utf-8"))
        except tomllib.TOMLDecodeError as exc:
            raise ValueError(f"{path}: not valid TOML: {exc}") from None
        entries = data.get("group", [])
        if not isinstance(entries, list):
            raise ValueError(f"{path}: 'group' must be an array of tables ([[group]])")
        rules = []
        for number, entry in enumerate(entries, start=1):
            where = f"{path}: group entry {number}"
            if not isinstance(entry, dict) or not isinstance(entry.get("pattern"), str):
                raise ValueError(f"{where}: needs a string 'pattern'")
            unknown = set(entry) - {"pattern", "tolerance", "rebuild_hours"}
            if unknown:
                raise ValueError(f"{where}: unknown field(s) {', '.join(sorted(unknown))}")
            tolerance = entry.get("tolerance", DEFAULT_TOLERANCE)
            if not isinstance(tolerance, int) or isinstance(tolerance, bool) or tolerance < 0:
                raise ValueError(f"{where}: field 'tolerance' must be a whole number >= 0")
            hours = entry.get("rebuild_hours", DEFAULT_REBUILD_HOURS)
            if not isinstance(hours, (int, float)) or isinstance(hours, bool) or hours <= 0:
                raise ValueError(f"{where}: field 'rebuild_hours' must be a positive number")
            rules.append(GroupRule(entry["pattern"], tolerance, float(hours)))
        return cls(tuple(rules))

    @classmethod
    def find(cls, rules_dirs: Sequence[Path], explicit: Path | None = None) -> "GroupConfig":
        """``explicit`` if given, else the first groups.toml found in the rules directories."""
        if explicit is not None:
            return cls.load(explicit)
        for folder in rules_dirs:
            candidate = Path(folder) / GROUP_CONFIG_FILE
            if candidate.is_file():
                return cls.load(candidate)
        return cls()
