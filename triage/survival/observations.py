"""Snapshots + removals -> one observation per drive, and covariate episodes for the Cox model.

Age is power-on hours. A drive joins the fleet (its first snapshot) at some age ``entry_hours``
and leaves observation at ``exit_hours``: its removal, or its last snapshot if it is still in
service. Every estimator downstream treats the drive as *at risk only on (entry, exit]* -- left
truncation, or delayed entry (Klein & Moeschberger, Survival Analysis, 2nd ed., section 3.4).
A drive first seen at 20,000 hours tells us nothing about hours 0-20,000: had it failed then, we
would never have seen it. Counting it from hour zero inflates survival at young ages
(docs/survival.md shows by how much).

Reading a large store happens in week-long chunks, and each chunk is boiled down at once to the
rows that matter (each drive's first and last snapshot, and the snapshots where its covariates
changed) and merged into what was kept so far, so a 9-million-row table never has to sit in
memory whole:

    scan_frame / scan_store  ->  Scan (reduced rows + data-quality findings)
    observations(scan, removals, ...)  ->  Observations (drive-period table, episodes, exclusions)

A drive's history is cut into periods: at each removal it came back from (the removal keeps
its event; the drive re-enters at its age when seen again) and at each change of a ``by`` key
such as the firmware (exposure before the first capture showing the new value counts for the
old one). Most drives have one period; ``docs/survival.md`` section 1 has the rules.

Exit age of a period ended by a removal: the power-on hours of its last snapshot plus the
wall-clock hours from that snapshot to the removal -- fleet drives run around the clock. A
removal stamped up to ``REMOVAL_TOLERANCE`` before the period's last snapshot (a log written at
the start of the day) is taken to happen at that last snapshot.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from typing import Callable, Iterable, Sequence

import numpy as np
import pandas as pd

COHORT_COLUMNS = ("model", "firmware", "bus", "user_capacity_bytes")
#: Cohort keys that were renamed with their store column (store format 2): old -> new.
RENAMED_COHORT_KEYS = {"capacity_bytes": "user_capacity_bytes"}

#: Snapshot columns the covariates are built from (all read with projection; nothing else is).
COVARIATE_SOURCES = (
    "temperature_c",
    "reallocated_sectors",
    "reallocation_events",
    "pending_sectors",
    "offline_uncorrectable",
    "reported_uncorrectable",
    "command_timeouts",
    "nvme_critical_warning",
    "nvme_spare_pct",
    "nvme_spare_threshold_pct",
    "nvme_media_errors",
)
SNAPSHOT_COLUMNS = ("serial", "taken_at", "power_on_hours", *COHORT_COLUMNS, *COVARIATE_SOURCES)
REMOVAL_COLUMNS = ("serial", "removed_at", "reason")

#: Covariates for the Cox model, derived in ``covariate_features``. Counts enter as log1p
#: (a drive with 1,000 reallocated sectors is not 1,000 times worse than one with 1) and as
#: "has any" flags (the first reallocation is the news); temperature in bands (below).
FEATURES = (
    "any_reallocated",
    "log_reallocated",
    "any_pending",
    "log_pending",
    "any_uncorrectable",
    "log_uncorrectable",
    "log_command_timeouts",
    "nvme_warning",
    "nvme_spare_low",
    "temperature_band",
)
#: Temperature enters as a band: 0 below 45 degC (the reference), 1 from 45, 2 from 55 degC.
#: Nightly readings wobble by a degree or two; every band edge a drive sits near splits its
#: history at each crossing, so the edges are few and at the warm end, where heat matters:
#: with 5-degree steps nine episodes in ten were temperature wobble (benchmarks/fit.py), with
#: these edges about one in two. 55 degC is about where disk operating ranges end (from
#: memory); the edges are common practice, no source.
TEMPERATURE_BAND_EDGES_C = (45.0, 55.0)

#: Power-on hours may run ahead of the wall clock by this much between two snapshots before the
#: drive is excluded: +2 h for whole-hour counters and capture-host clock skew, +1 % for clock
#: drift (common practice, no source). More than that means the counter is not in hours.
JUMP_SLACK_HOURS = 2.0
JUMP_RATE = 0.01
REMOVAL_TOLERANCE = timedelta(hours=24)

#: The removal reasons that end a period with an event, by event definition. ``failures`` (the
#: default) censors a proactive pull: many pulled drives were healthy, and counting them as
#: failures bends the hazard towards whenever pulls happen (docs/survival.md, section 1).
#: ``replacements`` is what an operator replaces, the measure behind an ARR.
EVENT_DEFINITIONS = {"failures": ("failed",), "replacements": ("failed", "proactive")}
EVENT_REASONS = {True: EVENT_DEFINITIONS["replacements"], False: EVENT_DEFINITIONS["failures"]}
#: Most telling first: several records of one pull keep the first of these.
KNOWN_REASONS = ("failed", "proactive", "retired")

_NS_PER_HOUR = 3_600_000_000_000
_NS_PER_DAY = 24 * _NS_PER_HOUR


# -- covariates -----------------------------------------------------------------------------

def _count(frame: pd.DataFrame, column: str) -> np.ndarray:
    """A counter column as float with missing -> 0 (an absent counter is no evidence)."""
    if column not in frame:
        return np.zeros(len(frame))
    values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    return np.clip(np.nan_to_num(values, nan=0.0), 0.0, None)


def covariate_features(frame: pd.DataFrame) -> pd.DataFrame:
    """The model covariates (``FEATURES``) of each snapshot row, as float32."""
    reallocated = _count(frame, "reallocated_sectors")
    pending = _count(frame, "pending_sectors")
    uncorrectable = (_count(frame, "offline_uncorrectable") + _count(frame, "reported_uncorrectable")
                     + _count(frame, "nvme_media_errors"))
    spare = pd.to_numeric(frame.get("nvme_spare_pct"), errors="coerce") if "nvme_spare_pct" in frame else None
    spare_threshold = (pd.to_numeric(frame.get("nvme_spare_threshold_pct"), errors="coerce")
                       if "nvme_spare_threshold_pct" in frame else None)
    if spare is not None and spare_threshold is not None:
        spare_low = (spare.to_numpy(dtype=float, na_value=np.nan)
                     <= spare_threshold.to_numpy(dtype=float, na_value=np.nan))
    else:
        spare_low = np.zeros(len(frame), dtype=bool)
    if "temperature_c" in frame:
        temperature = pd.to_numeric(frame["temperature_c"], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    else:
        temperature = np.full(len(frame), np.nan)
    # A missing reading sits in the reference band (contributes nothing) rather than dropping the row.
    band = np.digitize(np.nan_to_num(temperature, nan=-np.inf), TEMPERATURE_BAND_EDGES_C)
    out = {
        "any_reallocated": (reallocated > 0) | (_count(frame, "reallocation_events") > 0),
        "log_reallocated": np.log1p(reallocated),
        "any_pending": pending > 0,
        "log_pending": np.log1p(pending),
        "any_uncorrectable": uncorrectable > 0,
        "log_uncorrectable": np.log1p(uncorrectable),
        "log_command_timeouts": np.log1p(_count(frame, "command_timeouts")),
        "nvme_warning": _count(frame, "nvme_critical_warning") > 0,
        "nvme_spare_low": spare_low,
        "temperature_band": band,
    }
    return pd.DataFrame({k: np.asarray(v, dtype=np.float32) for k, v in out.items()}, index=frame.index)


# -- cohorts --------------------------------------------------------------------------------

def check_by(by: Sequence[str] | str) -> tuple[str, ...]:
    """Validate a cohort key list (``"model,firmware"`` or a sequence)."""
    if isinstance(by, str):
        by = [part.strip() for part in by.split(",") if part.strip()]
    by = tuple(by)
    renamed = [c for c in by if c in RENAMED_COHORT_KEYS]
    if renamed:
        raise ValueError("; ".join(f"cohort key '{c}' is now '{RENAMED_COHORT_KEYS[c]}'" for c in renamed))
    unknown = [c for c in by if c not in COHORT_COLUMNS]
    if not by or unknown:
        raise ValueError(f"cohort keys must be among {', '.join(COHORT_COLUMNS)}; got {', '.join(by) or 'nothing'}")
    if len(set(by)) != len(by):
        raise ValueError(f"cohort key repeated in {', '.join(by)}")
    return by


def format_capacity(capacity) -> str:
    """Decimal units as on drive labels: 8000000000000 -> '8 TB', 1920383410176 -> '1.92 TB'."""
    if capacity is None or pd.isna(capacity):
        return "capacity unknown"
    capacity = float(capacity)
    for unit, size in (("TB", 1e12), ("GB", 1e9)):
        if capacity >= size:
            return f"{capacity / size:.2f}".rstrip("0").rstrip(".") + f" {unit}"
    return f"{int(capacity)} B"


def cohort_labels(frame: pd.DataFrame, by: Sequence[str]) -> pd.Series:
    """One readable label per row: the ``by`` values joined by ' / ' (e.g. 'QH-HD8T-A / QF12')."""
    parts = []
    for column in by:
        values = frame[column]
        if column == "user_capacity_bytes":
            uniques = pd.unique(values)
            mapping = {v: format_capacity(v) for v in uniques}
            parts.append(values.map(mapping).astype(str))
        else:
            parts.append(values.astype(object).where(values.notna(), f"{column} unknown").astype(str))
    label = parts[0]
    for part in parts[1:]:
        label = label + " / " + part
    return label.rename("cohort")


# -- scanning -------------------------------------------------------------------------------

@dataclass
class Scan:
    """Snapshots boiled down to the rows that matter, plus what was found wrong on the way."""

    rows: pd.DataFrame  # reduced snapshot rows (see module docstring), with FEATURES
    problems: dict[str, str] = field(default_factory=dict)  # serial -> reason to exclude
    serials_seen: set = field(default_factory=set)  # every serial with any snapshot row
    rows_read: int = 0
    first_taken_at: pd.Timestamp | None = None
    last_taken_at: pd.Timestamp | None = None

    @property
    def empty(self) -> bool:
        return self.rows_read == 0


def _ns(stamps: pd.Series) -> np.ndarray:
    """UTC timestamps as int64 nanoseconds since the epoch."""
    return pd.to_datetime(stamps, utc=True).dt.tz_convert(None).to_numpy(dtype="datetime64[ns]").view(np.int64)


def _reduce_chunk(frame: pd.DataFrame, chunk: int, problems: dict[str, str],
                  marks: dict | None = None) -> pd.DataFrame:
    """Keep each drive's first/last row in this chunk, every row where its covariates or a
    cohort key changed, and the rows either side of each of its removals (``_removal_pins``).

    Works on row numbers: the chunk is sorted as an index array and only the kept rows (a
    fraction of a nightly history) are ever copied out of the frame.
    """
    poh_all = pd.to_numeric(frame["power_on_hours"], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    usable = np.flatnonzero(frame["serial"].notna().to_numpy() & ~np.isnan(poh_all))
    if len(usable) == 0:
        return frame.iloc[:0].assign(chunk=pd.Series(dtype=np.int32))
    serials_all = frame["serial"].to_numpy()
    codes, _ = pd.factorize(serials_all[usable])
    stamp = _ns(frame["taken_at"])[usable]
    within = np.lexsort((stamp, codes))
    order = usable[within]  # frame row numbers, by drive then time
    codes, stamp, poh = codes[within], stamp[within], poh_all[order]
    serials = serials_all[order]

    same = np.zeros(len(order), dtype=bool)
    same[1:] = codes[1:] == codes[:-1]
    _flag_counter_problems(serials, same, stamp, poh, problems)

    values = covariate_features(frame)[list(FEATURES)].to_numpy()[order]
    changed = np.ones(len(order), dtype=bool)
    changed[1:] = np.any(values[1:] != values[:-1], axis=1) | ~same[1:]
    # a cohort key that changes (a firmware update) starts a new cohort period at that snapshot
    for column in COHORT_COLUMNS:
        if column in frame.columns:
            key, _ = pd.factorize(frame[column].to_numpy()[order], use_na_sentinel=True)
            changed[1:] |= key[1:] != key[:-1]
    last = np.ones(len(order), dtype=bool)
    last[:-1] = ~same[1:]
    first = ~same
    keep = changed | last | _removal_pins(serials, same, stamp, marks)
    kept = frame.iloc[order[keep], [frame.columns.get_loc(c) for c in SNAPSHOT_COLUMNS if c in frame.columns]]
    kept = kept.reset_index(drop=True)
    kept["power_on_hours"] = poh[keep]
    kept["taken_at"] = pd.to_datetime(kept["taken_at"], utc=True)
    for j, column in enumerate(FEATURES):
        kept[column] = values[keep, j]
    kept["chunk"] = np.int32(chunk)
    kept["chunk_first"] = first[keep]
    kept["chunk_last"] = last[keep]
    return kept


def _removal_pins(serials: np.ndarray, same: np.ndarray, stamp_ns: np.ndarray, marks: dict | None) -> np.ndarray:
    """The snapshots either side of each removal: the last one at or before it (plus the
    tolerance) and the first one after. A drive seen again after a removal (back from repair)
    re-enters at the age of that first snapshot, so neither may be reduced away."""
    pinned = np.zeros(len(serials), dtype=bool)
    if not marks or len(serials) == 0:
        return pinned
    starts = np.flatnonzero(~same)
    ends = np.r_[starts[1:], len(serials)]
    # a dict lookup per drive: np.isin on strings compares every drive with every removal
    removed = np.fromiter((serial in marks for serial in serials[starts]), dtype=bool, count=len(starts))
    for lo, hi in zip(starts[removed], ends[removed]):
        after = lo + np.searchsorted(stamp_ns[lo:hi], marks[serials[lo]], side="right")
        pinned[after[after < hi]] = True
        pinned[after[after > lo] - 1] = True
    return pinned


def removal_marks(removals: pd.DataFrame | None) -> dict | None:
    """serial -> sorted removal times plus ``REMOVAL_TOLERANCE`` (ns), for the scan's pins."""
    if removals is None or len(removals) == 0:
        return None
    removals = removals[removals["serial"].notna() & removals["removed_at"].notna()]
    stamps = _ns(removals["removed_at"]) + int(REMOVAL_TOLERANCE / timedelta(microseconds=1)) * 1000
    frame = pd.DataFrame({"serial": removals["serial"].to_numpy(), "mark": stamps}).sort_values("mark")
    return {serial: group.to_numpy(dtype=np.int64) for serial, group in frame.groupby("serial")["mark"]}


