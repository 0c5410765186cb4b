"""Ingest throughput: `triage ingest` vs a straightforward per-record baseline vs the JSON floor.

All three run on the same capture files in the same run, so the ratios do not depend on the
machine. Targets (issue "Foundation"): ingest >= 5x the baseline's captures/s, and ingest time
<= 2.5x the floor of only decoding the JSON lines.

    .venv/bin/python benchmarks/ingest.py [--drives 3000] [--days 20]
"""

from __future__ import annotations

import argparse
import gzip
import json
import shutil
import struct
import tempfile
import time
from pathlib import Path

import pandas as pd

from triage.demo import FleetSpec, generate_fleet, write_captures
from triage.ingest import ingest_paths
from triage.store.dataset import Store


def lines_of(files):
    for path in files:
        with gzip.open(path, "rt", encoding="utf-8") as fh:
            yield from fh


def floor(files) -> int:
    """Only decode the JSON: the cost no ingest can go below."""
    n = 0
    for line in lines_of(files):
        json.loads(line)
        n += 1
    return n


def baseline(files, out: Path) -> int:
    """One record at a time: json, bytes.fromhex, struct loops, a list of dicts into pandas."""
    rows = []
    for line in lines_of(files):
        obj = json.loads(line)
        row = {"host": obj["host"], "device": obj["device"], "slot": obj.get("slot"),
               "group": obj.get("group"), "taken_at": obj["taken_at"], "bus": obj["bus"]}
        ident = bytes.fromhex(obj["identify"])
        if obj["bus"] == "ata":
            words = struct.unpack("<256H", ident)
            row["serial"] = b"".join(struct.pack(">H", w) for w in words[10:20]).decode().strip()
            row["model"] = b"".join(struct.pack(">H", w) for w in words[27:47]).decode().strip()
            smart = bytes.fromhex(obj["smart"])
            if sum(smart) % 256:
                continue
            thresholds = {}
            if obj.get("thresholds"):
                thr = bytes.fromhex(obj["thresholds"])
                for i in range(30):
                    tid, tval = struct.unpack_from("<BB", thr, 2 + 12 * i)
                    thresholds[tid] = tval
            for i in range(30):
                aid, flags, value, worst, lo, hi = struct.unpack_from("<BHBBIH", smart, 2 + 12 * i)
                if aid:
                    row[f"a{aid}"] = lo | (hi << 32)
        else:
            row["serial"] = ident[4:24].decode().strip()
            health = bytes.fromhex(obj["health"])
            for name, off in (("poh", 128), ("media", 160)):
                lo, hi = struct.unpack_from("<QQ", health, off)
                row[name] = lo | (hi << 64)
        rows.append(row)
    frame = pd.DataFrame(rows)
    frame["taken_at"] = pd.to_datetime(frame["taken_at"], utc=True, format="ISO8601")
    frame.astype({c: "float64" for c in frame.columns if c.startswith("a")}).to_parquet(out / "baseline.parquet", compression="zstd")
    return len(frame)


def timed(fn, *args):
    start = time.perf_counter()
    result = fn(*args)
    return result, time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--drives", type=int, default=3000)
    parser.add_argument("--days", type=int, default=20)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="triage-bench-"))
    try:
        fleet = generate_fleet(FleetSpec(seed=7, n_drives=args.drives, days=args.days))
        files = [p for p in write_captures(fleet, work / "captures") if p.name.endswith(".jsonl.gz")]
        n_floor, t_floor = timed(floor, files)
        n_base, t_base = timed(baseline, files, work)
        report, t_ingest = timed(ingest_paths, Store(work / "store"), files)
        n_ingest = report.stored.get("snapshots", 0)
        print(f"captures: {n_floor} in {len(files)} files")
        print(f"floor (json only) : {n_floor / t_floor:10.0f} captures/s  ({t_floor:.2f} s)")
        print(f"baseline          : {n_base / t_base:10.0f} captures/s  ({t_base:.2f} s)")
        print(f"triage ingest     : {n_ingest / t_ingest:10.0f} captures/s  ({t_ingest:.2f} s)")
        print(f"speed-up vs baseline: {t_base / t_ingest:.2f}x  (target >= 5x)")
        print(f"cost vs json floor  : {t_ingest / t_floor:.2f}x  (target <= 2.5x)")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
