"""``triage ingest``: capture files and removal logs -> atomic commits of bounded batches of lines."""

from __future__ import annotations

import hashlib
from collections import Counter
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Callable, Iterable

import pyarrow as pa
import pyarrow.compute as pc

from triage.ingest.captures import BATCH_LINES, CaptureBatch, Rejected, capture_parts, file_size
from triage.ingest.reading import display_name
from triage.ingest.removals import parse_removal_files
from triage.store.dataset import SourceRecord, Store

#: Name endings, compared without case (``.JSONL``, ``.jsonl.GZ`` are the same kinds).
CAPTURE_SUFFIXES = (".jsonl", ".jsonl.gz")
REMOVAL_SUFFIXES = (".csv",)
#: Captures per commit, at most: a night of a 100k-drive fleet in one or two commits, so each day
#: gets few Parquet parts, while a batch of decoded rows stays well under 1 GB whatever the size
#: of the files (benchmarks/big_file.py measures the peak on a 2 GB file). Smaller commits would
#: overlap more with the decoding but cost more CPU in all (each reads back the keys stored on
#: its days): on 2 cores, 50,000 made 60k captures in small files about a second slower.
COMMIT_LINES = 4 * BATCH_LINES
#: Files at least this large get their digest worked out beside their decoding when their size
#: rules out that they were stored before (hashing 325 MB is a third of a second of one core).
LATE_DIGEST_BYTES = 64 * 2**20
#: Rejected lines whose excerpt the report keeps in memory (all of them are in the quarantine).
REPORT_TEXTS = 100

if TYPE_CHECKING:
    from triage.engine import _Engine


@dataclass
class IngestReport:
    files_read: int = 0
    files_skipped: int = 0  # already in the manifest (same content)
    lines: int = 0
    stored: dict[str, int] = field(default_factory=dict)
    #: every rejected line with its reason; the excerpt text is in the quarantine file only
    rejected: list[Rejected] = field(default_factory=list)
    clamped: int = 0  # captures stored with a counter saturated at 2**63-1
    repeated: int = 0  # good lines whose (serial, taken_at) was stored already or read earlier
    rejected_per_file: dict[str, int] = field(default_factory=dict)
    #: named folders that held nothing to read, one sentence each (never a silent 0)
    empty_folders: list[str] = field(default_factory=list)

    @property
    def new_rows(self) -> int:
        return sum(self.stored.values())


def find_inputs(paths: Iterable[Path], empty: list[str] | None = None) -> list[Path]:
    """Files named on the command line, and the input files inside named directories; a named
    directory holding none is added to ``empty`` (as a note for the operator)."""
    found = []
    for path in paths:
        if path.is_dir():
            inside = sorted(p for p in path.rglob("*") if p.is_file() and _kind(p))
            if not inside and empty is not None:
                empty.append(f"{display_name(path)}: no capture file (.jsonl, .jsonl.gz) or removal log "
                             "(.csv) in this folder (names compared without case; hidden files left out)")
            found += inside
        else:
            found.append(_named_file(path))
    return found


def check_named_inputs(paths: Iterable[Path]) -> None:
    """Raise as ``find_inputs`` would for a named path that does not exist or is not an input
    file, without listing folders: the command line checks its arguments before it opens (or
    creates) the store, so a mistyped path leaves nothing behind."""
    for path in paths:
        if not path.is_dir():
            _named_file(path)


def _named_file(path: Path) -> Path:
    if not path.is_file():
        raise FileNotFoundError(f"{display_name(path)}: no such file or directory")
    if not _kind(path):
        raise ValueError(f"{display_name(path)}: not a capture file (.jsonl, .jsonl.gz) or removal log (.csv)")
    return path


def _kind(path: Path) -> str | None:
    name = path.name.lower()
    if name.startswith("."):
        return None
    if name.endswith(CAPTURE_SUFFIXES):
        return "capture"
    if name.endswith(REMOVAL_SUFFIXES):
        return "removals"
    return None


