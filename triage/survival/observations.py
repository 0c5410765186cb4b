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
    observations(scan, removals, ...)  ->  Observations (per-drive table, episodes, exclusions)

Exit age of a removed drive: the power-on hours of its last snapshot plus the wall-clock hours
from that snapshot to the removal -- fleet drives run around the clock. A removal stamped up to
``REMOVAL_TOLERANCE`` before the drive's last snapshot (a log written at the start of the day)
is taken to happen at that last snapshot.
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

EVENT_REASONS = {True: ("failed", "proactive"), False: ("failed",)}
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


def _reduce_chunk(frame: pd.DataFrame, chunk: int, problems: dict[str, str]) -> pd.DataFrame:
    """Keep each drive's first/last row in this chunk and every row where its covariates changed.

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
    last = np.ones(len(order), dtype=bool)
    last[:-1] = ~same[1:]
    first = ~same
    keep = changed | last
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


def scan_frame(snapshots: pd.DataFrame, cut: pd.Timestamp | None = None) -> Scan:
    """Scan an in-memory snapshot frame (tests, small stores); ``cut`` splits it into two chunks."""
    missing = [c for c in ("serial", "taken_at", "power_on_hours") if c not in snapshots.columns]
    if missing:
        raise ValueError(f"snapshots lack column(s) {', '.join(missing)}")
    taken = pd.to_datetime(snapshots["taken_at"], utc=True)
    if cut is None:
        pieces = [(0, snapshots)]
    else:
        pieces = [(0, snapshots[(taken < cut).to_numpy()]), (1, snapshots[(taken >= cut).to_numpy()])]
    return _scan_pieces(iter(pieces))


def scan_store(store, chunk_days: int = 7, cut: pd.Timestamp | None = None,
               progress: Callable[[int, int], None] | None = None) -> Scan:
    """Scan the store's snapshots in chunks of ``chunk_days`` days (one boundary falls on ``cut``)."""
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

    def pieces():
        for i, (lo, hi) in enumerate(windows):
            if progress:
                progress(i, len(windows))
            segment = int(cut is not None and lo >= cut)  # the held-out side is its own segment
            yield segment, store.read("snapshots", columns=list(SNAPSHOT_COLUMNS), since=lo.to_pydatetime(),
                                      until=hi.to_pydatetime())
        if progress:
            progress(len(windows), len(windows))

    return _scan_pieces(pieces())


def _scan_pieces(pieces: Iterable[tuple[int, pd.DataFrame]]) -> Scan:
    """Reduce (segment, chunk) pieces as they come: each chunk is boiled down, then merged with
    what its segment kept so far and boiled down again, so memory holds one chunk plus about a
    row per drive and covariate change -- never the history. A segment (the training and the
    held-out side of a time cut) keeps each drive's first and last row at its own edges."""
    problems: dict[str, str] = {}
    seen: set = set()
    segments: dict[int, pd.DataFrame] = {}
    rows_read = 0
    first = last = None
    for segment, piece in pieces:
        if piece.empty:
            continue
        rows_read += len(piece)
        seen.update(pd.unique(piece["serial"].dropna()))
        taken = pd.to_datetime(piece["taken_at"], utc=True)
        first = taken.min() if first is None else min(first, taken.min())
        last = taken.max() if last is None else max(last, taken.max())
        reduced = _reduce_chunk(piece, segment, problems)
        del piece
        if segment in segments:
            reduced = _reduce_chunk(pd.concat([segments[segment], reduced], ignore_index=True), segment, problems)
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
    """One row per usable drive, the covariate episodes, and the drives left out (with why)."""

    drives: pd.DataFrame
    episodes: pd.DataFrame  # serial, cohort, start_hours, stop_hours, event, FEATURES
    exclusions: pd.DataFrame  # serial, reason
    by: tuple[str, ...]
    count_proactive: bool

    def cohort(self, label: str) -> pd.DataFrame:
        return self.drives[self.drives["cohort"] == label]

    @property
    def as_of(self) -> pd.Timestamp | None:
        """The newest capture behind these observations (every report states it)."""
        if "last_taken_at" not in self.drives or self.drives.empty:
            return None
        newest = self.drives["last_taken_at"].max()
        return None if pd.isna(newest) else newest


