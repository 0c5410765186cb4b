"""Capture files (JSON Lines, optionally gzip) -> validated columns -> store rows + quarantine.

The input contract is written down in docs/capture-format.md. Lines come from the streaming
reader (``triage.ingest.reading``) in batches of at most ``BATCH_LINES``. Per line only the cheap
checks run in Python (JSON, required fields and their types, timestamp shape, hex length); the
byte layouts are decoded for the whole batch at once by the vectorised decoders in
``triage.formats``, which is what keeps ingest close to the cost of decoding the JSON alone
(benchmarks/ingest.py). Every problem becomes one line's (or one file's) ``Rejected`` entry.
"""

from __future__ import annotations

import json
import os
import platform
import re
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Iterator

import numpy as np
import orjson
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from triage.formats.ata_identify import decode_identify_batch
from triage.formats.ata_smart import decode_smart_batch
from triage.formats.ata_thresholds import decode_thresholds_batch
from triage.formats.nvme_health import decode_nvme_health_batch
from triage.formats.nvme_identify import decode_nvme_identify_batch
from triage.engine import LocalEngine
from triage.ingest.reading import (
    MAX_BLANK_LINES,
    MAX_LINE_BYTES,
    CaptureLines,
    FileStopped,
    OversizeLine,
    display_name,
    excerpt,
    is_gzip_name,
    is_utf8_text,
)
from triage.store.schema import (
    ATA_COUNTER_ATTRIBUTES,
    ATA_POWER_ON_HOURS_ID,
    ATA_TEMPERATURE_ID,
    ATTRIBUTES,
    SNAPSHOTS,
)

CAPTURE_VERSION = 1
#: payload name -> byte length, per bus (see docs/capture-format.md)
PAYLOADS = {
    "ata": {"identify": 512, "smart": 512, "thresholds": 512},
    "nvme": {"identify": 4096, "health": 512},
}
OPTIONAL_PAYLOADS = {"thresholds"}
# RFC 3339 section 5.6 date-time: full-date "T" full-time with a mandatory offset ("T" and "Z"
# may be lower case; the section's note allows a space for "T"). Ranges of the offset per the
# section's grammar (time-hour 00-23, time-minute 00-59); impossible dates are caught when parsed.
RFC3339 = re.compile(
    r"(\d{4}-\d{2}-\d{2})[Tt ](\d{2}:\d{2}:\d{2})(\.\d+)?([Zz]|[+-](?:[01]\d|2[0-3]):[0-5]\d)\Z")
INT64_MAX = 2**63 - 1
NVME_DATA_UNIT_BYTES = 512_000  # NVMe Base Spec 2.0, log 02h: a data unit is 1000 x 512 bytes
#: Captures dated before this are quarantined: no drive in a fleet today was read before it, and
#: a year-0000 clock must not become a partition (our choice, no source).
DATE_FLOOR = datetime(2000, 1, 1, tzinfo=timezone.utc)
#: Captures dated further than this past the ingesting machine's clock are quarantined: a host
#: whose clock runs ahead must not make every later report treat its capture as "now" (our
#: choice: more than any NTP-kept clock drifts, less than one nightly interval).
FUTURE_TOLERANCE = timedelta(hours=1)
#: Lines parsed and decoded together, at most (memory is bounded by a batch, not by a file)...
BATCH_LINES = 25_000
#: ... and bytes of quarantine excerpts held together, at most.
BATCH_EXCERPT_BYTES = 32 * 2**20
_STRING_FIELDS = ("host", "device", "slot", "group")

if TYPE_CHECKING:
    from triage.engine import _Engine


class LineError(ValueError):
    def __init__(self, field: str | None, reason: str):
        super().__init__(reason)
        self.field = field
        self.reason = reason


@dataclass
class Rejected:
    source: str
    line: int
    field: str | None
    reason: str
    text: str

    def as_record(self) -> dict:
        return {"source": self.source, "line": self.line, "field": self.field,
                "reason": self.reason, "text": self.text}

    def __str__(self) -> str:
        where = f"{self.source}:{self.line}"
        return f"{where}: {self.field + ': ' if self.field else ''}{self.reason}"


@dataclass
class _Pending:
    """Lines that passed the per-line checks, by bus, waiting for the batch decode."""

    meta: list[tuple] = field(default_factory=list)  # (capture id, line, host, device, slot, group, taken_at)
    payloads: dict[str, list[bytes | None]] = field(default_factory=dict)