def _flag_counter_problems(serials, same, stamp_ns, poh, problems: dict[str, str]) -> None:
    """Record drives whose power-on hours run backwards or faster than the wall clock."""
    if len(poh) < 2:
        return
    d_poh = np.diff(poh)
    d_wall = np.diff(stamp_ns) / _NS_PER_HOUR
    pair = same[1:]
    backwards = pair & (d_poh < 0)
    jump = pair & (d_poh > d_wall * (1 + JUMP_RATE) + JUMP_SLACK_HOURS)
    for i in np.flatnonzero(backwards | jump):
        serial = serials[i + 1]
        if serial in problems:
            continue
        when = pd.Timestamp(stamp_ns[i + 1], tz="UTC").strftime("%Y-%m-%d %H:%M")
        if backwards[i]:
            problems[serial] = (f"power_on_hours ran backwards from {poh[i]:.0f} to {poh[i + 1]:.0f} "
                                f"at {when}")
        else:
            problems[serial] = (f"power_on_hours jumped {d_poh[i]:.0f} h in {d_wall[i]:.1f} h of wall-clock "
                                f"time at {when}")


def scan_frame(snapshots: pd.DataFrame, cut: pd.Timestamp | None = None,
               removals: pd.DataFrame | None = None) -> Scan:
    """Scan an in-memory snapshot frame (tests, small stores); ``cut`` splits it into two chunks.

    ``removals``: the removal log, so the snapshots either side of each removal are kept and a
    drive back from repair re-enters at its true age (without it, at its next kept snapshot).
    """
    missing = [c for c in ("serial", "taken_at", "power_on_hours") if c not in snapshots.columns]
    if missing:
        raise ValueError(f"snapshots lack column(s) {', '.join(missing)}")
    taken = pd.to_datetime(snapshots["taken_at"], utc=True)
    if cut is None:
        pieces = [(0, snapshots)]
    else:
        pieces = [(0, snapshots[(taken < cut).to_numpy()]), (1, snapshots[(taken >= cut).to_numpy()])]
    return _scan_pieces(iter(pieces), removal_marks(removals))


