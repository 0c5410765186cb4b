"""Capture files (JSON Lines, optionally gzip) -> validated columns -> store rows + quarantine.

The input contract is written down in docs/capture-format.md. Per line only the cheap checks run
in Python (JSON, required fields, timestamp shape, hex length); the byte layouts are decoded for
the whole batch at once by the vectorised decoders in ``triage.formats``, which is what keeps
ingest close to the cost of decoding the JSON alone (benchmarks/ingest.py).
"""

from __future__ import annotations

import multiprocessing
import os
import re
import zlib
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

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
from triage.store.schema import (
    ATA_COUNTER_ATTRIBUTES,
    ATA_POWER_ON_HOURS_ID,
    ATA_TEMPERATURE_ID,
)

CAPTURE_VERSION = 1
#: payload name -> byte length, per bus (see docs/capture-format.md)
PAYLOADS = {
    "ata": {"identify": 512, "smart": 512, "thresholds": 512},
    "nvme": {"identify": 4096, "health": 512},
}
OPTIONAL_PAYLOADS = {"thresholds"}
# RFC 3339 section 5.6 date-time: full-date "T" full-time, with a mandatory offset.
RFC3339 = re.compile(r"\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2}(\.\d+)?([Zz]|[+-]\d{2}:\d{2})\Z")
INT64_MAX = 2**63 - 1
NVME_DATA_UNIT_BYTES = 512_000  # NVMe Base Spec 2.0, log 02h: a data unit is 1000 x 512 bytes


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

    meta: list[tuple] = field(default_factory=list)  # (source, line, host, device, slot, group, taken_at)
    payloads: dict[str, list[bytes | None]] = field(default_factory=dict)


@dataclass
class CaptureBatch:
    snapshots: pd.DataFrame
    attributes: pa.Table | pd.DataFrame  # a pa.Table of the store's ATTRIBUTES columns when any
    rejected: list[Rejected]
    lines: int


def read_file(path: Path) -> tuple[list[bytes], LineError | None]:
    """The complete lines of a capture file, and the error that cut it short (None if none).

    The file is decompressed whole (a gzip file may hold several members, as ``cat a.gz b.gz``
    makes) and split at newlines: much faster than a line-by-line text reader. A damaged or
    truncated gzip stream keeps the lines before the damage; the incomplete last line is dropped
    and reported.
    """
    raw = path.read_bytes()
    error = None
    if path.name.endswith(".gz"):
        parts = []
        while raw:
            inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)
            try:
                parts.append(inflater.decompress(raw))
                parts.append(inflater.flush())
            except zlib.error as exc:
                error = f"damaged gzip data: {exc}"
                break
            if not inflater.eof:
                error = "gzip data ends early (truncated file)"
                break
            raw = inflater.unused_data.lstrip(b"\0")  # members may be padded with NULs
        data = b"".join(parts)
    else:
        data = raw
    lines = data.split(b"\n")
    last = lines.pop()  # after the final newline: empty, or a line without its newline
    if last.strip() and error is None:
        lines.append(last)  # a last line without a newline is still a line (unless cut off)
    if error is not None:
        return lines, LineError(None, f"file unreadable after line {len(lines)}: {error}")
    return lines, None


def line_text(line: bytes) -> str:
    """A raw line as quarantine text (undecodable bytes replaced, never dropped silently)."""
    return line.rstrip(b"\r").decode("utf-8", errors="replace")


def check_line(text: str | bytes) -> tuple[dict, str]:
    """The per-line checks of the contract; returns the object and its bus."""
    try:
        obj = orjson.loads(text)  # strict RFC 8259 (no NaN), UTF-8 checked, ~3x the stdlib's speed
    except orjson.JSONDecodeError as exc:
        raise LineError(None, f"bad JSON: {exc.msg} at column {exc.colno}") from None
    if not isinstance(obj, dict):
        raise LineError(None, "line is not a JSON object")
    if obj.get("capture") != CAPTURE_VERSION:
        raise LineError("capture", f"unsupported capture version {obj.get('capture')!r} (expected 1)")
    for name in ("host", "device"):
        value = obj.get(name)
        if not isinstance(value, str) or not value:
            raise LineError(name, "missing or not a non-empty string")
    for name in ("slot", "group"):
        value = obj.get(name)
        if value is not None and not isinstance(value, str):
            raise LineError(name, "must be a string or null")
    taken_at = obj.get("taken_at")
    if not isinstance(taken_at, str) or not RFC3339.match(taken_at):
        raise LineError("taken_at", f"not an RFC 3339 timestamp with offset: {taken_at!r}")
    bus = obj.get("bus")
    if bus not in PAYLOADS:
        raise LineError("bus", f"must be 'ata' or 'nvme', got {bus!r}")
    return obj, bus


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
        return bytes.fromhex(value)
    except ValueError:
        raise LineError(name, "bad hex") from None