@dataclass
class CaptureBatch:
    """Decoded captures of some lines. ``snapshots`` and ``attributes`` are Arrow tables of the
    store's SNAPSHOTS / ATTRIBUTES columns plus ``_capture`` (file sequence << 32 | line), which
    says which capture an attribute row belongs to; integers never pass through floating point."""

    snapshots: pa.Table
    attributes: pa.Table
    rejected: list[Rejected]
    lines: int
    clamped: int = 0  # captures with a counter beyond the int64 column, stored at 2**63-1
    read_bytes: int = 0  # bytes of the files on disk read for this batch (progress)

    @classmethod
    def empty(cls) -> "CaptureBatch":
        return cls(_with_capture(SNAPSHOTS).empty_table(), _with_capture(ATTRIBUTES).empty_table(), [], 0)

    @classmethod
    def join(cls, parts: list["CaptureBatch"]) -> "CaptureBatch":
        if not parts:
            return cls.empty()
        return cls(
            snapshots=pa.concat_tables([p.snapshots for p in parts]),
            attributes=pa.concat_tables([p.attributes for p in parts]),
            rejected=[r for p in parts for r in p.rejected],
            lines=sum(p.lines for p in parts),
            clamped=sum(p.clamped for p in parts),
            read_bytes=sum(p.read_bytes for p in parts),
        )


def _with_capture(schema: pa.Schema) -> pa.Schema:
    return schema.append(pa.field("_capture", pa.int64()))


def normalise_timestamp(text: str) -> str | None:
    """An RFC 3339 date-time as the text Arrow parses (upper-case "T"/"Z", at most 6 fractional
    digits: the store keeps microseconds, finer digits are cut), or None if it is not one."""
    match = RFC3339.match(text)
    if match is None:
        return None
    date, time, fraction, offset = match.groups()
    if len(text) == 20 and text[10] == "T" and text[19] == "Z":
        return text  # the common shape, as written by `triage capture`
    return f"{date}T{time}{(fraction or '')[:7]}{offset.upper()}"


def _no_constants(name: str):
    raise ValueError(f"{name} is not JSON")


def load_json(line: bytes) -> object:
    """One JSON text (RFC 8259) -> object. orjson first (strict, ~3x the stdlib's speed); a text
    it refuses only for an integer beyond 64 bits is read again by the stdlib, so a huge number in
    an unknown key does not cost the line."""
    try:
        return orjson.loads(line)
    except orjson.JSONDecodeError as exc:
        first = exc
    try:
        text = line.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise LineError(None, f"not UTF-8: byte {line[exc.start]:#04x} at column {exc.start + 1}") from None
    try:
        obj = json.loads(text, parse_constant=_no_constants)
    except (ValueError, RecursionError):
        raise LineError(None, f"bad JSON: {first.msg} at column {first.colno}") from None
    if isinstance(obj, dict):
        for name in _STRING_FIELDS + ("taken_at",):
            value = obj.get(name)
            if isinstance(value, str) and not is_utf8_text(value):
                raise LineError(name, "not valid Unicode (a lone surrogate escape)")
    return obj


def check_line(text: bytes) -> tuple[dict, str, str]:
    """The per-line checks of the contract; returns the object, its bus and its timestamp as
    :func:`normalise_timestamp` gives it."""
    obj = load_json(text)
    if not isinstance(obj, dict):
        raise LineError(None, "line is not a JSON object")
    version = obj.get("capture")
    if type(version) is not int or version != CAPTURE_VERSION:  # not true, not 1.0
        raise LineError("capture", f"unsupported capture version {_short(version)} (expected the integer 1)")
    for name in ("host", "device"):
        value = obj.get(name)
        if not isinstance(value, str) or not value:
            raise LineError(name, "missing or not a non-empty string")
    for name in ("slot", "group"):
        value = obj.get(name)
        if value is not None and not isinstance(value, str):
            raise LineError(name, "must be a string or null")
    taken_at = obj.get("taken_at")
    stamp = normalise_timestamp(taken_at) if isinstance(taken_at, str) else None
    if stamp is None:
        raise LineError("taken_at", f"not an RFC 3339 timestamp with offset: {_short(taken_at)}")
    bus = obj.get("bus")
    if not isinstance(bus, str) or bus not in PAYLOADS:
        raise LineError("bus", f"must be 'ata' or 'nvme', got {_short(bus)}")
    return obj, bus, stamp


