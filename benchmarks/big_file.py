"""Peak memory of `triage ingest` on one big capture file (2 GB by default) against a small one.

Target (issue "Hardening"): memory bounded by a batch, not by the file; a 2 GB file ingests in
under 1 GB. The peak is the summed resident memory of `triage ingest` and its worker processes,
sampled every 50 ms from /proc (Linux). The small file (1/20 of the size) is the baseline of the
same run: with streaming, the two peaks are about equal.

    .venv/bin/python benchmarks/big_file.py [--gigabytes 2]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from triage.formats.ata_identify import build_ata_identify
from triage.formats.ata_smart import SmartAttribute, build_smart_data
from triage.formats.ata_thresholds import build_smart_thresholds

TRIAGE = str(Path(sys.executable).with_name("triage"))


def write_file(path: Path, size: int, first: int = 0, lines: int | None = None, nights: int = 30,
               first_night: int = 1) -> int:
    """Invented ATA captures (unique serial per line, spread over ``nights`` nights of October 2026
    from ``first_night``) until ``size`` bytes (or ``lines`` captures); serials count from ``first``."""
    smart = build_smart_data([SmartAttribute(5, 0x33, 100, 100, 0), SmartAttribute(9, 0x32, 90, 90, 20_000),
                              SmartAttribute(194, 0x22, 64, 50, 36)]).hex()
    thresholds = build_smart_thresholds({5: 10}).hex()
    identify = build_ata_identify(serial="QBIG00000000", firmware="B1", model="QZ-BIG", sectors=10**9,
                                  rotation_rpm=7200, integrity=False).hex()
    count = written = 0
    with path.open("w") as fh:
        while (written < size) if lines is None else (count < lines):
            serial = f"QB{first + count:010d}"
            # the serial lives in IDENTIFY words 10-19 (bytes 20-39), two characters per word swapped
            swapped = bytes(b for pair in zip(serial.encode()[1::2], serial.encode()[::2]) for b in pair).hex()
            ident = identify[:40] + swapped + identify[40 + len(swapped):]
            line = json.dumps({"capture": 1, "host": f"big-{count % 50}", "device": "/dev/sda", "slot": None,
                               "group": None, "taken_at": f"2026-10-{first_night + count % nights:02d}T02:{count % 60:02d}:00Z",
                               "bus": "ata", "identify": ident, "smart": smart, "thresholds": thresholds}) + "\n"
            fh.write(line)
            written += len(line)
            count += 1
    return count


def tree_rss(pid: int) -> int:
    """Resident bytes of ``pid`` and all its descendants."""
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/status") as fh:
                for line in fh:
                    if line.startswith("VmRSS:"):
                        total += int(line.split()[1]) * 1024
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as fh:
                    todo += [int(c) for c in fh.read().split()]
        except (FileNotFoundError, ProcessLookupError):
            continue
    return total


def peak_of_ingest(path: Path, store: Path) -> tuple[int, float, str]:
    start = time.perf_counter()
    proc = subprocess.Popen([TRIAGE, "ingest", str(path), "--store", str(store)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = 0
    while proc.poll() is None:
        peak = max(peak, tree_rss(proc.pid))
        time.sleep(0.05)
    out, err = proc.communicate()
    return peak, time.perf_counter() - start, (err.strip().splitlines() or [""])[-1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--gigabytes", type=float, default=2.0)
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="triage-big-"))
    try:
        size = int(args.gigabytes * 2**30)
        results = {}
        for name, nbytes in (("small", size // 20), ("big", size)):
            path = work / f"{name}.jsonl"
            lines = write_file(path, nbytes)
            peak, seconds, summary = peak_of_ingest(path, work / f"store-{name}")
            results[name] = peak
            print(f"{name:5s}: {nbytes / 2**30:5.2f} GiB, {lines} lines: peak {peak / 2**20:7.0f} MiB "
                  f"in {seconds:6.1f} s  | {summary}")
            path.unlink()
        print(f"peak big / small: {results['big'] / results['small']:.2f}x  (streaming: about 1)")
        print(f"peak / file size (big): {results['big'] / size:.2f}  (target < 0.5: under 1 GB for 2 GB)")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
