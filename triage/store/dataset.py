"""The Parquet store: atomic commits, de-duplication, partition-pruned reads.

Layout (a public contract; other engines read the tables directly)::

    <root>/snapshots/day=YYYY-MM-DD/part-<batch>.parquet    one row per capture
    <root>/attributes/day=YYYY-MM-DD/part-<batch>.parquet   one row per ATA attribute per capture
    <root>/removals/day=YYYY-MM-DD/part-<batch>.parquet     the removal log
    <root>/quarantine/<batch>.jsonl                         rejected input lines, with reasons
    <root>/models/                                          fitted models (survival layer)
    <root>/_manifest.jsonl                                  one line per committed batch
    <root>/_format.json                                     the layout's version (schema.STORE_FORMAT)
    <root>/_lock                                            held while a writer runs
    <root>/current/                                         each drive's current state (current.py)

How a commit stays atomic: every Parquet file is written under a dot-name, flushed to disk,
then renamed into place; the manifest line that records the batch and its source files is
appended last, and that line is the commit. Readers open only ``part-<batch>.parquet`` files
whose batch is in the manifest, so they see whole commits or nothing of one. A crash leaves
files of an unrecorded batch behind; the next commit (under the writer lock) deletes them and
any ``.part-*.tmp`` file. Rerunning the same input completes the batch: the source files are not
in the manifest yet, so they are read again, and rows whose key is already stored
(``schema.TABLES``) are dropped before writing.

How an older store is brought up to date: the first ``read`` or ``commit`` that finds an older
``_format.json`` (or none beside existing tables: format 1) takes the writer lock and rewrites
each Parquet file that still has old column names (``schema.RENAMED_SINCE``) with the new names,
each file atomically as above; ``_format.json`` is replaced last. Values are copied untouched.
A crash part-way leaves the old format recorded, and the next run converts the files left.

The writer lock is a POSIX record lock (``fcntl.lockf``) on ``_lock``: the kernel drops it when
its holder dies, however it dies, and a forked child (a pool worker) never inherits it -- so a
killed run cannot leave the store locked, and its orphaned workers cannot hold it. The file
records the holder's pid for the refusal message. Within one process a second ``lock()`` of the
same file is refused too (POSIX locks alone would grant it).

Dates: nothing stored may make a reader fail. Day partitions whose name is not a date between
``EARLIEST_DAY`` and the clock's day after ``FUTURE_TOLERANCE`` (e.g. ``day=10000-01-01`` or a
capture dated 2300, stored by an older triage) are left out of ``days`` and ``read``, and so are
rows timed outside that window: every report is "as of" the newest capture not in the future.
"""

from __future__ import annotations

import errno
import fcntl
import json
import os
import secrets
import threading
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import date, datetime, timedelta, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Iterable, Iterator, Mapping, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from triage.store import current
from triage.store.files import fsync_dir as _fsync_dir
from triage.store.files import fsync_file as _fsync_file
from triage.store.schema import PARTITION_COLUMN, RENAMED_SINCE, STORE_FORMAT, TABLES

if TYPE_CHECKING:
    import pandas as pd

# pandas, and pyarrow.dataset (which imports pandas), are imported by the methods that read
# partitions or take frames: opening a store and reading a saved ranking ('triage rank') never
# pay their half a second of import.

MANIFEST = "_manifest.jsonl"
FORMAT_FILE = "_format.json"
LOCK = "_lock"
#: Oldest day a reader accepts: before any capture this tool could have taken (ATA SMART came
#: in the mid 1990s; common practice, no source), and well inside what pandas can hold.
EARLIEST_DAY = date(2000, 1, 1)
#: How far past the reading machine's clock a capture may be dated and still count (host clocks
#: drift; common practice, no source). Later captures are not "now": reports ignore them.
FUTURE_TOLERANCE = timedelta(hours=1)
_PART_PREFIX, _PART_SUFFIX = "part-", ".parquet"

