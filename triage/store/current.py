"""Each drive's current state, kept beside the history so that ranking never scans it.

``triage rank`` needs, whatever the length of the history: the snapshot rows of the last few
days (the rules' windows, a missing group member, the model's counter growth), the newest
capture of every drive ever seen (who went silent) and the removal log. ``Store.commit`` keeps
them in ``<store>/current/``::

    current/state.json                  what the files below reflect (written last, atomically)
    current/recent-<tag>.parquet        snapshot rows taken on or after the newest capture's
                                        UTC day minus RECENT_DAYS (every snapshot column)
    current/sightings-<tag>.parquet     the newest capture of every serial ever stored
                                        (SIGHTING_COLUMNS)
    current/removals-<tag>.parquet      the whole removal log

Only rows a reader accepts are in it (``Store.read``'s sane date window). ``state.json`` records
the manifest's last batch and its number of batches: a state that does not match the manifest is
stale, and so is one written by another version (``STATE_VERSION``, ``RECENT_DAYS``), one whose
files cannot be read, and one built under a clock that no longer holds (a capture stored in the
future has since become readable, or the clock went back before the newest capture). A stale or
missing state is rebuilt from the history (``build``), never trusted.

How it stays consistent with the commit: the state is updated after the commit's manifest line,
under the same writer lock. A crash between the two leaves ``state.json`` naming the batch before:
stale, rebuilt on next use. New files get a fresh tag and ``state.json`` is replaced atomically
before the old files are deleted, so a reader sees the old state or the new one.

Incremental update (``merge``): the new rows of a commit join the old state -- each serial keeps
its newest sighting, the recent window is cut again at the newest day minus ``RECENT_DAYS``.
Because the newest day never moves back, a row the cut keeps was kept by every earlier cut, so
the state after any order of commits (a late file for an older day included) equals ``build``
over the same history; ``tests/store/test_current.py`` checks that on random commit orders.
"""

from __future__ import annotations

import hashlib
import json
import os
import secrets
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from triage.store.files import fsync_dir, fsync_file
from triage.store.schema import REMOVALS, SNAPSHOTS, TABLES, TIMESTAMP

CURRENT_DIR = "current"
STATE_FILE = "state.json"
#: Version of this folder's layout; any other is rebuilt.
STATE_VERSION = 1
#: Days of snapshot rows kept before the newest capture's UTC day. At least the default rules'
#: window (8 days), the group look-back of ``triage.risk.rank`` (7) and the survival model's
#: counter-growth window (14); a rule set asking for more makes rank read the partitions.
RECENT_DAYS = 15
#: The columns of a drive's newest sighting.
SIGHTING_COLUMNS = ["serial", "taken_at", "model", "host", "slot", "group"]
SIGHTINGS = pa.schema([SNAPSHOTS.field(name) for name in SIGHTING_COLUMNS])
_PARTS = {"recent": SNAPSHOTS, "sightings": SIGHTINGS, "removals": REMOVALS}


class StaleState(Exception):
    """The saved state cannot be used (the message says why); it is rebuilt from the history."""


@dataclass
class CurrentState:
    """What rank reads instead of the history (module docstring). Tables in the store's schemas."""

    recent: pa.Table
    sightings: pa.Table
    removals: pa.Table
    newest: datetime | None  # the newest readable capture
    ceiling: datetime  # the latest readable moment when this state was made
    next_future: datetime | None  # the earliest stored row beyond ``ceiling`` (it becomes readable later)
    batch: str | None  # the manifest's last batch this state reflects
    batches: int  # how many batches the manifest held
    #: "sightings" / "removals" -> the saved file the table was read from and still equals
    unchanged: dict = field(default_factory=dict)
    #: day -> saved file of the recent window's days not loaded into ``recent`` (still part of it)
    kept_days: dict = field(default_factory=dict)

    def fits_clock(self, ceiling: datetime) -> bool:
        """True when a reader whose latest readable moment is ``ceiling`` sees the same rows."""
        if self.newest is not None and ceiling < self.newest:
            return False
        return self.next_future is None or ceiling < self.next_future

    def narrowed(self, columns: list[str] | None, days_back: int | None) -> "CurrentState":
        """This state with the recent window cut to ``columns`` and to ``window_start(newest, days_back)``."""
        recent = self.recent
        if days_back is not None and self.newest is not None:
            since = pa.scalar(window_start(self.newest, days_back), TIMESTAMP)
            recent = recent.filter(pc.greater_equal(recent["taken_at"], since))
        if columns is not None:
            recent = recent.select(columns)
        return CurrentState(recent, self.sightings, self.removals, self.newest, self.ceiling, self.next_future,
                            self.batch, self.batches)