def _short(value: object, limit: int = 80) -> str:
    """A value for a reason line: its repr, cut to ``limit`` characters."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit] + "..."


def decode_payload(obj: dict, name: str, length: int) -> bytes | None:
    value = obj.get(name)
    if value is None:
        if name in OPTIONAL_PAYLOADS:
            return None
        raise LineError(name, "missing")
    if not isinstance(value, str):
        raise LineError(name, "must be a hex string")
    if len(value) != 2 * length:
        raise LineError(name, f"wrong length: {len(value)} hex digits, expected {2 * length}")
    try:
        data = bytes.fromhex(value)
    except ValueError:
        raise LineError(name, "bad hex") from None
    if len(data) != length:  # bytes.fromhex skips whitespace: the payload is short
        raise LineError(name, "bad hex: holds whitespace")
    return data


def parse_capture_files(paths: list[Path], workers: int | None = None, now: datetime | None = None) -> CaptureBatch:
    """Read capture files whole; good lines become store rows, bad ones ``Rejected`` entries
    (a convenience over :func:`capture_parts`, whose batches bound the memory)."""
    return CaptureBatch.join([batch for batch, _ in capture_parts(list(paths), workers=workers, now=now)])


#: Compressed bytes of consecutive files read as one task, at most: about 10,000 lines, so a
#: group fits in one worker's batch (a longer one is finished in the main process, serially).
#: Fewer when there would be under 4 tasks per worker (idle workers at the end).
GROUP_BYTES = 2**20
#: A plain (not gzip) file is cut into byte ranges of at most this many bytes, read by several
#: workers at once (about 5,000 ATA captures: one range is one modest batch)...
RANGE_BYTES = 16 * 2**20
#: ... and of at least this many (a range per few hundred lines would cost more than it saves).
MIN_RANGE_BYTES = 2**20


@dataclass(frozen=True)
class Piece:
    """A stretch of one capture file: the whole file, or -- plain files only -- the lines that
    start in bytes ``[start, stop)`` (``stop`` None: to the end of the file)."""

    seq: int  # the file's place in the run's file order
    path: Path
    start: int = 0
    stop: int | None = None

    @property
    def is_range(self) -> bool:
        return self.start > 0 or self.stop is not None


@dataclass(frozen=True)
class CaptureTask:
    """One map step of ingest, a plain description any engine can ship to a worker: consecutive
    small files read together, or one byte range of a large plain file."""

    pieces: tuple[Piece, ...]
    now: datetime
    max_lines: int


@dataclass
class TaskOutput:
    """A batch read by a task, and where the task stands."""

    batch: CaptureBatch
    finished: list[Path]  # files whose last line is in this batch
    resume: tuple | None  # where to go on (the task stopped at ``max_lines``), None when done
    lines_numbered: int  # lines of the current piece numbered so far, blank ones included
    blank_lines: int  # blank lines of the current piece so far


def plan_tasks(paths: list[Path], workers: int, now: datetime, max_lines: int) -> list[CaptureTask]:
    """The run's tasks in file order: large plain files cut into byte ranges, the other files in
    groups of about ``GROUP_BYTES``."""
    sizes = [file_size(p) for p in paths]
    target = max(1, min(GROUP_BYTES, sum(sizes) // (4 * workers)))
    tasks: list[CaptureTask] = []
    group: list[Piece] = []
    held = 0

    def close_group() -> None:
        nonlocal group, held
        if group:
            tasks.append(CaptureTask(tuple(group), now, max_lines))
        group, held = [], 0

    for seq, (path, size) in enumerate(zip(paths, sizes)):
        span = max(MIN_RANGE_BYTES, min(RANGE_BYTES, size // (4 * workers)))
        if not is_gzip_name(path) and size >= 2 * span:
            close_group()
            cuts = list(range(0, size, span))
            for start, stop in zip(cuts, cuts[1:] + [None]):
                tasks.append(CaptureTask((Piece(seq, path, start, stop),), now, max_lines))
            continue
        group.append(Piece(seq, path))
        held += size
        if held >= target:
            close_group()
    close_group()
    return tasks


def capture_parts(
    paths: list[Path],
    *,
    engine: "_Engine | None" = None,
    workers: int | None = None,
    now: datetime | None = None,
    max_lines: int | None = None,
) -> Iterator[tuple[CaptureBatch, list[Path]]]:
    """The captures of ``paths`` in batches of at most ``max_lines`` lines, in file order.

    Yields ``(batch, finished)``: ``finished`` lists the files whose last line is in the batch.
    The tasks (:func:`plan_tasks`) run on ``engine`` (default: a local one with ``workers``
    processes, one per CPU), at most two per worker ahead of the batch handed out; a task longer
    than a batch is continued in this process from where the worker stopped. A byte range numbers
    its lines from 1; here they are shifted by the lines of the ranges before it, so line numbers
    and ``_capture`` ids come out exactly as if the file had been read in one piece.
    """
    now = now or datetime.now(timezone.utc)
    max_lines = max_lines or BATCH_LINES
    paths = list(paths)
    if not paths:
        return
    own = engine is None
    if own:  # as many processes as there are tasks to share, up to one per CPU (a large file is several)
        wanted = max(1, workers or os.cpu_count() or 1)
        tasks = plan_tasks(paths, wanted, now, max_lines)
        engine = LocalEngine(max(1, min(wanted, len(tasks))))
    else:
        tasks = plan_tasks(paths, engine.workers, now, max_lines)
    try:
        numbered: dict[int, int] = {}  # file sequence -> lines numbered by its ranges read so far
        blanks: dict[int, int] = {}
        for task, first in zip(tasks, engine.map(read_task, tasks, ahead=2 * engine.workers)):
            piece = task.pieces[0]
            for out in _continued(task, first):
                if piece.is_range:
                    _shift_lines(out.batch, numbered.get(piece.seq, 0))
                    if out.resume is None:  # the range is done
                        numbered[piece.seq] = numbered.get(piece.seq, 0) + out.lines_numbered
                        blanks[piece.seq] = blanks.get(piece.seq, 0) + out.blank_lines
                        if piece.stop is None and blanks[piece.seq] > MAX_BLANK_LINES:
                            out.batch.rejected.append(_blank_lines_rejected(
                                display_name(piece.path), numbered[piece.seq] + 1, blanks[piece.seq]))
                yield out.batch, out.finished
    finally:
        if own:
            engine.close()


class InputNotVisible(RuntimeError):
    """A task's input file is not where the run found it (a Dask worker without the shared file
    system, a file moved away mid-run): one line; the run stops before anything of it is stored,
    rather than quarantining the whole file as unreadable and listing it as ingested."""


def read_task(task: CaptureTask) -> TaskOutput:
    """On a worker: the first batch of a task (and where to resume when it is longer)."""
    for piece in task.pieces:
        try:
            os.stat(piece.path)
        except OSError as exc:
            raise InputNotVisible(
                f"{display_name(piece.path)}: cannot be read where the task ran ({platform.node()}: "
                f"{exc.strerror or exc}); workers must see the input files at the same paths as "
                "triage ingest; this file was not stored") from None
    return _TaskReader(task).fill()


def _continued(task: CaptureTask, first: TaskOutput) -> Iterator[TaskOutput]:
    """The worker's first batch, then the rest of a long task, read in this process."""
    yield first
    if first.resume is not None:
        reader = _TaskReader(task, first.resume)
        while not reader.done():
            yield reader.fill()


