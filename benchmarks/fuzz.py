"""Long fuzz run of ingest: >= 100k hostile capture lines mixed with valid ones, plus random sectors
through every format parser. Not a test (too long for CI); the bounded version is the hypothesis
suites in tests/ingest/test_properties.py and tests/formats/test_properties.py.

What must hold, and is counted:

* no exception escapes ``ingest_paths`` (0 crashes);
* every valid line is stored (0 lost);
* every line of a file that is not cut short is stored, quarantined with a reason, or counted as
  a repeat of a capture already read (the same serial and time: a hostile IDENTIFY gives many
  lines one serial) -- stored + quarantined + repeated == lines written;
* no day partition lies outside [DATE_FLOOR, now + FUTURE_TOLERANCE];
* each parser gives a record or a ``LayoutError``, and its batch decoder the same answer.

    .venv/bin/python benchmarks/fuzz.py [--lines 100000] [--seed 1]

Figures of the last run are in docs/capture-format.md ("Fuzzing").
"""

from __future__ import annotations

import argparse
import gzip
import json
import random
import shutil
import tempfile
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from triage.formats.ata_identify import build_ata_identify, decode_identify_batch, parse_ata_identify
from triage.formats.ata_smart import SmartAttribute, build_smart_data, decode_smart_batch, parse_smart_data
from triage.formats.ata_thresholds import build_smart_thresholds, decode_thresholds_batch, parse_smart_thresholds
from triage.formats.errors import LayoutError
from triage.formats.nvme_health import NvmeHealth, build_nvme_health, decode_nvme_health_batch, parse_nvme_health
from triage.formats.nvme_identify import build_nvme_identify, decode_nvme_identify_batch, parse_nvme_identify
from triage.ingest import ingest_paths
from triage.ingest.captures import DATE_FLOOR, FUTURE_TOLERANCE
from triage.store.dataset import Store

NOW = datetime(2026, 11, 20, 12, 0, tzinfo=timezone.utc)
LINES_PER_FILE = 1000
HOSTILE_VALUES = [
    [], {}, True, False, 1.0, 1, 0, -1, None, "", "\x1b]0;owned\x07", "\u202e", "x" * 5000, 2**64, -(2**70),
    10**309 // 10**200, "2026-11-01T02:10:00.123456789Z", "2026-11-01t02:10:00z", "0000-01-01T00:00:00Z",
    "9999-12-31T23:59:59-01:00", "2300-01-01T00:00:00Z", "2026-12-20T00:00:00Z", "2026-02-30T00:00:00Z",
    "2026-11-01T02:10:00+24:00", "2026-11-01T02:10:60Z", "ata", "nvme", "scsi", "ff" * 512, "FF" * 4096,
    " " + "0" * 1023, [[[[[[[[]]]]]]]], {"a": {"b": {"c": []}}},
]
FIELDS = ["capture", "host", "device", "slot", "group", "taken_at", "bus", "identify", "smart", "thresholds",
          "health", "note"]
ATTRS = [SmartAttribute(5, 0x33, 100, 100, 0), SmartAttribute(9, 0x32, 90, 90, 20_000),
         SmartAttribute(194, 0x22, 64, 50, 36), SmartAttribute(197, 0x32, 100, 100, 0)]