#: Lock files this process holds (POSIX locks would let a process take its own lock twice).
_HELD: set[str] = set()
_HELD_GUARD = threading.Lock()
os.register_at_fork(after_in_child=_HELD.clear)  # a forked child holds none of its parent's locks


class StoreLocked(RuntimeError):
    """Another process holds the store's writer lock."""


class StoreFormatError(RuntimeError):
    """The store was written by a newer triage, or its format file is unreadable."""


class StoreMissing(FileNotFoundError):
    """The store named does not exist: a typo in --store must not read as an empty, healthy fleet."""


def _utc_now() -> datetime:
    return datetime.now(timezone.utc)


@dataclass(frozen=True)
class SourceRecord:
    """One input file as the manifest remembers it."""

    path: str
    sha256: str
    size: int
    lines: int = 0
    stored: int = 0
    quarantined: int = 0


def new_batch_id(now: datetime | None = None) -> str:
    now = now or datetime.now(timezone.utc)
    return f"{now:%Y%m%dT%H%M%SZ}-{secrets.token_hex(4)}"


class Store:
    """A store directory. ``now`` is the clock the date checks use (default: the machine's, UTC)."""

    def __init__(self, root: Path | str, now: Callable[[], datetime] | None = None):
        self.root = Path(root)
        self.now = now
        self._committed: tuple[tuple[int, int], frozenset[str]] | None = None
        self._format_current = False

    @classmethod
    def existing(cls, root: Path | str) -> "Store":
        """The store at ``root``, which must already hold a committed batch (its manifest).

        Every command but ``ingest`` opens the store this way: only ``ingest`` creates one, so a
        mistyped path fails loudly instead of ranking nothing and exiting 0.
        """
        store = cls(root)
        if not store.root.is_dir():
            raise StoreMissing(f"{store.root}: no such store (check --store; only 'triage ingest' creates one)")
        if not (store.root / MANIFEST).is_file():
            raise StoreMissing(f"{store.root}: not a triage store (no {MANIFEST}; "
                               "check --store, or run 'triage ingest' into it first)")
        return store

    # -- places ---------------------------------------------------------------------------
    @property
    def models_dir(self) -> Path:
        return self.root / "models"

    @property
    def derived_dir(self) -> Path:
        """Results worked out from the store and kept to be reused (rankings); never history:
        deleting the folder loses nothing."""
        return self.root / "derived"

    @property
    def quarantine_dir(self) -> Path:
        return self.root / "quarantine"

    def table_dir(self, table: str) -> Path:
        _schema_of(table)
        return self.root / table

    # -- locking --------------------------------------------------------------------------
    @contextmanager
    def lock(self, name: str = LOCK) -> Iterator[None]:
        """Hold an exclusive, non-blocking lock file; raise StoreLocked if another holds it.

        A POSIX record lock (see module docstring): released by the kernel when this process
        dies, never inherited by its children.
        """
        self.root.mkdir(parents=True, exist_ok=True)
        path = self.root / name
        with _HELD_GUARD:
            if str(path) in _HELD:
                raise StoreLocked(f"{path} is held by another triage run in this process (pid {os.getpid()})")
            _HELD.add(str(path))
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
            try:
                try:
                    fcntl.lockf(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                except OSError as exc:
                    if exc.errno in (errno.EAGAIN, errno.EACCES):
                        raise StoreLocked(f"{path} is held by another triage run{_holder(fd)}") from None
                    raise
                os.ftruncate(fd, 0)
                os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
                yield
            finally:
                os.close(fd)  # closing releases the lock
        finally:
            with _HELD_GUARD:
                _HELD.discard(str(path))

    def holds_lock(self, name: str = LOCK) -> bool:
        """True when this process holds the lock ``name`` of this store."""
        with _HELD_GUARD:
            return str(self.root / name) in _HELD

    @contextmanager
    def _writing(self) -> Iterator[None]:
        """The writer lock for one commit, unless this process already holds it (ingest does)."""
        if self.holds_lock():
            yield
        else:
            with self.lock():
                yield

    # -- format ---------------------------------------------------------------------------
    def format_version(self) -> int | None:
        """The layout version on disk; None for a store with no table yet."""
        path = self.root / FORMAT_FILE
        if path.exists():
            try:
                version = json.loads(path.read_text(encoding="utf-8"))["store_format"]
            except (json.JSONDecodeError, KeyError, TypeError):
                raise StoreFormatError(f"{path}: not a store format file (expected {{\"store_format\": N}})") from None
            if not isinstance(version, int):
                raise StoreFormatError(f"{path}: store_format {version!r} is not a whole number")
            return version
        if any((self.root / table).is_dir() for table in TABLES):
            return 1
        return None

    def upgrade(self) -> None:
        """Bring an older store up to ``STORE_FORMAT`` (module docstring); refuse a newer one.

        ``read`` and ``commit`` call it; the command line calls it first so that a held lock or a
        newer format is one line. Raises StoreLocked or StoreFormatError.
        """
        if self._format_current:
            return
        version = self.format_version()
        if version is not None and version > STORE_FORMAT:
            raise StoreFormatError(f"{self.root}: store format {version} is newer than this triage reads "
                                   f"({STORE_FORMAT}); upgrade triage")
        if version is not None and version < STORE_FORMAT:
            if self.holds_lock():
                self._convert(version)
            else:
                with self.lock():
                    self._convert(self.format_version() or STORE_FORMAT)
        self._format_current = True

    def _convert(self, version: int) -> None:
        for step in range(version + 1, STORE_FORMAT + 1):
            for table, renames in RENAMED_SINCE.get(step, {}).items():
                root = self.root / table
                for path in sorted(root.glob(f"{PARTITION_COLUMN}=*/part-*.parquet")) if root.is_dir() else []:
                    _rename_columns(path, renames)
        self._write_format()

    def _write_format(self) -> None:
        self.root.mkdir(parents=True, exist_ok=True)
        final = self.root / FORMAT_FILE
        temp = self.root / f".{FORMAT_FILE}.tmp"
        temp.write_text(json.dumps({"store_format": STORE_FORMAT}) + "\n", encoding="utf-8")
        _fsync_file(temp)
        os.replace(temp, final)
        _fsync_dir(self.root)

    # -- manifest -------------------------------------------------------------------------
    def manifest(self) -> list[dict]:
        """Committed batches, oldest first. A torn last line (crash mid-append) is ignored."""
        path = self.root / MANIFEST
        if not path.exists():
            return []
        entries = []
        for line in path.read_text(encoding="utf-8").splitlines():
            try:
                entries.append(json.loads(line))
            except json.JSONDecodeError:
                continue
        return entries

    def committed_batches(self) -> frozenset[str]:
        """Batch ids the manifest records (cached until the manifest file changes)."""
        try:
            info = (self.root / MANIFEST).stat()
        except FileNotFoundError:
            return frozenset()
        stamp = (info.st_size, info.st_mtime_ns)
        if self._committed is None or self._committed[0] != stamp:
            self._committed = (stamp, frozenset(e["batch"] for e in self.manifest()
                                                if isinstance(e, dict) and isinstance(e.get("batch"), str)))
        return self._committed[1]

    def ingested_digests(self) -> set[str]:
        return {f["sha256"] for entry in self.manifest() for f in entry.get("files", [])}

    def _append_manifest(self, entry: dict) -> None:
        path = self.root / MANIFEST
        line = json.dumps(entry, sort_keys=True) + "\n"
        with path.open("a", encoding="utf-8") as fh:
            # A torn previous line would swallow this one; start on a fresh line.
            if fh.tell() > 0 and not path.read_bytes().endswith(b"\n"):
                fh.write("\n")
            fh.write(line)
            fh.flush()
            os.fsync(fh.fileno())

    # -- writing --------------------------------------------------------------------------
    def append(self, table: str, frame: pd.DataFrame) -> int:
        """Commit rows of one table (tools and tests); returns the number of new rows."""
        return self.commit({table: frame})[table]

    def commit(
        self,
        frames: Mapping[str, pd.DataFrame],
        *,
        sources: Iterable[SourceRecord] = (),
        quarantine: Iterable[Mapping] = (),
        batch: str | None = None,
    ) -> dict[str, int]:
        """Write a batch atomically (see module docstring); returns new rows per table.

        Takes the writer lock unless this process holds it, and first removes what killed
        commits left behind (``sweep``).
        """
        batch = batch or new_batch_id()
        self.root.mkdir(parents=True, exist_ok=True)
        with self._writing():
            self.upgrade()
            if self.format_version() is None:
                self._write_format()
            self.sweep()
            written, parts = {}, {}
            for table, frame in frames.items():
                parts[table] = []
                written[table] = self._write_table(table, frame, batch, parts[table])
            rejected = list(quarantine)
            if rejected:
                self._write_quarantine(rejected, batch)
            self._append_manifest(
                {
                    "batch": batch,
                    "committed_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
                    "files": [s.__dict__ for s in sources],
                    "rows": written,
                    "quarantined": len(rejected),
                }
            )
            self._update_current(parts)
        return written

    # -- the current state (triage/store/current.py) --------------------------------------
    def _batch_ids(self) -> list[str]:
        """The manifest's batch ids, oldest first."""
        return [e["batch"] for e in self.manifest() if isinstance(e, dict) and isinstance(e.get("batch"), str)]

    def _batches(self) -> tuple[str | None, int]:
        """(the manifest's last batch id, how many batches it records)."""
        entries = self._batch_ids()
        return (entries[-1] if entries else None), len(entries)

    def _update_current(self, parts: Mapping[str, list[pa.Table]]) -> None:
        """After a commit's manifest line (writer lock held): merge its new rows into the saved
        state, or rebuild it when the saved one does not reflect the batch before. A failure here
        (a full disk, an unreadable file) leaves the state stale, to be rebuilt on next use (which
        then says what it cannot read): the commit stands."""
        entries = self._batch_ids()
        batch, batches = entries[-1], len(entries)
        before = entries[-2] if batches > 1 else None
        earliest, ceiling = self._sane_window()
        try:
            try:
                new = {t: pa.concat_tables(p) if p else None for t, p in parts.items()}
                snapshots = new.get("snapshots")
                if batches == 1:  # the store's first commit: nothing stood before it
                    state = current.empty_state(ceiling)
                else:  # no day's rows in memory: save joins each day the commit adds to with its file
                    state = current.load(self.root, before, batches - 1, only_days=set())
                if not state.fits_clock(ceiling):
                    raise current.StaleState("made under another clock")
                state = current.merge(state, snapshots, new.get("removals"), earliest=earliest, ceiling=ceiling)
            except current.StaleState:
                state = current.build(self)
            state.batch, state.batches = batch, batches
            current.save(self.root, state)
        except (OSError, ValueError, pa.ArrowException):  # ArrowInvalid is a ValueError, ArrowIOError an OSError
            pass

    def current_state(self, columns: list[str] | None = None,
                      days_back: int | None = None) -> tuple[current.CurrentState, str | None]:
        """Each drive's current state (triage/store/current.py) and a note when the saved one could
        not be used and was rebuilt from the history. ``columns`` and ``days_back`` narrow its
        recent window (``current.load``; default: all of it).

        A rebuilt state is saved when the writer lock is free (never waited for) and the manifest
        did not move meanwhile; otherwise it serves this run only.
        """
        self.upgrade()
        batch, batches = self._batches()
        earliest, ceiling = self._sane_window()
        try:
            state = current.load(self.root, batch, batches, columns, days_back)
            if not state.fits_clock(ceiling):
                raise current.StaleState("made under another clock (a capture stored in the future is now "
                                         "readable, or the clock went back)")
            return state, None
        except current.StaleState as exc:
            why = str(exc)
        state = current.build(self)
        if batches:
            try:
                with self.lock():
                    if self._batches() == (batch, batches):
                        current.save(self.root, state)
            except (StoreLocked, OSError):
                pass
        return state.narrowed(columns, days_back), f"current state rebuilt from the history ({why})"

    def state_token(self) -> str | None:
        """A name for the saved current state as a reader would use it now, or None when
        ``current_state`` would rebuild it (``current.token``): results derived from the state
        may be kept under this name."""
        self.upgrade()
        batch, batches = self._batches()
        return current.token(self.root, batch, batches, self._sane_window()[1]) if batches else None

    def sweep(self) -> int:
        """Delete temporary files and parts of batches the manifest never recorded (a killed
        commit's leftovers); call only under the writer lock. Returns the files removed."""
        committed = self.committed_batches()
        removed = 0
        for table in TABLES:
            root = self.table_dir(table)
            if not root.is_dir():
                continue
            for day_dir in root.iterdir():
                if not day_dir.is_dir():
                    continue
                for entry in os.listdir(day_dir):
                    stray = entry.startswith(f".{_PART_PREFIX}") and entry.endswith(".tmp")
                    batch = _batch_of(entry)
                    if stray or (batch is not None and batch not in committed):
                        (day_dir / entry).unlink(missing_ok=True)
                        removed += 1
        if self.quarantine_dir.is_dir():
            for entry in self.quarantine_dir.glob(".*.jsonl.tmp"):
                entry.unlink(missing_ok=True)
                removed += 1
        return removed

    def _write_table(self, table: str, frame: pd.DataFrame | pa.Table, batch: str,
                     stored: list[pa.Table] | None = None) -> int:
        """Write one table's rows of a batch, one file per day; the rows written (keys not stored
        before) are appended to ``stored`` when given."""
        schema, time_column, key = TABLES[table]
        if len(frame) == 0:
            return 0
        rows = frame if isinstance(frame, pa.Table) else to_arrow(frame, schema)
        rows = _last_per_key(rows.cast(schema), list(key))
        day_of = pc.cast(rows[time_column], pa.date32()).to_numpy(zero_copy_only=False).astype("int64")
        if np.any(day_of[1:] < day_of[:-1]):  # group the rows by day (stable: keeps their order)
            order = np.argsort(day_of, kind="stable")
            rows, day_of = rows.take(pa.array(order)), day_of[order]
        starts = np.flatnonzero(np.r_[True, day_of[1:] != day_of[:-1]])
        ends = np.r_[starts[1:], len(day_of)]

        def write_day(start: int, end: int) -> int:
            day = str(np.datetime64(int(day_of[start]), "D"))
            part = self._drop_stored(table, day, rows.slice(start, end - start), key)
            if part.num_rows == 0:
                return 0
            part_dir = self.table_dir(table) / f"{PARTITION_COLUMN}={day}"
            part_dir.mkdir(parents=True, exist_ok=True)
            final = part_dir / f"part-{batch}.parquet"
            temp = part_dir / f".part-{batch}.parquet.tmp"
            pq.write_table(part, temp, compression="zstd")
            _fsync_file(temp)
            os.replace(temp, final)
            _fsync_dir(part_dir)
            if stored is not None:
                stored.append(part)  # list.append is atomic under the GIL
            return part.num_rows

        # Parquet encoding and zstd run outside the GIL: one thread per core writes the days.
        with ThreadPoolExecutor(max_workers=max(1, min(os.cpu_count() or 1, len(starts)))) as pool:
            return sum(pool.map(write_day, starts, ends))

    def _drop_stored(self, table: str, day: str, rows: pa.Table, key) -> pa.Table:
        """``rows`` without those whose key is already stored in that day's partition."""
        import pyarrow.dataset as ds  # noqa: PLC0415  (see the imports above)

        files = self._committed_parts(table, day)
        if not files:
            return rows
        stored = ds.dataset(files, schema=_schema_of(table), format="parquet").to_table(columns=list(key))
        marked = rows.append_column("_row", pa.array(np.arange(rows.num_rows)))
        kept = marked.join(stored, keys=list(key), join_type="left anti")  # repeats in stored: no matter
        index = np.sort(kept["_row"].to_numpy())
        return rows.take(pa.array(index))

    def _write_quarantine(self, entries: list[Mapping], batch: str) -> None:
        self.quarantine_dir.mkdir(parents=True, exist_ok=True)
        final = self.quarantine_dir / f"{batch}.jsonl"
        temp = self.quarantine_dir / f".{batch}.jsonl.tmp"
        with temp.open("w", encoding="utf-8") as fh:
            for entry in entries:
                fh.write(json.dumps(dict(entry), ensure_ascii=True) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(temp, final)

    # -- reading --------------------------------------------------------------------------
    def read(
        self,
        table: str,
        columns: list[str] | None = None,
        since: datetime | None = None,
        until: datetime | None = None,
        serials: Sequence[str] | None = None,
        as_table: bool = False,
    ) -> pd.DataFrame | pa.Table:
        """Rows of ``table`` with ``since <= time < until`` (and ``serial`` among ``serials`` when
        given); only the days in range are opened.

        Timestamps come back tz-aware UTC; integer columns holding nulls come back as float64
        with NaN (pandas' default), booleans holding nulls as object. ``as_table``: the Arrow
        table instead, in the table's schema.
        """
        import pyarrow.dataset as ds  # noqa: PLC0415  (see the imports above)

        schema, time_column, _ = TABLES[table]
        self.upgrade()
        wanted = list(columns) if columns is not None else schema.names
        unknown = [c for c in wanted if c not in schema.names]
        if unknown:
            raise KeyError(f"{table} has no column(s) {', '.join(unknown)}")
        empty = schema.empty_table().select(wanted)
        empty = empty if as_table else empty.to_pandas()
        first, last = self._sane_window()
        low, high = first, last
        if since is not None:
            low = max(low, _utc(since))
        if until is not None:
            high = min(high, _utc(until) - timedelta(microseconds=1))
        if low > high:
            return empty
        low_day, high_day = low.date().isoformat(), high.date().isoformat()
        files = [f for day in self._day_names(table) if low_day <= day <= high_day
                 for f in self._committed_parts(table, day)]
        if not files:
            return empty
        stamp = ds.field(time_column)
        kind = schema.field(time_column).type
        condition = (stamp >= pa.scalar(low, kind)) & (stamp <= pa.scalar(high, kind))
        if serials is not None:
            condition = condition & ds.field("serial").isin(pa.array(list(serials), pa.string()))
        dataset = ds.dataset([str(f) for f in files], schema=schema, format="parquet")
        rows = dataset.to_table(columns=wanted, filter=condition)
        return rows if as_table else rows.to_pandas()

    def last_times(self, table: str, key: str) -> pd.DataFrame:
        """The newest time of every ``key`` value over the table's whole history (two columns read;
        whole commits and the sane date window only, as ``read``)."""
        import pyarrow.dataset as ds  # noqa: PLC0415  (see the imports above)

        schema, time_column, _ = TABLES[table]
        self.upgrade()
        low, high = self._sane_window()
        files = [f for day in self._day_names(table) for f in self._committed_parts(table, day)]
        if not files:
            return schema.empty_table().select([key, time_column]).to_pandas()
        stamp, kind = ds.field(time_column), schema.field(time_column).type
        rows = ds.dataset([str(f) for f in files], schema=schema, format="parquet").to_table(
            columns=[key, time_column], filter=(stamp >= pa.scalar(low, kind)) & (stamp <= pa.scalar(high, kind)))
        newest = rows.group_by(key).aggregate([(time_column, "max")])
        return newest.rename_columns([key, time_column]).to_pandas()

    def last_rows(self, table: str, key: str, columns: list[str], last: pd.DataFrame | None = None) -> pd.DataFrame:
        """The newest row of each ``key`` value, ``columns`` only.

        ``last``: the rows of ``last_times`` wanted (default: every key). Only the days on which
        those keys were last seen are opened.
        """
        import pandas as pd  # noqa: PLC0415  (see the imports above)

        _, time_column, _ = TABLES[table]
        wanted = list(dict.fromkeys([key, time_column, *columns]))
        if last is None:
            last = self.last_times(table, key)
        parts = []
        for day, part in last.groupby(last[time_column].dt.strftime("%Y-%m-%d")):
            start = datetime.strptime(day, "%Y-%m-%d").replace(tzinfo=timezone.utc)
            rows = self.read(table, columns=wanted, since=start, until=start + timedelta(days=1))
            parts.append(rows.merge(part, on=[key, time_column]))
        if not parts:
            return self.read(table, columns=wanted).iloc[0:0]
        rows = pd.concat(parts, ignore_index=True)
        return rows.drop_duplicates(subset=[key], keep="last")[wanted].reset_index(drop=True)

    def all_days(self, table: str) -> list[str]:
        """Every day partition name in the sane window, oldest first (committed or not)."""
        return self._day_names(table)

    def later_days(self, table: str) -> list[str]:
        """Day partitions dated after the sane window (they become readable as the clock moves)."""
        last = self._sane_window()[1].date()
        return [name for name in self.odd_days(table) if (day := _day_of(name)) is not None and day > last
                and day.isoformat() == name]

    def all_parts(self, table: str, day: str | None = None) -> list[Path]:
        """Committed Parquet files of ``table`` (of one ``day``, or of every day in the sane window)."""
        days = [day] if day is not None else self._day_names(table)
        return [f for d in days for f in self._committed_parts(table, d)]

    def days(self, table: str) -> list[str]:
        """The day partitions holding committed rows in the sane window, oldest first."""
        return [day for day in self._day_names(table) if self._committed_parts(table, day)]

    def odd_days(self, table: str) -> list[str]:
        """Day partition names readers leave out: not a date, or outside the sane window."""
        root = self.table_dir(table)
        if not root.is_dir():
            return []
        prefix = f"{PARTITION_COLUMN}="
        kept = set(self._day_names(table))
        return sorted(e[len(prefix):] for e in os.listdir(root) if e.startswith(prefix) and e[len(prefix):] not in kept)

    def _day_names(self, table: str) -> list[str]:
        """Day partition names that are dates in the sane window, oldest first (one listing)."""
        root = self.table_dir(table)
        if not root.is_dir():
            return []
        prefix = f"{PARTITION_COLUMN}="
        first, last = (moment.date() for moment in self._sane_window())
        names = (entry[len(prefix):] for entry in os.listdir(root) if entry.startswith(prefix))
        return sorted(name for name in names if (day := _day_of(name)) is not None and first <= day <= last
                      and day.isoformat() == name)

    def _sane_window(self) -> tuple[datetime, datetime]:
        """(earliest, latest) moment a reader accepts: see the module docstring."""
        return (datetime.combine(EARLIEST_DAY, datetime.min.time(), timezone.utc),
                _utc((self.now or _utc_now)()) + FUTURE_TOLERANCE)

    def _committed_parts(self, table: str, day: str) -> list[Path]:
        """The Parquet files of one day partition whose batch the manifest records."""
        part_dir = self.table_dir(table) / f"{PARTITION_COLUMN}={day}"
        try:
            entries = os.listdir(part_dir)
        except (FileNotFoundError, NotADirectoryError):
            return []
        committed = self.committed_batches()
        return sorted(part_dir / e for e in entries if _batch_of(e) in committed)


def _batch_of(file_name: str) -> str | None:
    """The batch id in ``part-<batch>.parquet``; None for any other name."""
    if file_name.startswith(_PART_PREFIX) and file_name.endswith(_PART_SUFFIX):
        return file_name[len(_PART_PREFIX):-len(_PART_SUFFIX)]
    return None


def _day_of(text: str) -> date | None:
    """A partition name's date, or None when it is not a plain YYYY-MM-DD date."""
    if len(text) != 10:
        return None
    try:
        return date.fromisoformat(text)
    except ValueError:
        return None


def _rename_columns(path: Path, renames: Mapping[str, str]) -> None:
    """Rewrite one Parquet file with ``renames`` applied, atomically; a file already renamed is left."""
    names = pq.read_schema(path).names
    if not any(name in renames for name in names):
        return
    table = pq.ParquetFile(path).read()
    renamed = table.rename_columns([renames.get(name, name) for name in names])
    temp = path.with_name(f".{path.name}.tmp")
    pq.write_table(renamed, temp, compression="zstd")
    _fsync_file(temp)
    os.replace(temp, path)
    _fsync_dir(path.parent)


def _key_codes(rows: pa.Table, key: list[str]) -> list[np.ndarray]:
    """Each key column as integers that compare equal exactly when the values do (nulls: -1)."""
    codes = []
    for name in key:
        column = rows[name].combine_chunks() if rows.num_rows else pa.array([], rows.schema.field(name).type)
        if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
            column = pc.dictionary_encode(column).indices
        elif pa.types.is_timestamp(column.type):
            column = column.cast(pa.int64())
        codes.append(column.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64))
    return codes


def _last_per_key(rows: pa.Table, key: list[str]) -> pa.Table:
    """One row per key, the last one given (a capture repeated in a batch counts once)."""
    codes = _key_codes(rows, key)
    order = np.lexsort(codes[::-1])  # stable: equal keys keep their input order
    sorted_codes = [c[order] for c in codes]
    same_as_next = np.ones(len(order) - 1, dtype=bool) if len(order) else np.zeros(0, dtype=bool)
    for c in sorted_codes:
        same_as_next &= c[1:] == c[:-1]
    if not same_as_next.any():
        return rows
    last = order[np.r_[~same_as_next, True]]
    return rows.take(pa.array(np.sort(last)))


def to_arrow(frame: pd.DataFrame, schema: pa.Schema) -> pa.Table:
    """Frame -> table of exactly ``schema``; missing columns become nulls, extra ones are dropped."""
    import pandas as pd  # noqa: PLC0415  (see the imports at the top)

    arrays = []
    for field in schema:
        if field.name in frame.columns:
            column = frame[field.name]
            if pa.types.is_timestamp(field.type):
                column = pd.to_datetime(column, utc=True)
            arrays.append(pa.array(column, type=field.type, from_pandas=True))
        else:
            arrays.append(pa.nulls(len(frame), type=field.type))
    return pa.Table.from_arrays(arrays, schema=schema)


def _schema_of(table: str) -> pa.Schema:
    try:
        return TABLES[table][0]
    except KeyError:
        raise KeyError(f"unknown table {table!r}; the store has {', '.join(TABLES)}") from None


def _utc(moment: datetime) -> datetime:
    if moment.tzinfo is None:
        raise ValueError(f"timestamp {moment.isoformat()} has no UTC offset")
    return moment.astimezone(timezone.utc)


def _holder(fd: int) -> str:
    """`` (pid N)`` from a held lock file, for the refusal message; empty when unreadable."""
    try:
        pid = int(os.pread(fd, 32, 0).split()[0])
    except (OSError, ValueError, IndexError):
        return ""
    return f" (pid {pid})"