def parse_capture_files(paths: list[Path], workers: int | None = None) -> CaptureBatch:
    """Read capture files; good lines become store rows, bad ones ``Rejected`` entries.

    With ``workers`` > 1 (default: one per CPU) the files are split into that many groups,
    read and decoded in parallel processes, and the results joined in the order of ``paths``.
    """
    paths = list(paths)
    workers = min(workers or os.cpu_count() or 1, len(paths))
    if workers <= 1:
        return _parse_group(paths)
    groups = [list(g) for g in np.array_split(np.array(paths, dtype=object), workers) if len(g)]
    context = multiprocessing.get_context("fork") if "fork" in multiprocessing.get_all_start_methods() else None
    with ProcessPoolExecutor(max_workers=len(groups), mp_context=context) as pool:
        parts = list(pool.map(_parse_group, groups))
    return CaptureBatch(
        snapshots=_concat_frames([p.snapshots for p in parts]),
        attributes=_concat_tables([p.attributes for p in parts]),
        rejected=[r for p in parts for r in p.rejected],
        lines=sum(p.lines for p in parts),
    )


def _parse_group(paths: list[Path]) -> CaptureBatch:
    pending = {bus: _Pending(payloads={n: [] for n in names}) for bus, names in PAYLOADS.items()}
    rejected: list[Rejected] = []
    lines = 0
    for path in paths:
        source = str(path)
        try:
            file_lines, error = read_file(path)
        except OSError as exc:
            rejected.append(Rejected(source, 1, None, f"file unreadable: {exc}", ""))
            continue
        lines += len(file_lines)
        for number, line in enumerate(file_lines, start=1):
            if not line.strip():
                continue
            try:
                obj, bus = check_line(line)
                decoded = [(n, decode_payload(obj, n, size)) for n, size in PAYLOADS[bus].items()]
            except LineError as exc:
                rejected.append(Rejected(source, number, exc.field, exc.reason, line_text(line)))
                continue
            target = pending[bus]
            target.meta.append((source, number, obj["host"], obj["device"], obj.get("slot"),
                                obj.get("group"), obj["taken_at"]))
            for name, data in decoded:
                target.payloads[name].append(data)
        if error is not None:
            rejected.append(Rejected(source, len(file_lines) + 1, error.field, error.reason, ""))
    snapshots, attributes, late = [], [], []
    for bus, batch in pending.items():
        if not batch.meta:
            continue
        decode = _decode_ata if bus == "ata" else _decode_nvme
        snap, attrs, bad = decode(batch)
        late.extend(bad)
        snapshots.append(snap)
        if attrs is not None:
            attributes.append(attrs)
    return CaptureBatch(
        snapshots=_concat_frames(snapshots),
        attributes=_concat_tables(attributes),
        rejected=rejected + _with_line_texts(late),
        lines=lines,
    )


def _concat_frames(frames: list[pd.DataFrame]) -> pd.DataFrame:
    frames = [f for f in frames if len(f)]
    return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()


def _concat_tables(tables: list) -> pa.Table | pd.DataFrame:
    tables = [t for t in tables if isinstance(t, pa.Table) and t.num_rows]
    return pa.concat_tables(tables) if tables else pd.DataFrame()


