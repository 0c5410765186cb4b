"""Ingest at fleet scale: both shapes of input against the JSON-decoding floor, and captures/s as the night grows.

Targets (issue "Fleet scale"): `triage ingest` within 2.5x the floor of only decoding the JSON
(stdlib json, one core, on the same lines) on both shapes of input -- many small gzip files (a
demo fleet's per-host nights) and one large plain file (a night's captures concatenated) -- using
both cores; and how captures/s holds at 10k, 100k and 1M captures (1M as ten nights of 100k
drives, one plain file each).

The machine is shared, so each shape is measured ``--repeat`` times, floor and ingest taking turns,
and the best of each is compared (the ratio is the one figure that does not depend on the
machine). Peak memory on a 2 GB file is measured by benchmarks/big_file.py.

    .venv/bin/python benchmarks/ingest_scale.py [--repeat 3] [--big 100000] [--scale 10000,100000,1000000]
                                                [--dask]
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import resource
import shutil
import statistics
import tempfile
import time
from pathlib import Path

from big_file import write_file

from triage.demo import FleetSpec, generate_fleet, write_captures
from triage.engine import DaskEngine, LocalEngine
from triage.ingest import ingest_paths
from triage.store.dataset import Store


def lines_of(path: Path):
    opener = gzip.open if path.name.endswith(".gz") else open
    with opener(path, "rb") as fh:
        yield from fh


def floor(files: list[Path]) -> int:
    """Only decode the JSON, one line at a time on one core: the cost no ingest goes below."""
    n = 0
    for path in files:
        for line in lines_of(path):
            json.loads(line)
            n += 1
    return n


def ingest(files: list[Path], store: Path, engine) -> int:
    shutil.rmtree(store, ignore_errors=True)
    if engine is None:  # a fresh local pool per run: its workers' CPU time is counted when reaped
        with LocalEngine() as local:
            report = ingest_paths(Store(store), files, engine=local)
    else:
        report = ingest_paths(Store(store), files, engine=engine)
    return report.stored.get("snapshots", 0)


def cpu_seconds() -> float:
    """CPU time of this process and its reaped children (the local pool's workers)."""
    own, children = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


def timed(fn, *args) -> tuple[object, float, float]:
    wall, cpu = time.perf_counter(), cpu_seconds()
    result = fn(*args)
    return result, time.perf_counter() - wall, cpu_seconds() - cpu


def compare(name: str, files: list[Path], work: Path, engine, repeat: int) -> dict:
    """Wall time is the target's measure; CPU time (all processes) shows the work done whatever
    else the shared machine runs (Dask workers' CPU time is not counted: not our children)."""
    floors, ingests, cpus, floor_cpu = [], [], [], []
    for _ in range(repeat):
        n, t, c = timed(floor, files)
        floors.append(t)
        floor_cpu.append(c)
        stored, t, c = timed(ingest, files, work / "store", engine)
        ingests.append(t)
        cpus.append(c)
    best_floor, best_ingest = min(floors), min(ingests)
    print(f"{name:36s} {n:8d} captures  floor {best_floor:6.2f} s  ingest {best_ingest:6.2f} s "
          f"(median {statistics.median(ingests):.2f})  ratio {best_ingest / best_floor:5.2f}x  "
          f"{stored / best_ingest:8.0f} captures/s  | CPU ratio "
          + (f"{min(cpus) / min(floor_cpu):4.2f}x" if engine is None else "n/a (Dask workers)"))
    return {"captures": n, "floor": best_floor, "ingest": best_ingest}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--big", type=int, default=100_000, help="captures in the one large plain file")
    parser.add_argument("--drives", type=int, default=3000, help="demo fleet for the small gzip files")
    parser.add_argument("--days", type=int, default=20)
    parser.add_argument("--scale", default="10000,100000,1000000", help="captures per run, comma separated")
    parser.add_argument("--dask", action="store_true", help="also run the large file on a local Dask cluster")
    args = parser.parse_args()
    work = Path(tempfile.mkdtemp(prefix="triage-scale-"))
    print(f"{os.cpu_count()} cores; best of {args.repeat} (floor and ingest taking turns)")
    try:
        fleet = generate_fleet(FleetSpec(seed=7, n_drives=args.drives, days=args.days))
        small = [p for p in write_captures(fleet, work / "small") if p.name.endswith(".jsonl.gz")]
        compare(f"many small gzip files ({len(small)})", small, work, None, args.repeat)
        big = work / "night.jsonl"
        write_file(big, 0, lines=args.big, nights=1)  # one night of the fleet, concatenated
        compare(f"one plain file ({big.stat().st_size / 2**20:.0f} MiB)", [big], work, None, args.repeat)
        if args.dask:
            with DaskEngine(workers=os.cpu_count()) as cluster:
                compare("one plain file, local Dask cluster", [big], work, cluster, args.repeat)
        big.unlink()
        print("scaling (one plain file per night of at most 100k drives):")
        for total in (int(x) for x in args.scale.split(",")):
            files = []
            for night in range(max(1, total // 100_000)):
                path = work / f"night-{night + 1:02d}.jsonl"
                write_file(path, 0, lines=min(total, 100_000), nights=1, first_night=1 + night)
                files.append(path)
            repeat = 1 if total >= 10**6 else args.repeat
            compare(f"  {total} captures in {len(files)} file(s)", files, work, None, repeat)
            for path in files:
                path.unlink()
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