def observations(scan: Scan, removals: pd.DataFrame, by: Sequence[str] = ("model",),
                 count_proactive: bool = True, until: pd.Timestamp | None = None) -> Observations:
    """Build the per-drive observation table and Cox episodes from a scan and the removal log.

    ``until``: use only snapshots and removals before this moment (the training side of a
    held-out time split).
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
    rows = rows[~rows["serial"].isin(list(excluded))] if excluded and len(rows) else rows

    removals = _clean_removals(removals, until)
    drives = _per_drive(rows, by)
    drives, removal_problems = _attach_removals(drives, removals, count_proactive)
    excluded.update(removal_problems)
    if removal_problems:
        drives = drives[~drives["serial"].isin(list(removal_problems))]
        rows = rows[~rows["serial"].isin(list(removal_problems))]
    orphans = sorted(set(removals["serial"]) - set(scan.serials_seen)) if until is None else []
    for serial in orphans:
        excluded.setdefault(serial, "removal recorded but no snapshot of the drive")

    drives = drives.reset_index(drop=True)
    episodes = _episodes(rows, drives)
    exclusions = pd.DataFrame(sorted(excluded.items()), columns=["serial", "reason"])
    return Observations(drives=drives, episodes=episodes, exclusions=exclusions, by=by,
                        count_proactive=count_proactive)


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


def _per_drive(rows: pd.DataFrame, by) -> pd.DataFrame:
    """First and latest snapshot of each drive (rows are sorted by serial, taken_at)."""
    if rows.empty:
        columns = {"serial": object, "cohort": object, "first_taken_at": "datetime64[ns, UTC]",
                   "entry_hours": float, **{c: object for c in COHORT_COLUMNS},
                   "last_taken_at": "datetime64[ns, UTC]", "last_hours": float,
                   **{c: float for c in (*COVARIATE_SOURCES, *FEATURES)}}
        return pd.DataFrame({c: pd.Series(dtype=t) for c, t in columns.items()})
    serial = rows["serial"].to_numpy()
    is_first = np.ones(len(rows), dtype=bool)
    is_first[1:] = serial[1:] != serial[:-1]
    is_last = np.ones(len(rows), dtype=bool)
    is_last[:-1] = is_first[1:]
    head = rows.loc[is_first, ["serial", "taken_at", "power_on_hours"]].reset_index(drop=True)
    tail_columns = [c for c in ("serial", *COHORT_COLUMNS, "taken_at", "power_on_hours", *COVARIATE_SOURCES,
                                *FEATURES) if c in rows.columns]
    tail = rows.loc[is_last, tail_columns].reset_index(drop=True)
    drives = tail.rename(columns={"taken_at": "last_taken_at", "power_on_hours": "last_hours"})
    for column in COHORT_COLUMNS:
        if column not in drives:
            drives[column] = None
    drives.insert(1, "first_taken_at", head["taken_at"].to_numpy())
    drives.insert(2, "entry_hours", head["power_on_hours"].to_numpy(dtype=float))
    drives["first_taken_at"] = pd.to_datetime(drives["first_taken_at"], utc=True)
    drives.insert(1, "cohort", cohort_labels(drives, by).to_numpy())
    return drives


def _attach_removals(drives: pd.DataFrame, removals: pd.DataFrame, count_proactive: bool):
    """Exit time, exit age and event of each drive from the removal log."""
    problems: dict[str, str] = {}
    if drives.empty:
        empty = drives.assign(removal_reason=pd.Series(dtype=object),
                              exit_at=pd.Series(dtype="datetime64[ns, UTC]"),
                              exit_hours=pd.Series(dtype=float), drive_days=pd.Series(dtype=float),
                              event=pd.Series(dtype=bool))
        return empty, problems
    unknown = removals[~removals["reason"].isin(KNOWN_REASONS)]
    for serial, reason in zip(unknown["serial"], unknown["reason"]):
        problems.setdefault(serial, f"removal reason {reason!r} is not one of {', '.join(KNOWN_REASONS)}")
    removals = removals[removals["reason"].isin(KNOWN_REASONS)]
    merged = drives[["serial", "last_taken_at"]].merge(removals, on="serial", how="inner")
    after = merged[merged["removed_at"] >= merged["last_taken_at"] - REMOVAL_TOLERANCE]
    before = merged[merged["removed_at"] < merged["last_taken_at"] - REMOVAL_TOLERANCE]
    # The earliest removal at or after the drive's last snapshot is the one that ended it.
    chosen = after.sort_values("removed_at").drop_duplicates("serial", keep="first")
    ended = set(chosen["serial"])
    for serial, removed_at, last in zip(before["serial"], before["removed_at"], before["last_taken_at"]):
        if serial in ended:
            continue
        problems.setdefault(serial, f"snapshots continue after its removal on {removed_at:%Y-%m-%d}"
                                    f" (last snapshot {last:%Y-%m-%d})")
    drives = drives.merge(chosen[["serial", "removed_at", "reason"]], on="serial", how="left")
    drives = drives.rename(columns={"reason": "removal_reason"})
    removed = drives["removed_at"].notna().to_numpy()
    last_ns = _ns(drives["last_taken_at"])
    exit_ns = last_ns.copy()
    exit_ns[removed] = np.maximum(_ns(drives["removed_at"][removed]), last_ns[removed])
    drives["exit_at"] = pd.to_datetime(exit_ns, utc=True)
    gap_hours = (exit_ns - last_ns) / _NS_PER_HOUR
    drives["exit_hours"] = drives["last_hours"].to_numpy(dtype=float) + gap_hours
    observed_ns = exit_ns - _ns(drives["first_taken_at"])
    drives["drive_days"] = observed_ns / _NS_PER_DAY
    drives["event"] = drives["removal_reason"].isin(EVENT_REASONS[count_proactive]).to_numpy()
    return drives.drop(columns=["removed_at"]), problems


def _episodes(rows: pd.DataFrame, drives: pd.DataFrame) -> pd.DataFrame:
    """Counting-process rows (start_hours, stop_hours] with covariates constant on each.

    Consecutive snapshots with the same covariates collapse into one episode; a covariate seen
    at a snapshot applies from that snapshot's age to the next change (it is known then, not
    before). The last episode ends at the drive's exit age and carries its event.
    """
    columns = ["serial", "cohort", "start_hours", "stop_hours", "event", *FEATURES]
    if rows.empty or drives.empty:
        return pd.DataFrame(columns=columns)
    rows = rows[rows["serial"].isin(drives["serial"])]
    serial = rows["serial"].to_numpy()
    values = rows[list(FEATURES)].to_numpy()
    new_drive = np.ones(len(rows), dtype=bool)
    new_drive[1:] = serial[1:] != serial[:-1]
    start = new_drive.copy()
    start[1:] |= np.any(values[1:] != values[:-1], axis=1)
    ep = rows.loc[start, ["serial", "power_on_hours", *FEATURES]].reset_index(drop=True)
    ep = ep.rename(columns={"power_on_hours": "start_hours"})
    ep_serial = ep["serial"].to_numpy()
    last_of_drive = np.ones(len(ep), dtype=bool)
    last_of_drive[:-1] = ep_serial[1:] != ep_serial[:-1]
    info = drives.set_index("serial")[["cohort", "exit_hours", "event"]]
    info = info.loc[ep_serial]
    stop = np.empty(len(ep))
    stop[:-1] = ep["start_hours"].to_numpy()[1:]
    stop[last_of_drive] = info["exit_hours"].to_numpy(dtype=float)[last_of_drive]
    ep["stop_hours"] = stop
    ep["event"] = last_of_drive & info["event"].to_numpy(dtype=bool)
    ep["cohort"] = info["cohort"].to_numpy()
    # An episode without risk time (power-on hours did not advance) is dropped; its event, if
    # any, moves to the drive's previous episode, which ends at that same age.
    empty = ep["stop_hours"].to_numpy() <= ep["start_hours"].to_numpy()
    carry = empty & ep["event"].to_numpy()
    prev = np.flatnonzero(carry) - 1
    ok = (prev >= 0) & (ep_serial[np.maximum(prev, 0)] == ep_serial[np.flatnonzero(carry)])
    ep.loc[prev[ok], "event"] = True
    ep = ep[~empty].reset_index(drop=True)
    return ep[columns]


def at_risk_drives(drives: pd.DataFrame) -> pd.DataFrame:
    """Drives with observed risk time (exit age beyond entry age): the input of every estimator."""
    return drives[drives["exit_hours"].to_numpy(dtype=float) > drives["entry_hours"].to_numpy(dtype=float)]


def utc_midnight(moment: datetime | pd.Timestamp) -> pd.Timestamp:
    return pd.Timestamp(moment).tz_convert(timezone.utc).normalize()