def empty_state(ceiling: datetime) -> CurrentState:
    return CurrentState(SNAPSHOTS.empty_table(), SIGHTINGS.empty_table(), REMOVALS.empty_table(),
                        None, ceiling, None, None, 0)


# -- the arithmetic ------------------------------------------------------------------------
def window_start(newest: datetime, days_back: int) -> datetime:
    """The newest capture's UTC midnight minus ``days_back`` days: where a window of history starts
    (the day partitions of ``days_back`` days before the newest one, and that one)."""
    newest = newest.astimezone(timezone.utc)
    return datetime(newest.year, newest.month, newest.day, tzinfo=timezone.utc) - timedelta(days=days_back)


_PER_DAY = {"s": 86_400, "ms": 86_400_000, "us": 86_400_000_000, "ns": 86_400_000_000_000}


def utc_days(stamps: pa.ChunkedArray | pa.Array) -> list[str]:
    """The UTC days (``YYYY-MM-DD``, sorted) the non-null times fall on: integer division of the
    epoch count, what ``pc.strftime`` gives at a fraction of its cost (it formats every row)."""
    counts = pc.drop_null(stamps).cast(pa.int64()).to_numpy(zero_copy_only=False) if len(stamps) else np.zeros(0)
    days = np.unique(counts // _PER_DAY[stamps.type.unit])
    return [str(day) for day in days.astype("datetime64[D]")]


def recent_floor(newest: datetime) -> datetime:
    """The oldest moment the recent window keeps."""
    return window_start(newest, RECENT_DAYS)


def _readable(rows: pa.Table, time_column: str, earliest: datetime, ceiling: datetime) -> tuple[pa.Table, datetime | None]:
    """(rows a reader accepts, the earliest row beyond ``ceiling`` or None)."""
    if rows.num_rows == 0:
        return rows, None
    stamp = rows[time_column]
    low, high = pa.scalar(earliest, TIMESTAMP), pa.scalar(ceiling, TIMESTAMP)
    span = pc.min_max(stamp)
    if stamp.null_count == 0 and span["min"].as_py() >= earliest and span["max"].as_py() <= ceiling:
        return rows, None  # all readable (the usual night): no copy of the rows
    future = rows.filter(pc.greater(stamp, high))
    first_future = pc.min(future[time_column]).as_py() if future.num_rows else None
    return rows.filter(pc.and_(pc.greater_equal(stamp, low), pc.less_equal(stamp, high))), first_future


def _newest_per_serial(rows: pa.Table) -> pa.Table:
    """One row per serial, its newest (a later ``taken_at`` wins; equal keys are one capture)."""
    if rows.num_rows == 0:
        return rows
    order = pc.sort_indices(rows, sort_keys=[("serial", "ascending"), ("taken_at", "ascending")])
    rows = rows.take(order)
    serial = rows["serial"].combine_chunks()
    codes = pc.dictionary_encode(serial).indices.to_numpy(zero_copy_only=False) if len(serial) else np.zeros(0)
    last = np.flatnonzero(np.r_[codes[1:] != codes[:-1], True])
    return rows.take(pa.array(last))


def _with_sightings(sightings: pa.Table, new: pa.Table) -> pa.Table:
    """``sightings`` (one row per serial) with the newest of ``new`` taken in: only the serials
    ``new`` names are compared, so the fleet's other sightings are copied once, never sorted
    (their order is of no meaning; readers look serials up)."""
    new = _newest_per_serial(new)
    seen = pc.is_in(sightings["serial"], value_set=new["serial"].combine_chunks())
    both = _newest_per_serial(pa.concat_tables([sightings.filter(seen), new]))
    return pa.concat_tables([sightings.filter(pc.invert(seen)), both]).combine_chunks()


def _min_time(*moments: datetime | None) -> datetime | None:
    known = [m for m in moments if m is not None]
    return min(known) if known else None


def merge(state: CurrentState, snapshots: pa.Table | None, removals: pa.Table | None, *,
          earliest: datetime, ceiling: datetime) -> CurrentState:
    """``state`` with a commit's new rows added (module docstring: incremental == rebuild)."""
    snapshots = snapshots if snapshots is not None else SNAPSHOTS.empty_table()
    removals = removals if removals is not None else REMOVALS.empty_table()
    new_rows, future_rows = _readable(snapshots.select(SNAPSHOTS.names).cast(SNAPSHOTS), "taken_at", earliest, ceiling)
    new_removals, future_removals = _readable(removals.select(REMOVALS.names).cast(REMOVALS), "removed_at",
                                              earliest, ceiling)
    newest = state.newest
    if new_rows.num_rows:
        top = pc.max(new_rows["taken_at"]).as_py()
        newest = top if newest is None else max(newest, top)
    recent = pa.concat_tables([state.recent, new_rows]) if new_rows.num_rows else state.recent
    if newest is not None and recent.num_rows and pc.min(recent["taken_at"]).as_py() < recent_floor(newest):
        recent = recent.filter(pc.greater_equal(recent["taken_at"], pa.scalar(recent_floor(newest), TIMESTAMP)))
    sightings = state.sightings
    if new_rows.num_rows:
        sightings = _with_sightings(sightings, new_rows.select(SIGHTING_COLUMNS))
    touched = {"sightings"} if new_rows.num_rows else set()
    if new_removals.num_rows:
        touched.add("removals")
    return CurrentState(
        recent=recent, sightings=sightings,
        removals=pa.concat_tables([state.removals, new_removals]),
        newest=newest, ceiling=ceiling,
        next_future=_min_time(state.next_future, future_rows, future_removals),
        batch=state.batch, batches=state.batches,
        unchanged={part: name for part, name in state.unchanged.items() if part not in touched},
        kept_days=dict(state.kept_days))


def build(store) -> CurrentState:
    """The state from the store's history, by the same rules as ``merge`` (memory: the state
    plus one day). Sightings are folded in day by day from a few columns; the recent window is
    then read from the days it covers. Raises OSError when the history cannot be read."""
    earliest, ceiling = store._sane_window()
    entries = [e for e in store.manifest() if isinstance(e, dict) and isinstance(e.get("batch"), str)]
    removals, future = _readable(_read_parts(store, "removals", store.all_parts("removals")), "removed_at",
                                 earliest, ceiling)
    newest, pending, sightings = None, [], SIGHTINGS.empty_table()
    days = store.all_days("snapshots")
    for day in days:
        rows, later = _readable(_read_parts(store, "snapshots", store.all_parts("snapshots", day), SIGHTING_COLUMNS),
                                "taken_at", earliest, ceiling)
        future = _min_time(future, later)
        if rows.num_rows:
            top = pc.max(rows["taken_at"]).as_py()
            newest = top if newest is None else max(newest, top)
            pending.append(_newest_per_serial(rows))
        if len(pending) >= 16 or day == days[-1]:  # fold a few days at a time
            sightings = _newest_per_serial(pa.concat_tables([sightings, *pending]))
            pending = []
    for table, time_column in (("snapshots", "taken_at"), ("removals", "removed_at")):
        for day in store.later_days(table):  # partitions dated after the clock's day: not read yet
            stamps = _read_parts(store, table, store.all_parts(table, day), [time_column])
            future = _min_time(future, _readable(stamps, time_column, earliest, ceiling)[1])
    recent = SNAPSHOTS.empty_table()
    if newest is not None:
        floor = recent_floor(newest)
        window = [d for d in days if d >= floor.date().isoformat()]
        rows = [_readable(_read_parts(store, "snapshots", store.all_parts("snapshots", d)), "taken_at",
                          earliest, ceiling)[0] for d in window]
        recent = pa.concat_tables([recent, *rows])
        recent = recent.filter(pc.greater_equal(recent["taken_at"], pa.scalar(floor, TIMESTAMP)))
    return CurrentState(recent=recent.combine_chunks(), sightings=sightings.combine_chunks(),
                        removals=removals.combine_chunks(), newest=newest, ceiling=ceiling, next_future=future,
                        batch=entries[-1]["batch"] if entries else None, batches=len(entries))


def _read_parts(store, table: str, files: list[Path], columns: list[str] | None = None) -> pa.Table:
    schema = TABLES[table][0]
    if columns is not None:
        schema = pa.schema([schema.field(c) for c in columns])
    if not files:
        return schema.empty_table()
    return pa.concat_tables([pq.read_table(f, columns=schema.names, schema=schema) for f in files])


# -- saving and loading ------------------------------------------------------------------------
def save(root: Path, state: CurrentState) -> None:
    """Write ``state`` under ``root/current`` atomically (module docstring); old files go last.

    The recent window is one file per UTC day, rows in time order: a commit rewrites the days it
    added rows to (a day in ``kept_days`` that ``state.recent`` has rows for is its file's rows
    and those, read and written one day at a time), keeps the files of the others and drops the
    days the window left; sightings and removals are rewritten only when they changed
    (``unchanged``)."""
    folder = Path(root) / CURRENT_DIR
    folder.mkdir(parents=True, exist_ok=True)
    tag = f"{state.batches}-{secrets.token_hex(4)}"
    first_day = recent_floor(state.newest).date().isoformat() if state.newest is not None else ""
    days = {day: name for day, name in state.kept_days.items() if day >= first_day and (folder / name).is_file()}
    recent = state.recent
    if recent.num_rows:
        stamps = recent["taken_at"]
        recent_days = utc_days(stamps)
        for day in recent_days:
            start = pa.scalar(datetime.fromisoformat(day).replace(tzinfo=timezone.utc), TIMESTAMP)
            end = pa.scalar(datetime.fromisoformat(day).replace(tzinfo=timezone.utc) + timedelta(days=1), TIMESTAMP)
            rows = recent if len(recent_days) == 1 else recent.filter(
                pc.and_(pc.greater_equal(stamps, start), pc.less(stamps, end)))
            if day in days:  # a kept day this state adds rows to: its file's rows join them, one day at a time
                rows = pa.concat_tables([pq.read_table(folder / days[day], schema=SNAPSHOTS), rows])
            rows = rows.take(pc.sort_indices(rows, sort_keys=[("taken_at", "ascending"), ("serial", "ascending")]))
            days[day] = _write(folder, f"recent-{day}-{tag}.parquet", rows)
    names = {"recent": dict(sorted(days.items()))}
    for part in ("sightings", "removals"):
        if part in state.unchanged and (folder / state.unchanged[part]).is_file():
            names[part] = state.unchanged[part]
        else:
            names[part] = _write(folder, f"{part}-{tag}.parquet", getattr(state, part))
    meta = {"state_version": STATE_VERSION, "recent_days": RECENT_DAYS, "batch": state.batch,
            "batches": state.batches, "newest": _iso(state.newest), "ceiling": _iso(state.ceiling),
            "next_future": _iso(state.next_future), "files": names}
    temp = folder / f".{STATE_FILE}.tmp"
    temp.write_text(json.dumps(meta, sort_keys=True) + "\n", encoding="utf-8")
    fsync_file(temp)
    os.replace(temp, folder / STATE_FILE)
    fsync_dir(folder)
    keep = {*names["recent"].values(), names["sightings"], names["removals"], STATE_FILE}
    for entry in os.listdir(folder):
        if entry not in keep:
            (folder / entry).unlink(missing_ok=True)


def _write(folder: Path, name: str, table: pa.Table) -> str:
    """One file of the state, written under a dot-name, flushed, renamed; returns ``name``."""
    temp = folder / f".{name}.tmp"
    # lz4: a third larger than zstd, quicker to read, and these files are read on every rank
    pq.write_table(table, temp, compression="lz4")
    fsync_file(temp)
    os.replace(temp, folder / name)
    return name


def load(root: Path, batch: str | None, batches: int, columns: list[str] | None = None,
         days_back: int | None = None, only_days: set[str] | None = None) -> CurrentState:
    """The saved state if it reflects the manifest's ``batch`` / ``batches``; raises StaleState
    saying why not. ``columns``: the recent window's columns to read (default: all);
    ``days_back``: only its days from the newest capture's UTC day minus that many days
    (``window_start``); ``only_days``: only those days, the others listed in ``kept_days``
    (default: every day)."""
    folder = Path(root) / CURRENT_DIR
    path = folder / STATE_FILE
    if not path.is_file():
        raise StaleState(f"no {CURRENT_DIR}/{STATE_FILE} yet")
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
        if not isinstance(meta, dict):
            raise ValueError("not an object")
        version, days = meta.get("state_version"), meta.get("recent_days")
        if version != STATE_VERSION or days != RECENT_DAYS:
            raise StaleState(f"{path}: written for state version {version!r} / {days!r} recent days, "
                             f"this triage keeps {STATE_VERSION} / {RECENT_DAYS}")
        if meta.get("batch") != batch or meta.get("batches") != batches:
            raise StaleState(f"{path}: reflects batch {meta.get('batch')!r} of {meta.get('batches')!r}, "
                             f"the manifest ends at {batch!r} of {batches}")
        files = meta["files"]
        newest = _moment(meta["newest"])
        first = window_start(newest, days_back).date().isoformat() if days_back is not None and newest else ""
        wanted = columns if columns is not None else SNAPSHOTS.names
        shape = pa.schema([SNAPSHOTS.field(c) for c in wanted])
        parts, kept = [shape.empty_table()], {}
        for day, name in sorted(files["recent"].items()):
            if day < first or (only_days is not None and day not in only_days):
                kept[day] = name
                continue
            table = pq.read_table(folder / name, columns=wanted)
            if not table.schema.equals(shape):
                raise ValueError(f"{name} does not hold the columns of the recent window")
            parts.append(table)
        tables = {"recent": pa.concat_tables(parts)}
        for part in ("sightings", "removals"):
            table = pq.read_table(folder / files[part])
            if not table.schema.equals(_PARTS[part]):
                raise ValueError(f"{files[part]} does not hold the columns of {part}")
            tables[part] = table
        return CurrentState(tables["recent"], tables["sightings"], tables["removals"],
                            newest, _moment(meta["ceiling"]), _moment(meta["next_future"]),
                            meta["batch"], meta["batches"],
                            unchanged={part: files[part] for part in ("sightings", "removals")}, kept_days=kept)
    except StaleState:
        raise
    except (OSError, ValueError, KeyError, TypeError, pa.ArrowException) as exc:
        raise StaleState(f"{path}: unreadable ({type(exc).__name__}: {exc})") from None


def token(root: Path, batch: str | None, batches: int, ceiling: datetime) -> str | None:
    """A digest naming the saved state when ``load`` would accept it for the manifest's
    ``batch`` / ``batches`` and a reader whose latest readable moment is ``ceiling``; None when it
    would be rebuilt. Reads ``state.json`` only: results worked out from one state (a ranking)
    can be kept under this name and trusted while it holds, since every commit and every rebuild
    writes a new ``state.json`` (new file tags)."""
    path = Path(root) / CURRENT_DIR / STATE_FILE
    try:
        text = path.read_bytes()
        meta = json.loads(text)
        if (meta.get("state_version") != STATE_VERSION or meta.get("recent_days") != RECENT_DAYS
                or meta.get("batch") != batch or meta.get("batches") != batches):
            return None
        newest, future = _moment(meta["newest"]), _moment(meta["next_future"])
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return None
    if (newest is not None and ceiling < newest) or (future is not None and ceiling >= future):
        return None  # CurrentState.fits_clock
    return hashlib.sha256(text).hexdigest()[:32]


def _iso(moment: datetime | None) -> str | None:
    return None if moment is None else moment.astimezone(timezone.utc).isoformat()


def _moment(text) -> datetime | None:
    if text is None:
        return None
    moment = datetime.fromisoformat(text)
    if moment.tzinfo is None:
        raise ValueError(f"time {text!r} has no UTC offset")
    return moment
