"""Evaluate rules over a fleet's capture history, all drives at once.

The history (snapshot rows of many drives) is sorted once by (drive, capture time). Each
expression node then evaluates to one value per drive, as numpy arrays, so the cost of a rule is
a handful of array operations whatever the fleet size; Python loops run only over the drives a
rule fired on, to write their evidence.

Missing values use three-valued logic (Kleene's strong logic, as SQL does): a comparison with a
missing value is *unknown*; ``false and unknown`` is false, ``true or unknown`` is true, ``not
unknown`` is unknown; a rule fires only where its condition is definitely true. So a rule over
NVMe fields never fires on an ATA drive (its NVMe fields are null), even when negated.

Window semantics (``now`` defaults to the newest capture in the history):

* the *latest* capture of a drive is its newest one taken at or before ``now``; a plain field
  name means the field's value there;
* window functions look only at captures where the field has a value, and are unknown when the
  latest capture lacks it;
* the *baseline* of ``growth/growth_per_day/before/span_days(field, days)`` is the latest capture at or
  before ``now - days``; when the history has none that old, the drive's earliest capture;
* ``highest/lowest(field, days)`` use captures taken at or after ``now - days``;
* ``consecutive_increases(field, n)`` is true when the last n captures each rose strictly over the
  one before (n + 1 captures, n rises); unknown with fewer than n + 1 captures.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Callable, Iterable

import numpy as np
import pandas as pd

from triage.rules.expr import Binary, Call, Expression, Field, Literal, Node, Unary
from triage.rules.fields import FIELDS, Kind
from triage.rules.model import Rule, RuleSet, Severity
from triage.rules.template import Placeholder, Template, format_value

DAY_NS = 86_400 * 10**9

#: Columns of the frame ``evaluate`` returns (one row per drive and firing rule).
FLAG_COLUMNS = ["serial", "rule_id", "severity", "category", "title", "evidence", "taken_at"]

#: Columns of ``per_drive`` (one row per drive with at least one firing).
DRIVE_COLUMNS = ["serial", "severity", "category", "replace_drive", "rule_ids", "evidence", "action", "taken_at"]


@dataclass(frozen=True)
class Vec:
    """One value per drive (or a broadcastable scalar): the values and whether each is known."""

    kind: Kind
    values: np.ndarray
    known: np.ndarray


@dataclass(frozen=True)
class _Track:
    """A numeric field's captures that have a value, grouped per drive (sorted by time)."""

    values: np.ndarray
    times: np.ndarray
    first: np.ndarray  # per drive: index of its first valued capture
    end: np.ndarray  # per drive: one past its last valued capture
    latest_known: np.ndarray  # per drive: the latest capture has a value