def _shift_lines(batch: CaptureBatch, shift: int) -> None:
    """Line numbers of a byte range made the file's: ``shift`` lines come before the range."""
    if not shift:
        return
    for name in ("snapshots", "attributes"):
        table = getattr(batch, name)
        column = table.schema.get_field_index("_capture")
        setattr(batch, name, table.set_column(column, "_capture", pc.add(table["_capture"], shift)))
    batch.rejected = [replace(r, line=r.line + shift) for r in batch.rejected]


def _blank_lines_rejected(source: str, line: int, count: int) -> Rejected:
    return Rejected(source, line, None, f"{count} blank lines (a capture program writes none); "
                                        "the other lines were read", "")


def file_size(path: Path) -> int:
    """Bytes on disk, 0 when the file cannot be looked at (the reader reports why)."""
    try:
        return path.stat().st_size
    except OSError:
        return 0  # reported when it is read


class _TaskReader:
    """The lines of a task's pieces, checked per line and decoded per batch; keeps its place in
    the current piece between batches (a gzip stream is never inflated twice in one process)."""

    def __init__(self, task: CaptureTask, resume: tuple | None = None):
        self.task = task
        self.pieces = task.pieces
        self.index, start, first_line, disk, blank = resume or (0, None, 1, 0, 0)
        self.reader: CaptureLines | None = None
        self.lines: Iterator | None = None
        if not self.done():
            self._open(start, first_line, disk, blank)

    def _open(self, start: int | None = None, first_line: int = 1, disk: int = 0, blank: int = 0) -> None:
        piece = self.pieces[self.index]
        self.reader = CaptureLines(piece.path, piece.start if start is None else start, first_line,
                                   piece.stop, disk)
        self.reader.blank_lines = blank
        self.lines = iter(self.reader)

    def done(self) -> bool:
        return self.index >= len(self.pieces)

    def resume_point(self) -> tuple | None:
        if self.done():
            return None
        r = self.reader
        return (self.index, r.position, r.next_line, r.disk_position, r.blank_lines)

    def fill(self) -> TaskOutput:
        """Up to ``max_lines`` lines (and ``BATCH_EXCERPT_BYTES`` of excerpts), decoded."""
        max_lines = self.task.max_lines
        pending = {bus: _Pending(payloads={n: [] for n in names}) for bus, names in PAYLOADS.items()}
        rejected: list[Rejected] = []
        finished: list[Path] = []
        count = excerpt_bytes = read_bytes = 0
        numbered = blank = 0
        starts: dict[int, tuple[int, int]] = {}  # seq -> where this batch began in that file
        while not self.done() and count < max_lines and excerpt_bytes < BATCH_EXCERPT_BYTES:
            piece = self.pieces[self.index]
            starts.setdefault(piece.seq, (self.reader.position, self.reader.next_line))
            n, size, piece_done = _read_lines(self.reader, self.lines, piece, pending, rejected,
                                              max_lines - count)
            count += n
            excerpt_bytes += size
            read_bytes += self.reader.new_bytes()
            numbered, blank = self.reader.next_line - 1, self.reader.blank_lines
            if piece_done:
                if piece.stop is None:
                    finished.append(piece.path)
                self.index += 1
                if not self.done():
                    self._open()
        parts, late = [], []
        sources = {p.seq: (p.path, display_name(p.path)) for p in self.pieces}
        for bus, batch in pending.items():
            if batch.meta:
                decode = _decode_ata if bus == "ata" else _decode_nvme
                part, bad = decode(batch, sources, self.task.now)
                parts.append(part)
                late += bad
        batch = CaptureBatch.join(parts)
        batch.rejected = rejected + _with_line_texts(late, sources, starts)
        batch.lines = count
        batch.read_bytes = read_bytes
        return TaskOutput(batch, finished, self.resume_point(), numbered, blank)