def _with_line_texts(rejected: list[Rejected]) -> list[Rejected]:
    """Fill in the text of lines rejected after the per-line stage (read again: they are rare,
    and keeping every line's text until the batch decode would double ingest's memory)."""
    wanted: dict[str, set[int]] = {}
    for r in rejected:
        wanted.setdefault(r.source, set()).add(r.line)
    texts: dict[tuple[str, int], str] = {}
    for source, numbers in wanted.items():
        file_lines, _ = read_file(Path(source))
        for number in numbers:
            texts[source, number] = line_text(file_lines[number - 1]) if number <= len(file_lines) else ""
    return [Rejected(r.source, r.line, r.field, r.reason, texts.get((r.source, r.line), r.text)) for r in rejected]


def _stack(chunks: list[bytes | None], length: int) -> np.ndarray:
    filled = [c if c is not None else bytes(length) for c in chunks]
    return np.frombuffer(b"".join(filled), dtype=np.uint8).reshape(len(filled), length)


def _meta_frame(batch: _Pending, bus: str) -> pd.DataFrame:
    meta = pd.DataFrame(batch.meta, columns=["source_file", "line", "host", "device",
                                             "slot", "group", "taken_at"])
    meta["bus"] = bus
    meta["taken_at"] = _parse_times(meta["taken_at"])
    return meta


def _parse_times(stamps: pd.Series) -> pd.Series:
    """RFC 3339 strings (shape already checked) -> UTC; an impossible date becomes NaT."""
    try:  # Arrow's ISO 8601 cast (with offsets) is several times faster than pandas' parser
        parsed = pc.cast(pa.array(stamps.to_numpy(dtype=object), pa.string()), pa.timestamp("us", tz="UTC"))
        return pd.Series(parsed.to_pandas(), index=stamps.index)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        pass  # lower-case 't'/'z', nanoseconds, an impossible date: let pandas sort them out
    try:
        return pd.to_datetime(stamps, utc=True, format="ISO8601")
    except (ValueError, OverflowError):
        return stamps.map(lambda s: pd.to_datetime(s, utc=True, format="ISO8601", errors="coerce"))


def _reject_rows(meta: pd.DataFrame, mask: np.ndarray, field: str, reason) -> list[Rejected]:
    out = []
    for i in np.flatnonzero(mask):
        why = reason(i) if callable(reason) else reason
        out.append(Rejected(meta.at[i, "source_file"], int(meta.at[i, "line"]), field, why, ""))
    return out


def _common_checks(meta: pd.DataFrame, serial: pd.Series) -> tuple[np.ndarray, list[Rejected]]:
    bad_time = meta["taken_at"].isna().to_numpy()
    bad_serial = (serial.fillna("").str.len() == 0).to_numpy() & ~bad_time
    rejected = _reject_rows(meta, bad_time, "taken_at", "not a valid date and time")
    rejected += _reject_rows(meta, bad_serial, "identify", "serial number is empty")
    return bad_time | bad_serial, rejected


