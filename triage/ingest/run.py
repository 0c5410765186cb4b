"""``triage ingest``: capture files and removal logs -> one atomic commit per chunk of files."""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable

from triage.ingest.captures import Rejected, parse_capture_files
from triage.ingest.removals import parse_removal_files
from triage.store.dataset import SourceRecord, Store

CAPTURE_SUFFIXES = (".jsonl", ".jsonl.gz")
REMOVAL_SUFFIXES = (".csv",)
#: Compressed bytes of files per commit: a night of a 100k-drive fleet (~15 MB gzip) in one or
#: two commits, so each day gets few Parquet parts. Capture text compresses about 30:1, and a
#: chunk's decoded payloads are held in memory together: this bounds ingest near 1 GB.
CHUNK_BYTES = 16 * 2**20


@dataclass
class IngestReport:
    files_read: int = 0
    files_skipped: int = 0  # already in the manifest (same content)
    lines: int = 0
    stored: dict[str, int] = field(default_factory=dict)
    rejected: list[Rejected] = field(default_factory=list)

    @property
    def new_rows(self) -> int:
        return sum(self.stored.values())


def find_inputs(paths: Iterable[Path]) -> list[Path]:
    """Files named on the command line, and the input files inside named directories."""
    found = []
    for path in paths:
        if path.is_dir():
            found += sorted(p for p in path.rglob("*") if p.is_file() and _kind(p))
        elif path.is_file():
            if not _kind(path):
                raise ValueError(f"{path}: not a capture file (.jsonl, .jsonl.gz) or removal log (.csv)")
            found.append(path)
        else:
            raise FileNotFoundError(f"{path}: no such file or directory")
    return found


def _kind(path: Path) -> str | None:
    name = path.name
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
) -> IngestReport:
    """Ingest files (or directories of them) into ``store``; files already ingested are skipped."""
    files = find_inputs(paths)
    report = IngestReport()
    known = store.ingested_digests()
    todo: list[tuple[Path, str]] = []
    for path in files:
        digest = file_digest(path)
        if digest in known:
            report.files_skipped += 1
        else:
            known.add(digest)
            todo.append((path, digest))
    chunks, chunk, size = [], [], 0
    for path, digest in todo:
        chunk.append((path, digest))
        size += path.stat().st_size
        if size >= CHUNK_BYTES:
            chunks.append(chunk)
            chunk, size = [], 0
    if chunk:
        chunks.append(chunk)
    done = 0
    for chunk in chunks:
        _ingest_chunk(store, chunk, report)
        done += len(chunk)
        if progress:
            progress(done, len(todo))
    return report


def _ingest_chunk(store: Store, chunk: list[tuple[Path, str]], report: IngestReport) -> None:
    captures = [p for p, _ in chunk if _kind(p) == "capture"]
    removals = [p for p, _ in chunk if _kind(p) == "removals"]
    frames = {}
    rejected: list[Rejected] = []
    lines = 0
    if captures:
        batch = parse_capture_files(captures)
        frames["snapshots"] = batch.snapshots
        frames["attributes"] = batch.attributes
        rejected += batch.rejected
        lines += batch.lines
    if removals:
        removal_rows, bad, count = parse_removal_files(removals)
        frames["removals"] = removal_rows
        rejected += bad
        lines += count
    per_file_rejects: dict[str, int] = {}
    for r in rejected:
        per_file_rejects[r.source] = per_file_rejects.get(r.source, 0) + 1
    sources = [
        SourceRecord(path=str(p), sha256=d, size=p.stat().st_size,
                     quarantined=per_file_rejects.get(str(p), 0))
        for p, d in chunk
    ]
    written = store.commit(frames, sources=sources, quarantine=[r.as_record() for r in rejected])
    report.files_read += len(chunk)
    report.lines += lines
    report.rejected += rejected
    for table, count in written.items():
        report.stored[table] = report.stored.get(table, 0) + count