def scan_store(store, chunk_days: int = 7, cut: pd.Timestamp | None = None,
               progress: Callable[[int, int], None] | None = None, removals: pd.DataFrame | None = None,
               engine=None) -> Scan:
    """Scan the store's snapshots in chunks of ``chunk_days`` days (one boundary falls on ``cut``);
    ``removals`` as in ``scan_frame``.

    ``engine`` (``triage.engine``): where each chunk is read and boiled down (``scan_read``);
    the chunks are merged here in their order, so every engine gives the same scan. None: here.
    """
    from triage.survival.tasks import SnapshotRead, task_store  # noqa: PLC0415

    days = store.days("snapshots")
    if not days:
        return Scan(rows=pd.DataFrame(columns=[*SNAPSHOT_COLUMNS, *FEATURES]))
    start = pd.Timestamp(days[0], tz="UTC")
    end = pd.Timestamp(days[-1], tz="UTC") + pd.Timedelta(days=1)
    bounds = list(pd.date_range(start, end, freq=f"{chunk_days}D"))
    if bounds[-1] < end:
        bounds.append(end)
    if cut is not None and start < cut < end and cut not in bounds:
        bounds = sorted([*bounds, cut])
    windows = list(zip(bounds[:-1], bounds[1:]))
    marks = removal_marks(removals)
    source = task_store(store, engine)
    items = [ScanRead(SnapshotRead(source, SNAPSHOT_COLUMNS, lo, hi),
                      segment=int(cut is not None and lo >= cut),  # the held-out side is its own segment
                      marks=marks)
             for lo, hi in windows]

    def chunks():
        done = engine.map(scan_read, items) if engine is not None else (scan_read(item) for item in items)
        for i, chunk in enumerate(done):
            if progress:
                progress(i, len(windows))
            yield chunk
        if progress:
            progress(len(windows), len(windows))

    return _merge_chunks(chunks(), marks)