class Lines:
    """Valid lines with unique (serial, taken_at), so every capture is stored at most once."""

    def __init__(self, rng: random.Random):
        self.rng = rng
        self.count = 0
        self.smart = build_smart_data(ATTRS).hex()
        self.thresholds = build_smart_thresholds({5: 10}).hex()
        self.health = build_nvme_health(NvmeHealth(0, 311, 97, 10, 12, 1, 2, 3, 4, 5, 6, 9000, 7, 8, 9, 0, 0)).hex()

    def valid(self) -> tuple[str, dict]:
        self.count += 1
        serial = f"QFZ{self.count:08d}"
        taken = f"2026-11-{1 + self.count % 18:02d}T{self.count % 24:02d}:{self.count % 60:02d}:00Z"
        if self.rng.random() < 0.7:
            obj = {"capture": 1, "host": "fuzz-h1", "device": "/dev/sda", "slot": "bay1", "group": "g1",
                   "taken_at": taken, "bus": "ata",
                   "identify": build_ata_identify(serial=serial, firmware="F1", model="QZ-FUZZ",
                                                  sectors=1000, rotation_rpm=7200).hex(),
                   "smart": self.smart, "thresholds": self.thresholds}
        else:
            obj = {"capture": 1, "host": "fuzz-h2", "device": "/dev/nvme0", "slot": None, "group": None,
                   "taken_at": taken, "bus": "nvme",
                   "identify": build_nvme_identify(serial=serial, model="QZ-NV", firmware="N1",
                                                   total_capacity_bytes=10**12).hex(),
                   "health": self.health}
        return serial, obj


def mutate(rng: random.Random, obj: dict) -> bytes:
    """One hostile line made from a valid object: a field replaced, bytes flipped, cut, or grown."""
    kind = rng.randrange(6)
    if kind <= 1:
        obj = dict(obj)
        obj[rng.choice(FIELDS)] = rng.choice(HOSTILE_VALUES)
        return json.dumps(obj).encode()
    raw = bytearray(json.dumps(obj).encode())
    if kind == 2:
        for _ in range(rng.randint(1, 4)):
            raw[rng.randrange(len(raw))] = rng.randrange(256)
        return bytes(raw).replace(b"\n", b" ")
    if kind == 3:
        return bytes(raw[: rng.randrange(1, len(raw))])  # never empty: a blank line is not a line
    if kind == 4:
        at = rng.randrange(len(raw))
        junk = bytes(rng.randrange(256) for _ in range(rng.randint(1, 16))).replace(b"\n", b"")
        return bytes(raw[:at]) + junk + bytes(raw[at:])
    return rng.choice([b"[]", b"null", b"1e999", b'"x"', b"{" * 2000, b"\xff\xfe", b'{"capture": 1}'])