class DriveHistory:
    """The history of many drives, sorted per drive by capture time, up to ``now``."""

    def __init__(self, history: pd.DataFrame, now: datetime | None = None):
        missing = {"serial", "taken_at"} - set(history.columns)
        if missing:
            raise ValueError(f"history lacks column(s): {', '.join(sorted(missing))}")
        taken = pd.to_datetime(history["taken_at"], utc=True)
        times = taken.dt.tz_convert(None).to_numpy().astype("datetime64[ns]").view("int64")
        present = (~taken.isna().to_numpy()) & history["serial"].notna().to_numpy()
        if now is None:
            self.now_ns = int(times[present].max()) if present.any() else 0
        else:
            stamp = pd.Timestamp(now)
            stamp = stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")
            self.now_ns = int(stamp.value)
        keep = np.flatnonzero(present & (times <= self.now_ns))
        codes, uniques = pd.factorize(history["serial"].to_numpy()[keep])
        order = np.lexsort((times[keep], codes))
        self._history = history
        self._rows = keep[order]  # positions in `history`, sorted by (drive, time)
        self.codes = codes[order]
        self.times = times[keep][order]
        self.serials = np.asarray(uniques, dtype=object)
        self.n_drives = len(self.serials)
        drives = np.arange(self.n_drives)
        self.first = np.searchsorted(self.codes, drives, side="left")
        self.end = np.searchsorted(self.codes, drives, side="right")
        self.latest = self.end - 1
        self._columns: dict[str, tuple[np.ndarray, np.ndarray]] = {}
        self._tracks: dict[str, _Track] = {}
        self._cache: dict[tuple, Vec] = {}

    @property
    def now(self) -> pd.Timestamp:
        return pd.Timestamp(self.now_ns, tz="UTC")

    @property
    def latest_taken_at(self) -> pd.Series:
        return pd.Series(pd.to_datetime(self.times[self.latest], utc=True), index=self.serials)

    # -- columns ------------------------------------------------------------------------------
    def _series(self, name: str) -> pd.Series:
        if name not in self._history.columns:
            raise ValueError(f"history lacks column '{name}' that a rule reads")
        return self._history[name]

    def column(self, name: str) -> tuple[np.ndarray, np.ndarray]:
        """(values, known) of a numeric field for every sorted capture row."""
        if name not in self._columns:
            series = pd.to_numeric(self._series(name), errors="coerce")
            values = series.to_numpy(dtype="float64", na_value=np.nan)[self._rows]
            self._columns[name] = (values, ~np.isnan(values))
        return self._columns[name]

    def current(self, name: str) -> Vec:
        """A field's value at each drive's latest capture."""
        kind = FIELDS[name]
        if kind == Kind.NUMBER:
            values, known = self.column(name)
            return Vec(kind, values[self.latest], known[self.latest])
        # true/false and text fields are never windowed: read only the latest rows
        raw = self._series(name).to_numpy(dtype=object)[self._rows[self.latest]]
        known = pd.notna(raw).astype(bool)
        if kind == Kind.BOOL:
            return Vec(kind, np.where(known, raw, False).astype(bool), known)
        return Vec(kind, np.where(known, raw, None).astype(object), known)

    def track(self, name: str) -> _Track:
        if name not in self._tracks:
            values, known = self.column(name)
            valued = np.flatnonzero(known)
            codes = self.codes[valued]
            drives = np.arange(self.n_drives)
            latest_known = known[self.latest]
            self._tracks[name] = _Track(
                values=values[valued],
                times=self.times[valued],
                first=np.searchsorted(codes, drives, side="left"),
                end=np.searchsorted(codes, drives, side="right"),
                latest_known=latest_known,
            )
        return self._tracks[name]

    # -- window functions ---------------------------------------------------------------------
    def _count_at_or_before(self, track: _Track, boundary_ns: int, strict: bool = False) -> np.ndarray:
        """Per drive, how many of its valued captures are at or before (or strictly before) a time.

        Captures are time-sorted within a drive, so those form a prefix of its segment.
        """
        mask = track.times < boundary_ns if strict else track.times <= boundary_ns
        cumulative = np.concatenate([[0], np.cumsum(mask)])
        return cumulative[track.end] - cumulative[track.first]

    def _unknown(self) -> Vec:
        return Vec(Kind.NUMBER, np.full(self.n_drives, np.nan), np.zeros(self.n_drives, dtype=bool))

    def _baseline(self, name: str, days: float) -> tuple[np.ndarray, np.ndarray]:
        """(index into the track of the baseline capture, valid) per drive."""
        track = self.track(name)
        older = self._count_at_or_before(track, self.now_ns - int(round(days * DAY_NS)))
        index = np.where(older > 0, track.first + older - 1, track.first)
        valid = track.latest_known & (track.end > track.first)
        return np.where(valid, index, 0), valid

    def window_value(self, function: str, name: str, days: float) -> Vec:
        track = self.track(name)
        if len(track.values) == 0:
            return self._unknown()
        last = np.maximum(track.end - 1, 0)
        if function in ("growth", "growth_per_day", "before", "span_days"):
            base, valid = self._baseline(name, days)
            if function == "before":
                return Vec(Kind.NUMBER, track.values[base], valid)
            if function == "growth":
                return Vec(Kind.NUMBER, track.values[last] - track.values[base], valid)
            span = (track.times[last] - track.times[base]) / DAY_NS
            if function == "span_days":
                return Vec(Kind.NUMBER, span, valid)
            with np.errstate(divide="ignore", invalid="ignore"):
                per_day = (track.values[last] - track.values[base]) / span
            return Vec(Kind.NUMBER, per_day, valid & (span > 0))
        # highest / lowest: captures in [now - days, now] are a suffix of each drive's segment
        before = self._count_at_or_before(track, self.now_ns - int(round(days * DAY_NS)), strict=True)
        start = track.first + before
        nonempty = start < track.end
        # mark window rows: +1 at each start, -1 at each end, running sum > 0
        marks = np.zeros(len(track.values) + 1, dtype=np.int64)
        np.add.at(marks, start[nonempty], 1)
        np.add.at(marks, track.end[nonempty], -1)
        in_window = np.cumsum(marks[:-1]) > 0
        reduce = np.maximum if function == "highest" else np.minimum
        out = np.full(self.n_drives, np.nan)
        if nonempty.any():
            # window rows of consecutive drives are contiguous in the compressed array
            compressed = track.values[in_window]
            lengths = (track.end - start)[nonempty]
            offsets = np.concatenate([[0], np.cumsum(lengths)[:-1]])
            out[nonempty] = reduce.reduceat(compressed, offsets)
        return Vec(Kind.NUMBER, out, nonempty & track.latest_known)

    def count_value(self, function: str, name: str, n: int) -> Vec:
        track = self.track(name)
        if len(track.values) == 0:
            nothing = self._unknown()
            if function == "consecutive_increases":
                return Vec(Kind.BOOL, nothing.known.copy(), nothing.known)
            return nothing
        last = track.end - 1
        valid = track.latest_known & ((track.end - track.first) >= n + 1)
        if function == "captures_ago":
            index = np.where(valid, last - n, 0)
            return Vec(Kind.NUMBER, track.values[index], valid)
        rising = np.ones(self.n_drives, dtype=bool)
        for k in range(n):
            here = np.where(valid, last - k, 0)
            before = np.where(valid, here - 1, 0)
            rising &= track.values[here] > track.values[before]
        return Vec(Kind.BOOL, rising, valid)

    def bit_value(self, name: str, position: int) -> Vec:
        current = self.current(name)
        whole = np.where(current.known, current.values, 0).astype(np.int64)
        return Vec(Kind.BOOL, ((whole >> position) & 1).astype(bool), current.known)

    # -- expressions --------------------------------------------------------------------------
    def evaluate(self, expression: Expression) -> Vec:
        return self._eval(expression.tree)

    def _eval(self, node: Node) -> Vec:
        if isinstance(node, Literal):
            value = np.array(node.value, dtype=object if node.kind == Kind.TEXT else None)
            return Vec(node.kind, value, np.array(True))
        if isinstance(node, Field):
            return self.current(node.name)
        if isinstance(node, Call):
            key = (node.name, *(a.name if isinstance(a, Field) else a.value for a in node.args))  # type: ignore[union-attr]
            if key not in self._cache:
                self._cache[key] = self._call(node)
            return self._cache[key]
        if isinstance(node, Unary):
            operand = self._eval(node.operand)
            if node.op == "not":
                return Vec(Kind.BOOL, ~operand.values.astype(bool), operand.known)
            return Vec(Kind.NUMBER, -operand.values, operand.known)
        assert isinstance(node, Binary)
        left, right = self._eval(node.left), self._eval(node.right)
        return _BINARY[node.op](left, right)

    def _call(self, node: Call) -> Vec:
        field = node.args[0]
        assert isinstance(field, Field)
        name = node.name
        if name == "is_null":
            current = self.current(field.name)
            return Vec(Kind.BOOL, ~current.known, np.ones_like(current.known))
        argument = node.args[1]
        assert isinstance(argument, Literal)
        if name == "bit":
            return self.bit_value(field.name, int(argument.value))
        if name in ("consecutive_increases", "captures_ago"):
            return self.count_value(name, field.name, int(argument.value))
        return self.window_value(name, field.name, float(argument.value))

    def fires(self, expression: Expression) -> np.ndarray:
        """Per drive: the condition is definitely true."""
        result = self.evaluate(expression)
        return np.broadcast_to(result.known & result.values.astype(bool), (self.n_drives,))

    def render(self, template: Template, drives: np.ndarray) -> list[str]:
        """The template's text for each of ``drives`` (indexes into ``serials``)."""
        pieces: list[list[str]] = []
        for part in template.parts:
            if isinstance(part, str):
                pieces.append([part] * len(drives))
                continue
            assert isinstance(part, Placeholder)
            vec = self.evaluate(part.expression)
            values = np.broadcast_to(vec.values, (self.n_drives,))[drives].tolist()
            known = np.broadcast_to(vec.known, (self.n_drives,))[drives].tolist()
            pieces.append([format_value(v, k, part.spec) for v, k in zip(values, known)])
        return ["".join(row) for row in zip(*pieces)] if pieces else [""] * len(drives)