@dataclass(frozen=True)
class ScanRead:
    """A map task of ``scan_store``: read one chunk of days and boil it down."""

    read: object  # tasks.SnapshotRead
    segment: int
    marks: dict | None


@dataclass
class ChunkScan:
    """One chunk of snapshots boiled down (``_reduce_chunk``) and what was found in it."""

    segment: int
    rows: pd.DataFrame
    problems: dict[str, str]
    serials: np.ndarray  # every serial with a row in the chunk
    rows_read: int
    first_taken_at: pd.Timestamp
    last_taken_at: pd.Timestamp


def scan_read(item: ScanRead) -> ChunkScan | None:
    """The map step of ``scan_store`` (runs on an engine's worker): None for an empty chunk."""
    return scan_chunk(item.segment, item.read.read(), item.marks)


def scan_chunk(segment: int, piece: pd.DataFrame, marks: dict | None = None) -> ChunkScan | None:
    """Boil one chunk down on its own; ``_merge_chunks`` puts the chunks together."""
    if piece.empty:
        return None
    problems: dict[str, str] = {}
    taken = pd.to_datetime(piece["taken_at"], utc=True)
    return ChunkScan(segment=segment, rows=_reduce_chunk(piece, segment, problems, marks), problems=problems,
                     serials=pd.unique(piece["serial"].dropna()), rows_read=len(piece),
                     first_taken_at=taken.min(), last_taken_at=taken.max())


