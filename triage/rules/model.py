"""Rules as objects: severity scale, fault categories, one rule, a loaded rule set, a load error."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from enum import Enum
from pathlib import Path
from typing import Any, Mapping

from triage.rules.expr import Expression
from triage.rules.template import Template


class Severity(str, Enum):
    """How strongly a firing points at replacing the drive, strongest first.

    replace-now > replace-soon > watch > check-path. ``check-path`` comes last because it points
    away from the drive: the fault is in the cable, backplane slot or controller port, and work
    is due there, not on the drive. Only the first two have ``replaces_drive``. (The risk layer
    orders its action tiers differently: check-path before watch, as work to do tonight;
    triage/risk/score.py.)
    """

    REPLACE_NOW = "replace-now"
    REPLACE_SOON = "replace-soon"
    WATCH = "watch"
    CHECK_PATH = "check-path"

    def __str__(self) -> str:
        return self.value

    @property
    def rank(self) -> int:
        """Higher points more at replacing: replace-now 4, replace-soon 3, watch 2, check-path 1."""
        return _RANK[self]

    @property
    def replaces_drive(self) -> bool:
        return self in (Severity.REPLACE_NOW, Severity.REPLACE_SOON)

    @property
    def action(self) -> str:
        return _ACTION[self]

    def __lt__(self, other: object) -> bool:
        if not isinstance(other, Severity):
            return NotImplemented
        return self.rank < other.rank

    def __le__(self, other: object) -> bool:
        if not isinstance(other, Severity):
            return NotImplemented
        return self.rank <= other.rank

    def __gt__(self, other: object) -> bool:
        if not isinstance(other, Severity):
            return NotImplemented
        return self.rank > other.rank

    def __ge__(self, other: object) -> bool:
        if not isinstance(other, Severity):
            return NotImplemented
        return self.rank >= other.rank


_RANK = {
    Severity.REPLACE_NOW: 4,
    Severity.REPLACE_SOON: 3,
    Severity.WATCH: 2,
    Severity.CHECK_PATH: 1,
}

_ACTION = {
    Severity.REPLACE_NOW: (
        "Replace the drive now, through the site's change procedure. Caution: if its redundancy "
        "group is already degraded, pulling it can lose data; restore redundancy first."
    ),
    Severity.REPLACE_SOON: (
        "Schedule a replacement within days, through the site's change procedure; make sure "
        "its redundancy group is healthy before the swap."
    ),
    Severity.CHECK_PATH: (
        "The fault is on the path to the drive, not in it: reseat or replace the cable, check "
        "the backplane slot and controller port. Do not pull the drive for this."
    ),
    Severity.WATCH: "No action yet: keep capturing and watch the trend.",
}


class Category(str, Enum):
    """Where the fault most likely lies."""

    MEDIA = "media"  # the recording surface or flash cells: bad sectors, uncorrectable reads
    WEAR = "wear"  # predictable end of life: endurance used, spare capacity consumed
    THERMAL = "thermal"  # the environment (airflow, fans, ambient), not the drive
    PATH = "path"  # cable, backplane, controller: not the drive
    DEVICE = "device"  # the drive's own verdict, fault not localised (threshold, NVMe warnings)

    def __str__(self) -> str:
        return self.value


@dataclass(frozen=True)
class RuleError:
    """A problem in a rule file; the rule it concerns was not loaded."""

    path: Path
    line: int | None
    message: str

    def __str__(self) -> str:
        if self.line is None:
            return f"{self.path}: {self.message}"
        return f"{self.path}:{self.line}: {self.message}"


@dataclass(frozen=True)
class Rule:
    id: str
    title: str
    severity: Severity
    category: Category
    when: Expression
    explain: Template
    source: str
    enabled: bool
    path: Path  # file that (last) defined the rule
    line: int  # line of its [[rule]] header in that file
    origin: str  # "default" | "site"
    overrides: Path | None = None  # file of the earlier rule with this id that this one replaced
    definition: Mapping[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @property
    def fields(self) -> frozenset[str]:
        used = set(self.when.fields)
        for expression in self.explain.expressions:
            used |= expression.fields
        return frozenset(used)

    @property
    def max_days(self) -> float:
        return max([self.when.max_days, *(e.max_days for e in self.explain.expressions)])

    @property
    def status(self) -> str:
        """``default``, ``site``, ``override`` (a site rule replacing an earlier one) or ``disabled``."""
        if not self.enabled:
            return "disabled"
        if self.overrides is not None:
            return "override"
        return self.origin


@dataclass
class RuleSet:
    """Rules in effect after defaults and site directories are merged, plus what failed to load."""

    all_rules: list[Rule] = field(default_factory=list)  # including disabled ones, load order
    errors: list[RuleError] = field(default_factory=list)

    @property
    def rules(self) -> list[Rule]:
        """The enabled rules, in load order."""
        return [r for r in self.all_rules if r.enabled]

    def get(self, rule_id: str) -> Rule | None:
        for rule in self.all_rules:
            if rule.id == rule_id:
                return rule
        return None

    @property
    def fields(self) -> frozenset[str]:
        """Snapshot columns the enabled rules read (besides ``serial`` and ``taken_at``)."""
        used: set[str] = set()
        for rule in self.rules:
            used |= rule.fields
        return frozenset(used)

    @property
    def window_days(self) -> int:
        """How many days of history a caller should read back from ``now``.

        The longest window of any enabled rule, rounded up, plus one day so that the capture
        at or before the window's start (the baseline of ``growth``) is in the frame when captures
        are daily. At least 1. ``consecutive_increases`` and ``captures_ago`` count captures, not
        days: they see only what is in the frame.
        """
        longest = max([0.0, *(r.max_days for r in self.rules)])
        return math.ceil(longest) + 1