def _read_lines(reader: CaptureLines, lines: Iterator, piece: Piece, pending: dict,
                rejected: list[Rejected], max_lines: int) -> tuple[int, int, bool]:
    """Check up to ``max_lines`` lines of one piece into ``pending``; returns the lines read, the
    excerpt bytes kept, and whether the piece is done."""
    source = display_name(piece.path)
    seq = piece.seq
    count = excerpt_bytes = 0
    done = stopped = False
    # per bus: (payload name, byte length, the batch's list of that payload), bound once
    columns = {bus: [(name, size, pending[bus].payloads[name]) for name, size in names.items()]
               for bus, names in PAYLOADS.items()}
    try:
        while count < max_lines and excerpt_bytes < BATCH_EXCERPT_BYTES:
            item = next(lines, None)
            if item is None:
                done = True
                break
            number, line = item
            count += 1
            try:
                if isinstance(line, OversizeLine):
                    raise LineError(None, f"line of {line.length} bytes is over the limit of {MAX_LINE_BYTES}")
                obj, bus, stamp = check_line(line)
                decoded = [decode_payload(obj, name, size) for name, size, _ in columns[bus]]
            except LineError as exc:
                text = excerpt(line)
                excerpt_bytes += len(text)
                rejected.append(Rejected(source, number, exc.field, exc.reason, text))
                continue
            pending[bus].meta.append(((seq << 32) | number, number, obj["host"], obj["device"],
                                      obj.get("slot"), obj.get("group"), stamp))
            for (_, _, column), data in zip(columns[bus], decoded):
                column.append(data)
    except FileStopped as exc:
        rejected.append(Rejected(source, reader.next_line, None, f"file unreadable after line {reader.next_line - 1}: {exc}", ""))
        done = stopped = True
    except OSError as exc:
        rejected.append(Rejected(source, reader.next_line, None, f"file unreadable: {exc.strerror or exc}", ""))
        done = stopped = True
    if done and not stopped and not piece.is_range and reader.blank_lines > MAX_BLANK_LINES:
        # a byte range's blank lines are added up over the file by capture_parts
        rejected.append(_blank_lines_rejected(source, reader.next_line, reader.blank_lines))
    return count, excerpt_bytes, done


def _with_line_texts(rejected: list[tuple[int, Rejected]], sources: dict, starts: dict) -> list[Rejected]:
    """Fill in the excerpts of lines rejected after the per-line stage (read again: they are rare,
    and keeping every line's text until the batch decode would double ingest's memory)."""
    wanted: dict[int, set[int]] = {}
    for seq, r in rejected:
        wanted.setdefault(seq, set()).add(r.line)
    texts: dict[tuple[int, int], str] = {}
    for seq, numbers in wanted.items():
        last = max(numbers)
        try:
            for number, line in CaptureLines(sources[seq][0], *starts[seq]):
                if number in numbers:
                    texts[seq, number] = excerpt(line)
                if number >= last:
                    break
        except (FileStopped, OSError):
            pass  # the lines before the damage were found; the damage itself is reported already
    return [Rejected(r.source, r.line, r.field, r.reason, texts.get((seq, r.line), r.text)) for seq, r in rejected]


def _stack(chunks: list[bytes | None], length: int) -> np.ndarray:
    filled = [c if c is not None else bytes(length) for c in chunks]
    return np.frombuffer(b"".join(filled), dtype=np.uint8).reshape(len(filled), length)


