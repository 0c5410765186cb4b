"""What a ranked report shows, as plain rows: the drives the operator's filters pick, the drives,
hosts and groups to warn about, and the time of the newest data.

A ``RankView`` is made from a computed ranking (``view_of``) or read straight from a saved one
(``triage.risk.saved.load_view``). The second way needs neither pandas nor the whole ranking in
memory, which is what lets ``triage rank`` answer at 100k drives in well under a second. Both go
through ``RowFilter`` and ``silence_lines`` here, so a saved ranking and a computed one show the
same rows and the same warnings. Nothing in this module imports pandas.
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Sequence

from triage.risk.score import SEVERITIES, missing, moment_text

#: A report whose newest capture is older than this warns; a drive, host or site whose newest
#: capture is this much older than the fleet's newest is "not reporting". Common practice, no
#: source: a nightly capture plus a missed night's slack.
STALE_HOURS = 36.0


@dataclass
class RankView:
    drives: list[dict]  # the rows shown, most urgent first (rank.RANK_COLUMNS)
    silent: list[dict]  # drives not reporting (rank.SILENT_REPORT_COLUMNS)
    not_reporting: list[dict]  # silent drives rolled up to hosts and sites (rank.NOT_REPORTING_COLUMNS)
    degraded: list[dict]  # groups that lost a member (groups.group_risk's columns, with the caution)
    as_of: datetime | None  # the newest capture used
    horizon_days: float | None
    model_used: bool
    notes: list[str] = field(default_factory=list)


def plain(value):
    """A stored value as plain Python: None for every kind of missing, numpy scalars and arrays
    (``tolist``) as Python values, lists item by item; times stay times (``pd.Timestamp`` is a
    ``datetime``)."""
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if hasattr(value, "tolist") and not isinstance(value, datetime):  # numpy: a scalar, or a list column's array
        return plain(value.tolist())
    return None if missing(value) else value


def rows_of(frame) -> list[dict]:
    """A frame's rows as dicts of plain values (``plain``)."""
    return [{column: plain(value) for column, value in row.items()} for row in frame.to_dict("records")]


def view_of(result, drives) -> RankView:
    """The view of a computed ``rank.RankResult``, ``drives`` being the rows to show (a filtered
    slice of ``result.drives``)."""
    groups = result.groups
    degraded = groups[groups["degraded"].astype(bool)] if len(groups) else groups
    return RankView(rows_of(drives), rows_of(result.silent), rows_of(result.not_reporting), rows_of(degraded),
                    result.as_of, result.horizon_days, bool(result.model_used), list(result.notes))


def site_of(host) -> str | None:
    """A host's site: its name up to the first '-' or '.' (fleet naming like ``ash-r3-n07``)."""
    if not isinstance(host, str):
        return None
    for sep in ("-", "."):
        host = host.split(sep, 1)[0]
    return host


@dataclass(frozen=True)
class RowFilter:
    """Which ranked drives a report shows: those matching every filter given, in rank order, at
    most ``top``. ``host``, ``site`` (``site_of``) and ``group``: fnmatch patterns, any pattern
    of a list matching; ``severity``: the action tiers kept; ``flagged_only``: drop drives no rule
    flagged."""

    host: Sequence[str] = ()
    site: Sequence[str] = ()
    group: Sequence[str] = ()
    severity: Sequence[str] = ()
    flagged_only: bool = False
    top: int | None = None

    def __post_init__(self) -> None:
        unknown = set(self.severity) - set(SEVERITIES)
        if unknown:
            raise ValueError(f"unknown severity {', '.join(sorted(unknown))}; use one of {', '.join(SEVERITIES)}")

    @property
    def selects(self) -> bool:
        """True when a filter besides ``top`` is given (every drive must then be looked at)."""
        return bool(self.host or self.site or self.group or self.severity or self.flagged_only)

    def kept(self, hosts: Sequence, groups: Sequence, severities: Sequence,
             rule_counts: Sequence[int] = ()) -> list[int]:
        """Positions of the drives kept, given each drive's host, group, tier and number of rules
        fired (read only with ``flagged_only``)."""

        def test(values: Sequence, patterns: Sequence[str], key=lambda v: v) -> list[bool]:
            # each distinct value matched once: a fleet has 100,000s of drives but few hosts and groups
            verdict = {v: isinstance(key(v), str) and any(fnmatch.fnmatchcase(key(v), p) for p in patterns)
                       for v in set(values)}
            return [verdict[v] for v in values]

        tests = []
        if self.host:
            tests.append(test(hosts, self.host))
        if self.site:
            tests.append(test(hosts, self.site, site_of))
        if self.group:
            tests.append(test(groups, self.group))
        if self.severity:
            wanted = set(self.severity)
            tests.append([s in wanted for s in severities])
        if self.flagged_only:
            tests.append([count > 0 for count in rule_counts])
        kept = [i for i, passes in enumerate(zip(*tests)) if all(passes)] if tests else range(len(hosts))
        return list(kept[:self.top] if self.top is not None else kept)


def data_age_hours(as_of: datetime | None, now: datetime | None = None) -> float | None:
    """Hours between the newest capture and ``now``; None when there is no capture at all.
    A time without a zone is UTC (the store keeps UTC)."""
    if as_of is None:
        return None
    now = now or datetime.now(timezone.utc)
    return (_aware(now) - _aware(as_of)).total_seconds() / 3600.0


def _aware(moment: datetime) -> datetime:
    return moment if moment.tzinfo else moment.replace(tzinfo=timezone.utc)


def stale_warning(as_of: datetime | None, *, now: datetime | None = None,
                  stale_hours: float | None = STALE_HOURS) -> str | None:
    """A warning when the newest capture is older than ``stale_hours`` (None: not checked)."""
    age = data_age_hours(as_of, now)
    if stale_hours is None or age is None or age <= stale_hours:
        return None
    return (f"the newest capture is {age:.0f} h old (as of {moment_text(as_of)}; limit {stale_hours:g} h): "
            "captures may have stopped arriving")


def silence_lines(as_of: datetime | None, not_reporting: list[dict], *, now: datetime | None = None,
                  stale_hours: float | None = STALE_HOURS) -> list[str]:
    """What the report cannot see: no capture at all, a newest capture older than ``stale_hours``
    (None: not checked), and each site, host or drive not reporting (``not_reporting``: rows of
    rank.NOT_REPORTING_COLUMNS). Empty when all is heard; otherwise the run's exit code is
    Exit.NOT_REPORTING."""
    if as_of is None:
        return ["no capture in the store at all: nothing is reporting"]
    stale = stale_warning(as_of, now=now, stale_hours=stale_hours)
    lines = [stale] if stale else []
    for row in not_reporting:
        scope = row["scope"]
        size = (f"{row['hosts']} host(s), {row['drives']} drive(s)" if scope == "site"
                else f"{row['drives']} drive(s)" if scope == "host" else "")
        lines.append(f"not reporting: {scope} {row['name']}" + (f" ({size})" if size else "")
                     + f", last seen {moment_text(row['last_seen'])}")
    return lines