# -- binary operators on Vec --------------------------------------------------------------------


def _and(a: Vec, b: Vec) -> Vec:
    a_true, b_true = a.known & a.values, b.known & b.values
    a_false, b_false = a.known & ~a.values, b.known & ~b.values
    return Vec(Kind.BOOL, a_true & b_true, (a.known & b.known) | a_false | b_false)


def _or(a: Vec, b: Vec) -> Vec:
    a_true, b_true = a.known & a.values, b.known & b.values
    return Vec(Kind.BOOL, a_true | b_true, (a.known & b.known) | a_true | b_true)


def _arithmetic(op: Callable[[np.ndarray, np.ndarray], np.ndarray]) -> Callable[[Vec, Vec], Vec]:
    def apply(a: Vec, b: Vec) -> Vec:
        with np.errstate(all="ignore"):
            values = op(a.values.astype(float), b.values.astype(float))
        return Vec(Kind.NUMBER, values, a.known & b.known & np.isfinite(values))

    return apply


def _comparison(op: Callable[[np.ndarray, np.ndarray], np.ndarray]) -> Callable[[Vec, Vec], Vec]:
    def apply(a: Vec, b: Vec) -> Vec:
        with np.errstate(invalid="ignore"):
            values = np.asarray(op(a.values, b.values)).astype(bool)
        return Vec(Kind.BOOL, values, a.known & b.known)

    return apply