def _meta_frame(batch: _Pending, bus: str, sources: dict) -> pd.DataFrame:
    meta = pd.DataFrame(batch.meta, columns=["_capture", "line", "host", "device",
                                             "slot", "group", "taken_at"])
    meta["seq"] = meta["_capture"].to_numpy(np.int64) >> 32
    meta["source_file"] = meta["seq"].map({seq: name for seq, (_, name) in sources.items()})
    meta["bus"] = bus
    meta["taken_at"] = _parse_times(meta["taken_at"])
    return meta


def _parse_times(stamps: pd.Series) -> pd.Series:
    """Normalised RFC 3339 strings -> UTC microseconds; an impossible date becomes NaT."""
    values = pa.array(stamps.to_numpy(dtype=object), pa.string())
    try:  # Arrow's ISO 8601 cast (with offsets) is several times faster than pandas' parser
        parsed = pc.cast(values, pa.timestamp("us", tz="UTC"))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        parsed = pa.array([_parse_one(s) for s in values.to_pylist()], pa.timestamp("us", tz="UTC"))
    return pd.Series(parsed.to_pandas(), index=stamps.index)


def _parse_one(stamp: str):
    try:
        return pc.cast(pa.array([stamp], pa.string()), pa.timestamp("us", tz="UTC"))[0].as_py()
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, ValueError, OverflowError):
        return None


def _reject_rows(meta: pd.DataFrame, mask: np.ndarray, field: str, reason) -> list[tuple[int, Rejected]]:
    """(file sequence, Rejected) for the rows in ``mask``; the excerpt is filled in later."""
    out = []
    for i in np.flatnonzero(mask):
        why = reason(i) if callable(reason) else reason
        out.append((int(meta.at[i, "seq"]), Rejected(meta.at[i, "source_file"], int(meta.at[i, "line"]), field, why, "")))
    return out


def _common_checks(meta: pd.DataFrame, serial: pd.Series, now: datetime) -> tuple[np.ndarray, list]:
    taken = meta["taken_at"]
    bad_time = taken.isna().to_numpy()
    latest = pd.Timestamp(now) + FUTURE_TOLERANCE
    too_early = (taken < pd.Timestamp(DATE_FLOOR)).fillna(False).to_numpy(bool)
    too_late = (taken > latest).fillna(False).to_numpy(bool)
    bad_serial = (serial.fillna("").str.len() == 0).to_numpy() & ~bad_time
    rejected = _reject_rows(meta, bad_time, "taken_at", "not a valid date and time")
    rejected += _reject_rows(meta, too_early, "taken_at",
                             f"dated before {DATE_FLOOR:%Y-%m-%d} (a host clock that was never set?)")
    rejected += _reject_rows(meta, too_late & ~too_early, "taken_at",
                             lambda i: f"dated {_iso(taken.iat[i])}, more than "
                                       f"{FUTURE_TOLERANCE} after this machine's clock "
                                       f"({now:%Y-%m-%dT%H:%M:%SZ}): a host clock running ahead?")
    bad_time |= too_early | too_late
    rejected += _reject_rows(meta, bad_serial & ~bad_time, "identify", "serial number is empty")
    return bad_time | bad_serial, rejected


def _iso(moment: pd.Timestamp) -> str:
    """A UTC moment as RFC 3339 text, also past year 9999 (where strftime gives up)."""
    return (f"{moment.year:04d}-{moment.month:02d}-{moment.day:02d}T"
            f"{moment.hour:02d}:{moment.minute:02d}:{moment.second:02d}Z")


def _table(schema: pa.Schema, columns: dict, n: int) -> pa.Table:
    """Columns (numpy, pandas or Arrow) -> a table of ``schema`` plus ``_capture``; integer
    columns go straight from int64 to Arrow (never through float), absent ones are null."""
    arrays = []
    for fld in _with_capture(schema):
        value = columns.get(fld.name)
        if value is None:
            arrays.append(pa.nulls(n, fld.type))
        elif isinstance(value, (pa.Array, pa.ChunkedArray)):
            arrays.append(value.cast(fld.type))
        else:
            arrays.append(pa.array(value, fld.type, from_pandas=True))
    return pa.Table.from_arrays(arrays, schema=_with_capture(schema))