def _scan_pieces(pieces: Iterable[tuple[int, pd.DataFrame]], marks: dict | None = None) -> Scan:
    """Reduce (segment, chunk) pieces as they come (``_merge_chunks``)."""
    return _merge_chunks((scan_chunk(segment, piece, marks) for segment, piece in pieces), marks)


def _merge_chunks(chunks: Iterable[ChunkScan | None], marks: dict | None = None) -> Scan:
    """Merge boiled-down chunks in their order: each is merged with what its segment kept so far
    and boiled down again, so memory holds one chunk plus about a row per drive and covariate
    change -- never the history. A segment (the training and the held-out side of a time cut)
    keeps each drive's first and last row at its own edges. A drive's first problem found, in
    the order of the chunks, is the one reported."""
    problems: dict[str, str] = {}
    seen: set = set()
    segments: dict[int, pd.DataFrame] = {}
    rows_read = 0
    first = last = None
    for chunk in chunks:
        if chunk is None:
            continue
        rows_read += chunk.rows_read
        seen.update(chunk.serials)
        first = chunk.first_taken_at if first is None else min(first, chunk.first_taken_at)
        last = chunk.last_taken_at if last is None else max(last, chunk.last_taken_at)
        for serial, reason in chunk.problems.items():
            problems.setdefault(serial, reason)
        segment, reduced = chunk.segment, chunk.rows
        if segment in segments:
            reduced = _reduce_chunk(pd.concat([segments[segment], reduced], ignore_index=True), segment, problems,
                                    marks)
        segments[segment] = reduced
    kept = [segments[k] for k in sorted(segments)]
    if not kept:
        return Scan(rows=pd.DataFrame(columns=[*SNAPSHOT_COLUMNS, *FEATURES]))
    rows = pd.concat(kept, ignore_index=True)
    codes, _ = pd.factorize(rows["serial"])
    stamp = _ns(rows["taken_at"])
    order = np.lexsort((stamp, codes))
    rows = rows.iloc[order].reset_index(drop=True)
    codes, stamp = codes[order], stamp[order]
    # Pairs straddling a chunk boundary were never compared inside a chunk: compare them now.
    same = np.zeros(len(rows), dtype=bool)
    same[1:] = codes[1:] == codes[:-1]
    boundary = np.zeros(len(rows), dtype=bool)
    boundary[1:] = same[1:] & rows["chunk_last"].to_numpy()[:-1] & rows["chunk_first"].to_numpy()[1:]
    _flag_counter_problems(rows["serial"].to_numpy(), boundary, stamp,
                           rows["power_on_hours"].to_numpy(dtype=float), problems)
    return Scan(rows=rows, problems=problems, serials_seen=seen, rows_read=rows_read,
                first_taken_at=first, last_taken_at=last)


# -- observations ---------------------------------------------------------------------------

@dataclass
class Observations:
    """One row per cohort period of a drive, the covariate episodes, and the drives left out.

    ``drives`` has a row per (drive, period): a drive's history is cut at each removal it came
    back from and at each change of a ``by`` key (a firmware update), so most drives have one
    row. ``period`` numbers a drive's rows from 0; ``returned`` marks a period that began when
    the drive came back after a removal.
    """

    drives: pd.DataFrame
    episodes: pd.DataFrame  # serial, cohort, start_hours, stop_hours, event, FEATURES
    exclusions: pd.DataFrame  # serial, reason
    by: tuple[str, ...]
    count_proactive: bool
    returns: int = 0  # drives seen again after a removal (each return starts a new period)

    @property
    def events(self) -> str:
        """The event definition in use: 'failures' or 'replacements' (``EVENT_DEFINITIONS``)."""
        return event_definition(self.count_proactive)

    def cohort(self, label: str) -> pd.DataFrame:
        return self.drives[self.drives["cohort"] == label]

    @property
    def as_of(self) -> pd.Timestamp | None:
        """The newest capture behind these observations (every report states it)."""
        if "last_taken_at" not in self.drives or self.drives.empty:
            return None
        newest = self.drives["last_taken_at"].max()
        return None if pd.isna(newest) else newest