_BINARY: dict[str, Callable[[Vec, Vec], Vec]] = {
    "and": _and,
    "or": _or,
    "+": _arithmetic(np.add),
    "-": _arithmetic(np.subtract),
    "*": _arithmetic(np.multiply),
    "/": _arithmetic(np.divide),
    "==": _comparison(lambda x, y: x == y),
    "!=": _comparison(lambda x, y: x != y),
    "<": _comparison(np.less),
    "<=": _comparison(np.less_equal),
    ">": _comparison(np.greater),
    ">=": _comparison(np.greater_equal),
}


# -- public entry points ------------------------------------------------------------------------


def evaluate(ruleset: RuleSet | Iterable[Rule], history: pd.DataFrame, now: datetime | None = None) -> pd.DataFrame:
    """Fire every enabled rule on every drive's latest state and recent history.

    ``history``: snapshot rows (``triage.store.schema.SNAPSHOTS`` columns; at least ``serial``,
    ``taken_at`` and the fields in ``ruleset.fields``) reaching ``ruleset.window_days`` back from
    ``now``. Rows taken after ``now`` are ignored. Returns one row per (drive, fired rule) with
    ``FLAG_COLUMNS``, most severe first, then by serial, then in rule order; ``severity`` and
    ``category`` hold the plain strings (``Severity(value)`` gives the enum back).
    """
    rules = ruleset.rules if isinstance(ruleset, RuleSet) else [r for r in ruleset if r.enabled]
    drives = DriveHistory(history, now)
    needed = set().union(*(r.fields for r in rules)) if rules else set()
    missing = sorted(needed - set(history.columns))
    if missing:
        raise ValueError(f"history lacks column(s) the rules read: {', '.join(missing)}")
    frames = []
    latest_times = pd.to_datetime(drives.times[drives.latest], utc=True) if drives.n_drives else None
    for order, rule in enumerate(rules):
        if drives.n_drives == 0:
            break
        fired = np.flatnonzero(drives.fires(rule.when))
        if len(fired) == 0:
            continue
        frames.append(
            pd.DataFrame(
                {
                    "serial": drives.serials[fired],
                    "rule_id": rule.id,
                    "severity": rule.severity.value,
                    "category": rule.category.value,
                    "title": rule.title,
                    "evidence": drives.render(rule.explain, fired),
                    "taken_at": latest_times[fired],
                    "_rank": rule.severity.rank,
                    "_order": order,
                }
            )
        )
    if not frames:
        return _empty_flags()
    flags = pd.concat(frames, ignore_index=True)
    flags = flags.sort_values(["_rank", "serial", "_order"], ascending=[False, True, True], kind="stable")
    return flags.drop(columns=["_rank", "_order"]).reset_index(drop=True)


def _empty_flags() -> pd.DataFrame:
    frame = pd.DataFrame({c: pd.Series(dtype=object) for c in FLAG_COLUMNS})
    frame["taken_at"] = pd.Series(dtype="datetime64[ns, UTC]")
    return frame


def per_drive(flags: pd.DataFrame) -> pd.DataFrame:
    """Collapse ``evaluate``'s output to one row per drive (``DRIVE_COLUMNS``), most urgent first.

    ``severity``/``category``/``action`` are those of the drive's most severe firing;
    ``replace_drive`` is true when that severity calls for replacing the drive (check-path and watch
    do not); ``rule_ids`` and ``evidence`` list every firing, most severe first, joined by
    ", " and "; ".
    """
    if flags.empty:
        frame = pd.DataFrame({c: pd.Series(dtype=object) for c in DRIVE_COLUMNS})
        frame["replace_drive"] = pd.Series(dtype=bool)
        return frame
    ranked = flags.assign(_rank=flags["severity"].map(lambda s: Severity(s).rank))
    ranked = ranked.sort_values(["_rank"], ascending=False, kind="stable")
    grouped = ranked.groupby("serial", sort=False)
    drives = grouped.agg(
        severity=("severity", "first"),
        category=("category", "first"),
        rule_ids=("rule_id", ", ".join),
        evidence=("evidence", "; ".join),
        taken_at=("taken_at", "first"),
        _rank=("_rank", "first"),
    ).reset_index()
    drives["replace_drive"] = drives["severity"].map(lambda s: Severity(s).replaces_drive).astype(bool)
    drives["action"] = drives["severity"].map(lambda s: Severity(s).action)
    drives = drives.sort_values(["_rank", "serial"], ascending=[False, True], kind="stable")
    return drives[DRIVE_COLUMNS].reset_index(drop=True)