def _decode_ata(batch: _Pending, sources: dict, now: datetime) -> tuple[CaptureBatch, list]:
    meta = _meta_frame(batch, "ata", sources)
    n = len(meta)
    identity = decode_identify_batch(_stack(batch.payloads["identify"], 512))
    smart_rows, attrs = decode_smart_batch(_stack(batch.payloads["smart"], 512))
    has_thresholds = np.array([p is not None for p in batch.payloads["thresholds"]])
    thr_rows, thresholds = decode_thresholds_batch(_stack(batch.payloads["thresholds"], 512))

    bad, rejected = _common_checks(meta, identity["serial"], now)
    checks = [
        (~identity["integrity_ok"].to_numpy(bool), "identify", "integrity word checksum mismatch (word 255)"),
        (identity["problem"].eq("identify.logical_sector_size").to_numpy(bool), "identify",
         "logical sector size in words 117-118 is under 512 bytes"),
        (~smart_rows["checksum_ok"].to_numpy(bool), "smart", "checksum mismatch (byte 511)"),
        (has_thresholds & ~thr_rows["checksum_ok"].to_numpy(bool), "thresholds", "checksum mismatch (byte 511)"),
    ]
    for mask, name, reason in checks:
        mask = mask & ~bad
        rejected += _reject_rows(meta, mask, name, reason)
        bad |= mask

    # Attribute rows with their thresholds (threshold null when the capture had none).
    attrs = attrs[~bad[attrs["row"].to_numpy()]]
    row = attrs["row"].to_numpy()
    raw = attrs["raw_value"].to_numpy(np.int64)
    ids = attrs["attribute_id"].to_numpy()
    attrs = attrs.assign(threshold=_thresholds_of(n, thresholds, has_thresholds, row, ids))

    capacity = identity["user_capacity_bytes"].to_numpy(np.int64)
    columns = {
        "serial": identity["serial"].to_numpy(object), "model": identity["model"].to_numpy(object),
        "firmware": identity["firmware"].to_numpy(object), "bus": np.full(n, "ata", object),
        "user_capacity_bytes": capacity, "rotation_rpm": identity["rotation_rpm"].array,
        "wwn": identity["wwn"].to_numpy(object),
        # Power-on hours: low 32 bits of attribute 9's raw value; some drives keep minutes or
        # other counts in the upper bytes (common practice, no source).
        "power_on_hours": _pick(n, row, ids, raw & 0xFFFFFFFF, ATA_POWER_ON_HOURS_ID),
        # Temperature: low byte of attribute 194's raw value in degrees Celsius. This is common
        # practice across vendors, not defined by the ATA standard.
        "temperature_c": _pick(n, row, ids, raw & 0xFF, ATA_TEMPERATURE_ID),
    }
    for attr_id, column in ATA_COUNTER_ATTRIBUTES.items():
        columns[column] = _pick(n, row, ids, raw, attr_id)
    columns["threshold_tripped"], columns["prefail_tripped"] = _tripped(n, attrs, has_thresholds)
    clamped = capacity == INT64_MAX  # 48-bit sectors x sector size beyond int64 (saturated)
    columns["counters_clamped"] = clamped
    _add_meta(columns, meta)
    good = ~bad
    snapshots = _table(SNAPSHOTS, columns, n).filter(pa.array(good))
    # One row per attribute per capture: built in Arrow (serial and time taken by index), since
    # it is ten times the snapshot count and goes straight to the store.
    take = pa.array(row)
    threshold = attrs["threshold"].array
    attributes = _table(ATTRIBUTES, {
        "serial": pa.array(identity["serial"].to_numpy(object), pa.string()).take(take),
        "taken_at": pa.array(meta["taken_at"].array.as_unit("us").asi8, pa.int64()).take(take),
        "attribute_id": ids, "status_flags": attrs["status_flags"].to_numpy(),
        "normalized": attrs["normalized"].to_numpy(), "worst_normalized": attrs["worst_normalized"].to_numpy(),
        "threshold": pa.array(threshold.to_numpy(dtype=np.int64, na_value=0), pa.int32(), mask=threshold.isna()),
        "raw_value": raw,
        "_capture": meta["_capture"].to_numpy(np.int64)[row],
    }, len(row))
    return CaptureBatch(snapshots, attributes, [], 0, int((clamped & good).sum())), rejected


def _add_meta(columns: dict, meta: pd.DataFrame) -> None:
    columns["host"] = meta["host"].to_numpy(object)
    columns["device"] = meta["device"].to_numpy(object)
    columns["slot"] = meta["slot"].to_numpy(object)
    columns["group"] = meta["group"].to_numpy(object)
    columns["taken_at"] = pa.array(meta["taken_at"].array.as_unit("us").asi8, pa.int64())
    columns["_capture"] = meta["_capture"].to_numpy(np.int64)
    columns["source_file"] = meta["source_file"].to_numpy(object)