def event_definition(count_proactive: bool) -> str:
    return "replacements" if count_proactive else "failures"


def observations(scan: Scan, removals: pd.DataFrame, by: Sequence[str] = ("model",),
                 count_proactive: bool = False, until: pd.Timestamp | None = None) -> Observations:
    """Build the drive-period table and Cox episodes from a scan and the removal log.

    ``count_proactive``: a proactive pull ends its period with an event (``replacements``);
    by default only ``failed`` does (``failures``) and a pull is censored. ``until``: use only
    snapshots and removals before this moment (the training side of a held-out time split).
    """
    by = check_by(by)
    rows = scan.rows
    if until is not None and len(rows):
        rows = rows[(rows["taken_at"] < until).to_numpy()]
    excluded = dict(scan.problems)
    # drives seen only in rows lacking power-on hours
    with_age = set(pd.unique(rows["serial"])) if len(rows) else set()
    for serial in scan.serials_seen - with_age:
        if until is None:
            excluded.setdefault(serial, "no snapshot reports power_on_hours")
    removals = _clean_removals(removals, until)
    unknown = removals[~removals["reason"].isin(KNOWN_REASONS)]
    for serial, reason in zip(unknown["serial"], unknown["reason"]):
        excluded.setdefault(serial, f"removal reason {reason!r} is not one of {', '.join(KNOWN_REASONS)}")
    removals = removals[removals["reason"].isin(KNOWN_REASONS)]
    rows = rows[~rows["serial"].isin(list(excluded))] if excluded and len(rows) else rows
    rows = rows.reset_index(drop=True)

    life, pulls, removal_problems = _lives(rows, removals)
    if removal_problems:
        excluded.update(removal_problems)
        keep = ~rows["serial"].isin(list(removal_problems)).to_numpy()
        rows, life = rows[keep].reset_index(drop=True), life[keep]
        pulls = _lives(rows, removals[~removals["serial"].isin(list(removal_problems))])[1]
    orphans = sorted(set(removals["serial"]) - set(scan.serials_seen)) if until is None else []
    for serial in orphans:
        excluded.setdefault(serial, "removal recorded but no snapshot of the drive")

    drives, period_of_row = _periods(rows, life, pulls, by, count_proactive)
    episodes = _episodes(rows, period_of_row, drives)
    exclusions = pd.DataFrame(sorted(excluded.items()), columns=["serial", "reason"])
    returns = int(drives.loc[drives["returned"].to_numpy(dtype=bool), "serial"].nunique()) if len(drives) else 0
    return Observations(drives=drives, episodes=episodes, exclusions=exclusions, by=by,
                        count_proactive=count_proactive, returns=returns)


def _clean_removals(removals: pd.DataFrame, until) -> pd.DataFrame:
    if removals is None or removals.empty:
        return pd.DataFrame({"serial": pd.Series(dtype=object),
                             "removed_at": pd.Series(dtype="datetime64[ns, UTC]"),
                             "reason": pd.Series(dtype=object)})
    removals = removals.loc[:, list(REMOVAL_COLUMNS)].copy()
    removals["removed_at"] = pd.to_datetime(removals["removed_at"], utc=True)
    removals = removals[removals["serial"].notna() & removals["removed_at"].notna()]
    if until is not None:
        removals = removals[removals["removed_at"] < until]
    return removals


def _drive_slices(serial: np.ndarray) -> dict:
    """serial -> (first row, end row) of its rows (rows sorted by serial, then time)."""
    starts = np.flatnonzero(np.r_[True, serial[1:] != serial[:-1]]) if len(serial) else np.array([], int)
    ends = np.r_[starts[1:], len(serial)]
    return dict(zip(serial[starts], zip(starts, ends)))