def fuzz_ingest(n_hostile: int, seed: int, work: Path) -> dict:
    rng = random.Random(seed)
    lines = Lines(rng)
    folder = work / "captures"
    folder.mkdir()
    valid, written, hostile, files, cut_files = set(), 0, 0, 0, set()
    while hostile < n_hostile:
        out = []
        for _ in range(LINES_PER_FILE):
            serial, obj = lines.valid()
            if rng.random() < 0.3:
                valid.add(serial)
                out.append(json.dumps(obj).encode())
            else:
                out.append(mutate(rng, obj))
                hostile += 1
        data = b"\n".join(out) + b"\n"
        name = f"fuzz-{files:04d}.jsonl"
        if files % 2:
            data, name = gzip.compress(data, compresslevel=1), name + ".gz"
            if files % 25 == 1:  # a damaged copy: the lines before the damage must still be stored
                damaged = bytearray(data)
                damaged[len(damaged) // 2] ^= 0xFF
                data = bytes(damaged)
                cut_files.add(name)
        (folder / name).write_bytes(data)
        written += len(out)
        files += 1
    store = Store(work / "store")
    start = time.perf_counter()
    crashes = 0
    try:
        report = ingest_paths(store, [folder], now=NOW)
    except Exception as exc:  # noqa: BLE001 - counting exactly this
        crashes, report = 1, None
        print(f"CRASH: {type(exc).__name__}: {exc}")
    seconds = time.perf_counter() - start
    snapshots = store.read("snapshots", columns=["serial", "source_file"])
    stored = set(snapshots["serial"])
    whole = ~snapshots["source_file"].map(lambda s: Path(s).name in cut_files)
    rejected_whole = sum(1 for r in report.rejected if Path(r.source).name not in cut_files) if report else 0
    lines_whole = written - len(cut_files) * LINES_PER_FILE
    lost_valid = len({s for s in valid if s not in stored and not _in_cut(s, cut_files)})
    days = store.days("snapshots")
    latest = (NOW + FUTURE_TOLERANCE).strftime("%Y-%m-%d")
    bad_days = [d for d in days if not (DATE_FLOOR.strftime("%Y-%m-%d") <= d <= latest)]
    return {
        "lines": written, "hostile": hostile, "valid": len(valid), "files": files, "damaged_files": len(cut_files),
        "crashes": crashes, "seconds": round(seconds, 1), "stored": len(stored),
        "quarantined": len(report.rejected) if report else None,
        "valid_lost": lost_valid,
        "repeated": report.repeated if report else None,
        "unaccounted_lines": lines_whole - int(whole.sum()) - rejected_whole - (report.repeated if report else 0),
        "days_outside_window": bad_days,
    }


def _in_cut(serial: str, cut_files: set[str]) -> bool:
    index = int(serial[3:]) - 1
    return f"fuzz-{index // LINES_PER_FILE:04d}.jsonl.gz" in cut_files


def fuzz_parsers(n: int, seed: int) -> dict:
    """``n`` random sectors per parser (half mostly zero with planted bytes, half noise)."""
    rng = np.random.default_rng(seed)
    mismatches = crashes = 0
    for parse, decode, length, compare in PARSERS:
        rows = rng.integers(0, 256, size=(n, length), dtype=np.uint8)
        sparse = rng.random(n) < 0.5
        rows[sparse] = np.where(rng.random((int(sparse.sum()), length)) < 0.02, rows[sparse], 0)
        fix = rng.random(n) < 0.5  # right checksums on half, so the fields behind them are reached
        rows[fix, -1] = (-rows[fix, :-1].sum(axis=1, dtype=np.int64)) % 256
        decoded = decode(rows)
        for i in range(n):
            try:
                result = parse(rows[i].tobytes())
            except LayoutError as exc:
                result = exc
            except Exception:  # noqa: BLE001 - counting exactly this
                crashes += 1
                continue
            mismatches += not compare(decoded, i, result)
    return {"sectors": n * len(PARSERS), "crashes": crashes, "batch_mismatches": mismatches}


INT64_MAX = 2**63 - 1


def _identify(decoded, i, result):
    row = decoded.iloc[i]
    if isinstance(result, LayoutError):
        return row["problem"] == result.field
    return (row["serial"], row["model"], row["user_capacity_bytes"]) == (
        result.serial, result.model, min(result.user_capacity_bytes, INT64_MAX))


def _smart(decoded, i, result):
    sectors, attributes = decoded
    if isinstance(result, LayoutError):
        return not sectors["checksum_ok"].iloc[i]
    mine = attributes[attributes["row"] == i]
    return list(zip(mine["attribute_id"], mine["raw_value"])) == [(a.id, a.raw) for a in result.attributes]


def _thresholds(decoded, i, result):
    sectors, thresholds = decoded
    if isinstance(result, LayoutError):
        return not sectors["checksum_ok"].iloc[i]
    mine = thresholds[thresholds["row"] == i]
    return dict(zip(mine["attribute_id"], mine["threshold"])) == result


def _health(decoded, i, result):
    return decoded["media_errors"].iloc[i] == min(result.media_errors, INT64_MAX)


def _nvme_identify(decoded, i, result):
    return decoded["serial"].iloc[i] == result.serial


PARSERS = [
    (parse_ata_identify, decode_identify_batch, 512, _identify),
    (parse_smart_data, decode_smart_batch, 512, _smart),
    (parse_smart_thresholds, decode_thresholds_batch, 512, _thresholds),
    (parse_nvme_health, decode_nvme_health_batch, 512, _health),
    (parse_nvme_identify, decode_nvme_identify_batch, 4096, _nvme_identify),
]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=100_000, help="hostile lines (>= 100k for the figures)")
    parser.add_argument("--sectors", type=int, default=20_000, help="random sectors per parser")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="triage-fuzz-"))
    try:
        print("ingest:", json.dumps(fuzz_ingest(args.lines, args.seed, work)))
        print("parsers:", json.dumps(fuzz_parsers(args.sectors, args.seed)))
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