def _decode_ata(batch: _Pending):
    meta = _meta_frame(batch, "ata")
    n = len(meta)
    identity = decode_identify_batch(_stack(batch.payloads["identify"], 512))
    smart_rows, attrs = decode_smart_batch(_stack(batch.payloads["smart"], 512))
    has_thresholds = np.array([p is not None for p in batch.payloads["thresholds"]])
    thr_rows, thresholds = decode_thresholds_batch(_stack(batch.payloads["thresholds"], 512))

    bad, rejected = _common_checks(meta, identity["serial"])
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

    snap = pd.DataFrame({
        "serial": identity["serial"], "model": identity["model"], "firmware": identity["firmware"],
        "bus": "ata", "user_capacity_bytes": identity["user_capacity_bytes"],
        "rotation_rpm": identity["rotation_rpm"], "wwn": identity["wwn"],
    })
    for name in ("host", "device", "slot", "group", "taken_at", "source_file"):
        snap[name] = meta[name]
    # Power-on hours: low 32 bits of attribute 9's raw value; some drives keep minutes or
    # other counts in the upper bytes (common practice, no source).
    snap["power_on_hours"] = _pick(n, row, ids, raw & 0xFFFFFFFF, ATA_POWER_ON_HOURS_ID)
    # Temperature: low byte of attribute 194's raw value in degrees Celsius. This is common
    # practice across vendors, not defined by the ATA standard.
    snap["temperature_c"] = _pick(n, row, ids, raw & 0xFF, ATA_TEMPERATURE_ID)
    for attr_id, column in ATA_COUNTER_ATTRIBUTES.items():
        snap[column] = _pick(n, row, ids, raw, attr_id)
    snap["threshold_tripped"], snap["prefail_tripped"] = _tripped(n, attrs, has_thresholds)

    good = ~bad
    snapshots = snap[good].reset_index(drop=True)
    # One row per attribute per capture: built in Arrow (serial and time taken by index), since
    # it is ten times the snapshot count and goes straight to the store.
    serial_of = pa.array(identity["serial"].to_numpy(object), pa.string())
    taken_of = pa.array(meta["taken_at"].array.as_unit("us").asi8, pa.int64())
    take = pa.array(row)
    threshold = attrs["threshold"].array
    attributes = pa.table({
        "serial": serial_of.take(take),
        "taken_at": taken_of.take(take).cast(pa.timestamp("us", tz="UTC")),
        "attribute_id": pa.array(ids, pa.int32()),
        "status_flags": pa.array(attrs["status_flags"].to_numpy(), pa.int32()),
        "normalized": pa.array(attrs["normalized"].to_numpy(), pa.int32()),
        "worst_normalized": pa.array(attrs["worst_normalized"].to_numpy(), pa.int32()),
        "threshold": pa.array(threshold.to_numpy(dtype=np.int64, na_value=0), pa.int32(), mask=threshold.isna()),
        "raw_value": pa.array(raw, pa.int64()),
    })
    return snapshots, attributes, rejected


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


def _pick(n: int, row: np.ndarray, ids: np.ndarray, values: np.ndarray, attr_id: int) -> pd.Series:
    """Per capture, the value of one attribute id (null where the drive does not report it)."""
    mask = ids == attr_id
    data = np.zeros(n, dtype=np.int64)
    seen = np.zeros(n, dtype=bool)
    data[row[mask]] = values[mask]
    seen[row[mask]] = True
    out = pd.arrays.IntegerArray(data, ~seen)
    return pd.Series(out)


def _tripped(n: int, attrs: pd.DataFrame, has_thresholds: np.ndarray):
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
    return (pd.Series(pd.arrays.BooleanArray(any_crossed, unknown)),
            pd.Series(pd.arrays.BooleanArray(any_prefail, unknown)))


def _decode_nvme(batch: _Pending):
    meta = _meta_frame(batch, "nvme")
    identity = decode_nvme_identify_batch(_stack(batch.payloads["identify"], 4096))
    health = decode_nvme_health_batch(_stack(batch.payloads["health"], 512))
    bad, rejected = _common_checks(meta, identity["serial"])
    written = health["data_units_written"].to_numpy(np.int64)
    # data units of 1000 x 512 bytes; saturate rather than wrap past int64
    data_written = np.where(written > INT64_MAX // NVME_DATA_UNIT_BYTES, INT64_MAX,
                            written * NVME_DATA_UNIT_BYTES)
    snap = pd.DataFrame({
        "serial": identity["serial"], "model": identity["model"], "firmware": identity["firmware"],
        "bus": "nvme", "user_capacity_bytes": identity["total_capacity_bytes"],
        "rotation_rpm": 0,  # NVMe devices are solid state
    })
    for name in ("host", "device", "slot", "group", "taken_at", "source_file"):
        snap[name] = meta[name]
    snap["power_on_hours"] = health["power_on_hours"]
    snap["temperature_c"] = health["composite_temperature_k"].astype("int64") - 273  # kelvin -> Celsius
    snap["power_cycles"] = health["power_cycles"]
    snap["nvme_critical_warning"] = health["critical_warning"]
    snap["nvme_spare_pct"] = health["available_spare_pct"]
    snap["nvme_spare_threshold_pct"] = health["spare_threshold_pct"]
    snap["nvme_used_pct"] = health["percentage_used"]
    snap["nvme_media_errors"] = health["media_errors"]
    snap["nvme_unsafe_shutdowns"] = health["unsafe_shutdowns"]
    snap["nvme_error_log_entries"] = health["error_log_entries"]
    snap["data_written_bytes"] = data_written
    return snap[~bad].reset_index(drop=True), None, rejected