def _thresholds_of(n: int, thresholds: pd.DataFrame, has_thresholds: np.ndarray, row: np.ndarray,
                   ids: np.ndarray) -> pd.arrays.IntegerArray:
    """The threshold of each attribute row, looked up by (capture, id); null without a thresholds
    sector or without an entry for that id (a table (captures x 256 ids) instead of a join)."""
    table = np.full((n, 256), -1, dtype=np.int16)
    t_row = thresholds["row"].to_numpy()
    keep = has_thresholds[t_row]
    table[t_row[keep], thresholds["attribute_id"].to_numpy()[keep]] = thresholds["threshold"].to_numpy()[keep]
    found = table[row, ids].astype(np.int64)
    return pd.arrays.IntegerArray(np.maximum(found, 0), found < 0)


def _pick(n: int, row: np.ndarray, ids: np.ndarray, values: np.ndarray, attr_id: int) -> pa.Array:
    """Per capture, the value of one attribute id (null where the drive does not report it)."""
    mask = ids == attr_id
    data = np.zeros(n, dtype=np.int64)
    seen = np.zeros(n, dtype=bool)
    data[row[mask]] = values[mask]
    seen[row[mask]] = True
    return pa.array(data, pa.int64(), mask=~seen)


def _tripped(n: int, attrs: pd.DataFrame, has_thresholds: np.ndarray) -> tuple[pa.Array, pa.Array]:
    """SMART threshold semantics (SFF-8035i; ATA ACS-3 SMART RETURN STATUS): an attribute has
    crossed its threshold when its normalized value is at or below a non-zero threshold."""
    threshold = attrs["threshold"].fillna(0).to_numpy(np.int64)
    crossed = (threshold > 0) & (attrs["normalized"].to_numpy(np.int64) <= threshold)
    prefail = crossed & ((attrs["status_flags"].to_numpy(np.int64) & 1) == 1)
    row = attrs["row"].to_numpy()
    any_crossed = np.zeros(n, dtype=bool)
    any_prefail = np.zeros(n, dtype=bool)
    any_crossed[row[crossed]] = True
    any_prefail[row[prefail]] = True
    unknown = ~has_thresholds
    return pa.array(any_crossed, mask=unknown), pa.array(any_prefail, mask=unknown)


#: NVMe 128-bit counters kept in int64 columns: log 02h field -> snapshot column.
NVME_COUNTERS = {
    "power_on_hours": "power_on_hours",
    "power_cycles": "power_cycles",
    "media_errors": "nvme_media_errors",
    "unsafe_shutdowns": "nvme_unsafe_shutdowns",
    "error_log_entries": "nvme_error_log_entries",
}


def _decode_nvme(batch: _Pending, sources: dict, now: datetime) -> tuple[CaptureBatch, list]:
    meta = _meta_frame(batch, "nvme", sources)
    n = len(meta)
    identity = decode_nvme_identify_batch(_stack(batch.payloads["identify"], 4096))
    health = decode_nvme_health_batch(_stack(batch.payloads["health"], 512))
    bad, rejected = _common_checks(meta, identity["serial"], now)
    written = health["data_units_written"].to_numpy(np.int64)
    # data units of 1000 x 512 bytes; saturate rather than wrap past int64
    too_many = written > INT64_MAX // NVME_DATA_UNIT_BYTES
    capacity = identity["total_capacity_bytes"].to_numpy(np.int64)
    columns = {
        "serial": identity["serial"].to_numpy(object), "model": identity["model"].to_numpy(object),
        "firmware": identity["firmware"].to_numpy(object), "bus": np.full(n, "nvme", object),
        "user_capacity_bytes": capacity,
        "rotation_rpm": np.zeros(n, np.int64),  # NVMe devices are solid state
        "temperature_c": health["composite_temperature_k"].to_numpy(np.int64) - 273,  # kelvin -> Celsius
        "nvme_critical_warning": health["critical_warning"].to_numpy(np.int64),
        "nvme_spare_pct": health["available_spare_pct"].to_numpy(np.int64),
        "nvme_spare_threshold_pct": health["spare_threshold_pct"].to_numpy(np.int64),
        "nvme_used_pct": health["percentage_used"].to_numpy(np.int64),
        "data_written_bytes": np.where(too_many, INT64_MAX, written * NVME_DATA_UNIT_BYTES),
    }
    # 128-bit counters beyond int64 come saturated at 2**63-1 from the decoder: flag them.
    clamped = too_many | (capacity == INT64_MAX)
    for name, column in NVME_COUNTERS.items():
        values = health[name].to_numpy(np.int64)
        columns[column] = values
        clamped |= values == INT64_MAX
    columns["counters_clamped"] = clamped
    _add_meta(columns, meta)
    good = ~bad
    snapshots = _table(SNAPSHOTS, columns, n).filter(pa.array(good))
    return CaptureBatch(snapshots, _with_capture(ATTRIBUTES).empty_table(), [], 0,
                        int((clamped & good).sum())), rejected
