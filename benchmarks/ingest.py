"""Ingest throughput: `triage ingest` vs straightforward per-record baselines vs the JSON floor.

All run on the same capture files in the same run, so the ratios do not depend on the machine.
Targets (issue "Foundation"): ingest >= 5x the baseline's captures/s, and ingest time <= 2.5x
the floor of only decoding the JSON lines (stdlib json, one core).

Two baselines, both one record at a time (json, bytes.fromhex, a Python loop into pandas):

* ``light``    -- the first sketch: a few identity fields and attribute raws, one wide table,
                  no attribute rows, no thresholds semantics, no partitions;
* ``same job`` -- the same outputs as ingest: the project's own per-record parsers
                  (``triage.formats.parse_*``), every snapshot column, one row per attribute with
                  its threshold, both tables written as day-partitioned Parquet.

``same job`` is the honest comparison; ``light`` shows what skipping the work costs.

    .venv/bin/python benchmarks/ingest.py [--drives 3000] [--days 20]
"""

from __future__ import annotations

import argparse
import gzip
import os
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


def same_job_baseline(files, out: Path) -> int:
    """What ingest produces, the straightforward way: per-record parsers, lists of dicts, pandas."""
    from triage.formats import (parse_ata_identify, parse_nvme_health, parse_nvme_identify,
                                parse_smart_data, parse_smart_thresholds)
    from triage.formats.errors import LayoutError
    from triage.store.schema import ATA_COUNTER_ATTRIBUTES

    snapshots, attributes = [], []
    for line in lines_of(files):
        obj = json.loads(line)
        row = {k: obj.get(k) for k in ("host", "device", "slot", "group", "taken_at", "bus")}
        try:
            if obj["bus"] == "ata":
                ident = parse_ata_identify(bytes.fromhex(obj["identify"]))
                smart = parse_smart_data(bytes.fromhex(obj["smart"]))
                thresholds = parse_smart_thresholds(bytes.fromhex(obj["thresholds"])) if obj.get("thresholds") else None
            else:
                ident = parse_nvme_identify(bytes.fromhex(obj["identify"]))
                health = parse_nvme_health(bytes.fromhex(obj["health"]))
        except (LayoutError, ValueError):
            continue
        row.update(serial=ident.serial, model=ident.model, firmware=ident.firmware)
        if obj["bus"] == "ata":
            row.update(user_capacity_bytes=ident.user_capacity_bytes, rotation_rpm=ident.rotation_rpm, wwn=ident.wwn)
            tripped = prefail = None if thresholds is None else False
            for a in smart.attributes:
                threshold = None if thresholds is None else thresholds.get(a.id)
                attributes.append({"serial": ident.serial, "taken_at": obj["taken_at"],
                                   "attribute_id": a.id, "status_flags": a.flags, "normalized": a.value,
                                   "worst_normalized": a.worst, "threshold": threshold, "raw_value": a.raw})
                if a.id == 9:
                    row["power_on_hours"] = a.raw & 0xFFFFFFFF
                elif a.id == 194:
                    row["temperature_c"] = a.raw & 0xFF
                elif a.id in ATA_COUNTER_ATTRIBUTES:
                    row[ATA_COUNTER_ATTRIBUTES[a.id]] = a.raw
                if threshold and a.value <= threshold:
                    tripped = True
                    prefail = prefail or bool(a.flags & 1)
            row.update(threshold_tripped=tripped, prefail_tripped=prefail)
        else:
            row.update(user_capacity_bytes=ident.total_capacity_bytes, rotation_rpm=0,
                       power_on_hours=health.power_on_hours, temperature_c=health.composite_temperature_k - 273,
                       power_cycles=health.power_cycles, nvme_critical_warning=health.critical_warning,
                       nvme_spare_pct=health.available_spare_pct, nvme_used_pct=health.percentage_used,
                       nvme_spare_threshold_pct=health.spare_threshold_pct, nvme_media_errors=health.media_errors,
                       nvme_unsafe_shutdowns=health.unsafe_shutdowns,
                       nvme_error_log_entries=health.error_log_entries,
                       data_written_bytes=health.data_units_written * 512_000)
        snapshots.append(row)
    for name, rows in (("snapshots", snapshots), ("attributes", attributes)):
        frame = pd.DataFrame(rows)
        frame["taken_at"] = pd.to_datetime(frame["taken_at"], utc=True, format="ISO8601")
        frame["day"] = frame["taken_at"].dt.strftime("%Y-%m-%d")
        frame.to_parquet(out / name, partition_cols=["day"], compression="zstd")
    return len(snapshots)


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
        (work / "same").mkdir()
        n_same, t_same = timed(same_job_baseline, files, work / "same")
        report, t_ingest = timed(ingest_paths, Store(work / "store"), files)
        n_ingest = report.stored.get("snapshots", 0)
        print(f"captures: {n_floor} in {len(files)} files, {os.cpu_count()} cores")
        print(f"floor (json only)   : {n_floor / t_floor:10.0f} captures/s  ({t_floor:.2f} s)")
        print(f"baseline, light     : {n_base / t_base:10.0f} captures/s  ({t_base:.2f} s)")
        print(f"baseline, same job  : {n_same / t_same:10.0f} captures/s  ({t_same:.2f} s)")
        print(f"triage ingest       : {n_ingest / t_ingest:10.0f} captures/s  ({t_ingest:.2f} s)")
        print(f"speed-up vs same-job baseline: {t_same / t_ingest:.2f}x  (target >= 5x)")
        print(f"speed-up vs light baseline   : {t_base / t_ingest:.2f}x")
        print(f"cost vs json floor           : {t_ingest / t_floor:.2f}x  (target <= 2.5x)")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