def _lives(rows: pd.DataFrame, removals: pd.DataFrame) -> tuple[np.ndarray, pd.DataFrame, dict[str, str]]:
    """Cut each drive's rows at its removals: ``life`` (per row: removals before it) and the pulls.

    A removal ends the life whose last snapshot is the latest at or before the removal time
    plus ``REMOVAL_TOLERANCE``; snapshots after that are the drive back from repair, a new life.
    Several records between the same two snapshots are one pull (a 'failed' then 'retired'
    for the same drive): it happened at the earliest record's time, for the most telling
    reason among them (failed before proactive before retired), so no removal counts twice
    and a later 'retired' never erases a 'failed'.
    """
    life = np.zeros(len(rows), dtype=np.int32)
    problems: dict[str, str] = {}
    pulls = []
    if len(rows) and len(removals):
        serial = rows["serial"].to_numpy()
        where = _drive_slices(serial)
        stamp = _ns(rows["taken_at"])
        tolerance = int(REMOVAL_TOLERANCE / timedelta(microseconds=1)) * 1000
        rank = {reason: i for i, reason in enumerate(KNOWN_REASONS)}
        ordered = removals.sort_values("removed_at", kind="stable")
        for name, group in ordered.groupby("serial", sort=False):
            if name not in where:
                continue
            lo, hi = where[name]
            removed = _ns(group["removed_at"])
            after_row = np.searchsorted(stamp[lo:hi], removed + tolerance, side="right") - 1
            if after_row[0] < 0:
                problems[name] = (f"removal on {group['removed_at'].iloc[0]:%Y-%m-%d} comes before the drive's "
                                  f"first snapshot ({rows['taken_at'].iloc[lo]:%Y-%m-%d})")
                continue
            reasons = group["reason"].to_numpy()
            for row in np.unique(after_row):
                these = after_row == row
                reason = min(reasons[these], key=rank.__getitem__)
                pulls.append((name, lo + int(row), int(removed[these].min()), reason))
                life[lo + int(row) + 1:hi] += 1
    frame = pd.DataFrame(pulls, columns=["serial", "row", "removed_ns", "reason"])
    return life, frame, problems


def _filled_keys(rows: pd.DataFrame, by) -> pd.DataFrame:
    """The ``by`` keys of each row, a missing value carried from the drive's nearest known one:
    a capture that lacks the firmware string is not a firmware change."""
    keys = rows[[c for c in by if c in rows.columns]].copy()
    for column in by:
        if column not in keys:
            keys[column] = None
    if keys.isna().to_numpy().any():
        grouped = keys.groupby(rows["serial"].to_numpy(), sort=False)
        keys = grouped.ffill().fillna(grouped.bfill())
    return keys[list(by)]


def _periods(rows: pd.DataFrame, life: np.ndarray, pulls: pd.DataFrame, by,
             count_proactive: bool) -> tuple[pd.DataFrame, np.ndarray]:
    """One row per (drive, life, cohort label) run of snapshots, and each row's period number.

    A period starts at its first snapshot (``entry_hours``, ``first_taken_at``). It ends at the
    first snapshot showing a new ``by`` value (the next period starts there, so exposure is
    split at that capture and a failure belongs to the cohort it ran in), at its pull (last
    snapshot's age plus the wall-clock hours to the removal), or, censored, at its last snapshot.
    """
    tail_columns = ["serial", *COHORT_COLUMNS, "taken_at", "power_on_hours", *COVARIATE_SOURCES, *FEATURES]
    if rows.empty:
        columns = {"serial": object, "cohort": object, "first_taken_at": "datetime64[ns, UTC]",
                   "entry_hours": float, **{c: object for c in COHORT_COLUMNS},
                   "last_taken_at": "datetime64[ns, UTC]", "last_hours": float,
                   **{c: float for c in (*COVARIATE_SOURCES, *FEATURES)},
                   "removal_reason": object, "exit_at": "datetime64[ns, UTC]", "exit_hours": float,
                   "drive_days": float, "event": bool, "failure": bool, "replacement": bool,
                   "period": np.int64, "returned": bool}
        return pd.DataFrame({c: pd.Series(dtype=t) for c, t in columns.items()}), np.zeros(0, dtype=np.int64)
    n = len(rows)
    serial = rows["serial"].to_numpy()
    keys = _filled_keys(rows, by)
    label = cohort_labels(keys, by).to_numpy()
    new_drive = np.r_[True, serial[1:] != serial[:-1]]
    new_life = new_drive | np.r_[False, life[1:] != life[:-1]]
    new_period = new_life | np.r_[False, label[1:] != label[:-1]]
    period_of_row = np.cumsum(new_period) - 1
    first = np.flatnonzero(new_period)
    last = np.r_[first[1:] - 1, n - 1]
    stamp = _ns(rows["taken_at"])
    poh = rows["power_on_hours"].to_numpy(dtype=float)

    exit_ns, exit_hours = stamp[last].copy(), poh[last].copy()
    following = np.minimum(last + 1, n - 1)
    by_change = (last + 1 < n) & ~new_life[following]
    exit_ns[by_change], exit_hours[by_change] = stamp[following[by_change]], poh[following[by_change]]
    reason = np.full(len(first), None, dtype=object)
    if len(pulls):
        ended = period_of_row[pulls["row"].to_numpy()]
        reason[ended] = pulls["reason"].to_numpy()
        removed_ns = np.maximum(pulls["removed_ns"].to_numpy(dtype=np.int64), stamp[last[ended]])
        exit_hours[ended] = poh[last[ended]] + (removed_ns - stamp[last[ended]]) / _NS_PER_HOUR
        exit_ns[ended] = removed_ns

    present = [c for c in tail_columns if c in rows.columns]
    drives = rows.iloc[last][present].reset_index(drop=True)
    drives = drives.rename(columns={"taken_at": "last_taken_at", "power_on_hours": "last_hours"})
    for column in COHORT_COLUMNS:
        if column in by:
            drives[column] = keys[column].to_numpy()[first]
        elif column not in drives:
            drives[column] = None
    drives.insert(1, "cohort", label[first])
    drives.insert(2, "first_taken_at", pd.to_datetime(stamp[first], utc=True))
    drives.insert(3, "entry_hours", poh[first])
    drives["last_taken_at"] = pd.to_datetime(drives["last_taken_at"], utc=True)
    # a period cut by a key change was last seen at the capture showing the change (the
    # snapshot before it may have been reduced away; its covariates are the same)
    drives.loc[by_change, "last_taken_at"] = pd.to_datetime(exit_ns[by_change], utc=True)
    drives.loc[by_change, "last_hours"] = exit_hours[by_change]
    drives["removal_reason"] = reason
    drives["exit_at"] = pd.to_datetime(exit_ns, utc=True)
    drives["exit_hours"] = exit_hours
    drives["drive_days"] = (exit_ns - stamp[first]) / _NS_PER_DAY
    drives["failure"] = drives["removal_reason"].isin(EVENT_DEFINITIONS["failures"]).to_numpy()
    drives["replacement"] = drives["removal_reason"].isin(EVENT_DEFINITIONS["replacements"]).to_numpy()
    drives["event"] = drives["removal_reason"].isin(EVENT_REASONS[count_proactive]).to_numpy()
    drive_of_period = np.cumsum(new_drive[first]) - 1
    drives["period"] = np.arange(len(first)) - np.flatnonzero(new_drive[first])[drive_of_period]
    drives["returned"] = life[first] > 0
    # keep the column order of one row per drive, the period columns after
    order = ["serial", "cohort", "first_taken_at", "entry_hours",
             *[c for c in drives.columns if c not in ("serial", "cohort", "first_taken_at", "entry_hours",
                                                      "removal_reason", "exit_at", "exit_hours", "drive_days",
                                                      "event", "failure", "replacement", "period", "returned")],
             "removal_reason", "exit_at", "exit_hours", "drive_days", "event", "failure", "replacement",
             "period", "returned"]
    return drives[order], period_of_row