def file_digest(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def ingest_paths(
    store: Store,
    paths: Iterable[Path],
    *,
    progress: Callable[[int, int], None] | None = None,
    now: datetime | None = None,
    workers: int | None = None,
    engine: "_Engine | None" = None,
) -> IngestReport:
    """Ingest files (or directories of them) into ``store``; files already ingested are skipped.

    Capture files are read and decoded as tasks on ``engine`` (triage/engine.py; default: local
    processes, ``workers`` of them); only this process commits, so every commit is whole
    whichever engine decoded. ``progress(done, total)`` counts bytes of the files read.

    Captures are committed in batches of at most ``COMMIT_LINES`` lines, so memory does not grow
    with the files; a file is listed in the manifest by the commit holding its last line (a run
    killed half-way through a file reads that file again, and its stored captures add nothing).
    Captures dated more than ``FUTURE_TOLERANCE`` after ``now`` (default: this machine's clock)
    are quarantined.
    """
    report = IngestReport()
    files = find_inputs(paths, report.empty_folders)
    with ThreadPoolExecutor(1, "digest") as hasher, _Committer(store, report) as committer:
        todo, digests, unreadable = _new_files(store, files, report, hasher)
        removals = [p for p in todo if _kind(p) == "removals"]
        captures = [p for p in todo if _kind(p) == "capture"]
        total = sum(file_size(p) for p in todo)
        done = 0

        def advance(nbytes: int) -> None:
            nonlocal done
            done = min(total, done + nbytes)  # a file that grew while read never overshoots
            if progress:
                progress(done, total)

        if unreadable:
            _commit(store, report, {}, unreadable, 0, [])
        if removals:
            rows, bad, count = parse_removal_files(removals, now=now)
            _commit(store, report, {"removals": rows}, bad, count, [(p, digests[p]) for p in removals])
            advance(sum(file_size(p) for p in removals))
        parts: list[CaptureBatch] = []
        finished: list[Path] = []
        held = 0
        for batch, files_done in capture_parts(captures, engine=engine, workers=workers, now=now):
            parts.append(batch)
            held += batch.lines
            finished += files_done
            advance(batch.read_bytes)
            if held >= COMMIT_LINES:
                committer.submit(parts, [(p, digests[p]) for p in finished])
                parts, finished, held = [], [], 0
        if parts or finished:
            committer.submit(parts, [(p, digests[p]) for p in finished])
    advance(total)
    return report


def _new_files(store: Store, files: list[Path], report: IngestReport, hasher: ThreadPoolExecutor
               ) -> tuple[list[Path], dict[Path, str | Future], list[Rejected]]:
    """The files not stored before (a repeat is counted in ``report.files_skipped``), their
    SHA-256 digests, and a quarantine line for each file that could not be read.

    A large file whose size neither a stored file nor another input has cannot be a repeat: its
    digest (needed for the manifest) is worked out by ``hasher`` while the file is decoded."""
    known = store.ingested_digests()
    known_sizes = {f.get("size") for entry in store.manifest() for f in entry.get("files", [])}
    sizes = {path: file_size(path) for path in files}
    size_counts = Counter(sizes.values())
    todo: list[Path] = []
    digests: dict[Path, str | Future] = {}
    unreadable: list[Rejected] = []
    for path in files:
        size = sizes[path]
        if size >= LATE_DIGEST_BYTES and size not in known_sizes and size_counts[size] == 1:
            digests[path] = hasher.submit(file_digest, path)
            todo.append(path)
            continue
        try:
            digest = file_digest(path)
        except OSError as exc:  # left out of the manifest: tried again next run
            unreadable.append(_unreadable(path, exc))
            continue
        if digest in known:
            report.files_skipped += 1
        else:
            known.add(digest)
            digests[path] = digest
            todo.append(path)
    return todo, digests, unreadable


class _Committer:
    """Capture commits in a thread beside the decoding, one at a time and in order: while one
    batch is written, the engine's workers decode the next. At most one commit is in flight
    (memory); leaving waits for it, and its error, if any, is raised."""

    def __init__(self, store: Store, report: IngestReport):
        self.store, self.report = store, report
        self.pool = ThreadPoolExecutor(1, "commit")
        self.in_flight: Future | None = None

    def submit(self, parts: list[CaptureBatch], files: list[tuple[Path, str | Future]]) -> None:
        self.wait()
        self.in_flight = self.pool.submit(_commit_captures, self.store, self.report, parts, files)

    def wait(self) -> None:
        if self.in_flight is not None:
            in_flight, self.in_flight = self.in_flight, None
            in_flight.result()

    def __enter__(self) -> "_Committer":
        return self

    def __exit__(self, kind, *exc) -> None:
        try:
            if kind is None:
                self.wait()
        finally:  # on an error, a commit under way still finishes whole before this returns
            self.pool.shutdown(wait=True)


def _unreadable(path: Path, exc: OSError) -> Rejected:
    return Rejected(display_name(path), 1, None, f"file unreadable: {exc.strerror or exc}", "")


def _commit_captures(store: Store, report: IngestReport, parts: list[CaptureBatch],
                     files: list[tuple[Path, str | Future]]) -> None:
    batch = CaptureBatch.join(parts)
    files, late = _digests_of(files)
    batch.rejected += late
    snapshots, attributes = first_capture_wins(store, batch.snapshots, batch.attributes)
    report.clamped += batch.clamped
    report.repeated += batch.snapshots.num_rows - snapshots.num_rows
    _commit(store, report, {"snapshots": snapshots, "attributes": attributes},
            batch.rejected, batch.lines, files)


def _digests_of(files: list[tuple[Path, str | Future]]) -> tuple[list[tuple[Path, str]], list[Rejected]]:
    """The digests worked out beside the decoding, waited for; a file that could not be read
    for its digest is left out of the manifest (tried again next run) with a quarantine line."""
    ready, failed = [], []
    for path, digest in files:
        if isinstance(digest, Future):
            try:
                digest = digest.result()
            except OSError as exc:
                failed.append(_unreadable(path, exc))
                continue
        ready.append((path, digest))
    return ready, failed


def first_capture_wins(store: Store, snapshots: pa.Table, attributes: pa.Table) -> tuple[pa.Table, pa.Table]:
    """One capture per (serial, taken_at), the same one in both tables: the one already stored,
    else the first read (file order, then line order). Attribute rows of every other capture
    with that key are dropped, so a snapshot never sits beside another capture's attributes."""
    if snapshots.num_rows:
        keys = pa.table({"serial": snapshots["serial"], "taken_at": snapshots["taken_at"],
                         "_capture": snapshots["_capture"]})
        first = keys.group_by(["serial", "taken_at"], use_threads=False).aggregate([("_capture", "min")])
        kept = first["_capture_min"]
        stored = _stored_keys(store, snapshots["taken_at"])
        if stored.num_rows:
            fresh = first.join(stored, keys=["serial", "taken_at"], join_type="left anti")
            kept = fresh["_capture_min"]
        snapshots = snapshots.filter(pc.is_in(snapshots["_capture"], value_set=kept.combine_chunks()))
        attributes = attributes.filter(pc.is_in(attributes["_capture"], value_set=kept.combine_chunks()))
    return snapshots.drop_columns(["_capture"]), attributes.drop_columns(["_capture"])


def _stored_keys(store: Store, taken_at: pa.ChunkedArray) -> pa.Table:
    """(serial, taken_at) of the snapshots already stored on the days ``taken_at`` spans."""
    low, high = pc.min_max(taken_at).values()
    if not low.is_valid:
        return pa.table({"serial": pa.array([], pa.string())})
    until = high.as_py() + timedelta(microseconds=1)
    stored = store.read("snapshots", columns=["serial", "taken_at"], since=low.as_py(), until=until)
    return pa.Table.from_pandas(stored, preserve_index=False).cast(
        pa.schema([("serial", pa.string()), ("taken_at", pa.timestamp("us", tz="UTC"))]))


def _commit(store: Store, report: IngestReport, frames: dict, rejected: list[Rejected], lines: int,
            files: list[tuple[Path, str]]) -> None:
    for r in rejected:
        report.rejected_per_file[r.source] = report.rejected_per_file.get(r.source, 0) + 1
    sources = [
        SourceRecord(path=display_name(p), sha256=d, size=file_size(p),
                     quarantined=report.rejected_per_file.get(display_name(p), 0))
        for p, d in files
    ]
    written = store.commit(frames, sources=sources, quarantine=[r.as_record() for r in rejected])
    report.files_read += len(files)
    report.lines += lines
    # the excerpts are in the quarantine file; the report keeps the first few (memory)
    room = max(0, REPORT_TEXTS - len(report.rejected))
    report.rejected += rejected[:room] + [Rejected(r.source, r.line, r.field, r.reason, "") for r in rejected[room:]]
    for table, count in written.items():
        report.stored[table] = report.stored.get(table, 0) + count