def _episodes(rows: pd.DataFrame, period_of_row: np.ndarray, drives: pd.DataFrame) -> pd.DataFrame:
    """Counting-process rows (start_hours, stop_hours] with covariates constant on each.

    Consecutive snapshots of one period with the same covariates collapse into one episode; a
    covariate seen at a snapshot applies from that snapshot's age to the next change (it is
    known then, not before). A period's last episode ends at its exit age and carries its event.
    """
    columns = ["serial", "cohort", "start_hours", "stop_hours", "event", *FEATURES]
    if rows.empty or drives.empty:
        return pd.DataFrame(columns=columns)
    values = rows[list(FEATURES)].to_numpy()
    new_period = np.r_[True, period_of_row[1:] != period_of_row[:-1]]
    start = new_period.copy()
    start[1:] |= np.any(values[1:] != values[:-1], axis=1)
    ep = rows.loc[start, ["serial", "power_on_hours", *FEATURES]].reset_index(drop=True)
    ep = ep.rename(columns={"power_on_hours": "start_hours"})
    period = period_of_row[start]
    last_of_period = np.r_[period[1:] != period[:-1], True]
    stop = np.empty(len(ep))
    stop[:-1] = ep["start_hours"].to_numpy()[1:]
    stop[last_of_period] = drives["exit_hours"].to_numpy(dtype=float)[period[last_of_period]]
    ep["stop_hours"] = stop
    ep["event"] = last_of_period & drives["event"].to_numpy(dtype=bool)[period]
    ep["cohort"] = drives["cohort"].to_numpy()[period]
    # An episode without risk time (power-on hours did not advance) is dropped; its event, if
    # any, moves to the period's previous episode, which ends at that same age.
    empty = ep["stop_hours"].to_numpy() <= ep["start_hours"].to_numpy()
    carry = np.flatnonzero(empty & ep["event"].to_numpy())
    prev = carry - 1
    ok = (prev >= 0) & (period[np.maximum(prev, 0)] == period[carry])
    ep.loc[prev[ok], "event"] = True
    ep = ep[~empty].reset_index(drop=True)
    return ep[columns]


def at_risk_drives(drives: pd.DataFrame) -> pd.DataFrame:
    """Drives with observed risk time (exit age beyond entry age): the input of every estimator."""
    return drives[drives["exit_hours"].to_numpy(dtype=float) > drives["entry_hours"].to_numpy(dtype=float)]


def utc_midnight(moment: datetime | pd.Timestamp) -> pd.Timestamp:
    return pd.Timestamp(moment).tz_convert(timezone.utc).normalize()
