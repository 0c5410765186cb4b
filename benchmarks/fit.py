"""`triage fit` on a large store: wall time, peak memory, where the time goes, and a baseline.

Issue target: 100,000 drives x 90 nightly captures (9 million snapshot rows) fit in < 60 s with
peak memory < 3 GB on 2 cores. The store is generated here directly into the Hive layout
(vectorised numpy -> pyarrow, one Parquet file per day), with invented models, a Weibull
baseline per model and SMART covariates that raise the hazard.

Every measurement runs in a fresh child process, so each peak RSS is that step's alone:

  * ``fit``   -- ``triage.survival.run.fit_store`` (the library function behind ``triage fit``)
                 on the large store, with the time of each phase;
  * ``fit``   -- the same on a 10x smaller store of the same fleet shape (scaling ratio);
  * ``naive`` -- the straightforward way on the small store: read the whole snapshot table at
                 once, one Cox row per snapshot interval (no episode collapsing), lifelines'
                 CoxTimeVaryingFitter. Ratio against our fit of the same small store.

    .venv/bin/python benchmarks/fit.py [--drives 100000] [--days 90] [--keep DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from triage.store.schema import REMOVALS, SNAPSHOTS
from triage.survival.observations import TEMPERATURE_BAND_EDGES_C

START = pd.Timestamp("2026-01-01T02:00:00Z")
# invented models: (name, bus, capacity, rpm, Weibull shape, Weibull scale in hours)
MODELS = [
    ("QH-HD8T-A", "ata", 8_000_000_000_000, 7200, 1.3, 900_000.0),
    ("QH-HD4T-B", "ata", 4_000_000_000_000, 7200, 1.8, 260_000.0),
    ("Tallow 14T", "ata", 14_000_000_000_000, 7200, 0.8, 5_000_000.0),
    ("Brindle 16T", "ata", 16_000_000_000_000, 7200, 1.0, 600_000.0),
    ("Corvid NV1920", "nvme", 1_920_383_410_176, 0, 1.0, 1_500_000.0),
    ("Corvid NV3840", "nvme", 3_840_755_982_336, 0, 1.2, 1_200_000.0),
]
# log hazard ratios the simulation uses (the fit should find them again, roughly)
BETA = {"any_pending": 1.6, "log_pending": 0.2, "any_reallocated": 0.5, "any_uncorrectable": 1.0,
        "temperature_band": 0.3}


# -- generating the store ---------------------------------------------------------------------

def generate_store(root: Path, n_drives: int, days: int, seed: int = 7) -> dict:
    """Write snapshots/ and removals/ for a simulated fleet; returns counts."""
    rng = np.random.default_rng(seed)
    model_ix = rng.choice(len(MODELS), size=n_drives, p=[0.25, 0.15, 0.2, 0.15, 0.15, 0.10])
    bus = np.array([m[1] for m in MODELS])[model_ix]
    nvme = bus == "nvme"
    shape = np.array([m[4] for m in MODELS])[model_ix]
    scale = np.array([m[5] for m in MODELS])[model_ix]
    serial = np.array([f"QHB{i:07d}" for i in range(n_drives)], dtype=object)
    # 10 % join during the window as new drives; the rest are in service at any age up to 6 years
    joins_late = rng.uniform(size=n_drives) < 0.10
    first_day = np.where(joins_late, rng.integers(1, days, size=n_drives), 0)
    age0 = np.where(joins_late, rng.integers(0, 48, size=n_drives), rng.integers(0, 6 * 8766, size=n_drives))
    temp_mean = np.where(nvme, rng.normal(44, 5, n_drives), rng.normal(36, 4, n_drives))
    reallocated = np.where(rng.uniform(size=n_drives) < 0.06, rng.integers(1, 200, n_drives), 0).astype(float)
    pending = np.zeros(n_drives)
    uncorrectable = np.zeros(n_drives)
    pending_onset = np.where(rng.uniform(size=n_drives) < 0.04, rng.integers(0, days, n_drives), 10**9)
    backwards_day = np.where(rng.uniform(size=n_drives) < 0.0005, rng.integers(1, days, n_drives), -1)
    minutes = rng.uniform(size=n_drives) < 0.0002
    retire_day = np.where(rng.uniform(size=n_drives) < 0.005, rng.integers(1, days, n_drives), 10**9)
    alive = np.ones(n_drives, dtype=bool)
    last_day = np.full(n_drives, days - 1)
    minute = rng.integers(0, 90, n_drives)
    removals = []

    snap_dir = root / "snapshots"
    for day in range(days):
        present = alive & (first_day <= day)
        age = age0 + 24.0 * (day - first_day)
        # covariates move
        onset = present & (pending_onset == day)
        pending[onset] = rng.integers(1, 20, onset.sum())
        grow = present & (pending > 0) & (rng.uniform(size=n_drives) < 0.08)
        pending[grow] += rng.integers(1, 10, grow.sum())
        spill = present & (pending > 30) & (rng.uniform(size=n_drives) < 0.05)
        uncorrectable[spill] += rng.integers(1, 5, spill.sum())
        temperature = np.round(temp_mean + rng.normal(0, 1.2, n_drives))
        # tonight's capture, then the drive may fail before the next one
        rows = np.flatnonzero(present)
        poh = age.copy()
        poh[backwards_day >= 0] -= np.where(day >= backwards_day[backwards_day >= 0], 30_000, 0)
        poh[minutes] = age[minutes] * 60
        write_day(snap_dir, day, rows, serial, model_ix, bus, poh, temperature, reallocated, pending,
                  uncorrectable, minute)
        log_hr = (BETA["any_pending"] * (pending > 0) + BETA["log_pending"] * np.log1p(pending)
                  + BETA["any_reallocated"] * (reallocated > 0) + BETA["any_uncorrectable"] * (uncorrectable > 0)
                  + BETA["temperature_band"] * np.digitize(temperature, TEMPERATURE_BAND_EDGES_C))
        increment = ((age + 24) / scale) ** shape - (age / scale) ** shape
        fails = present & (rng.uniform(size=n_drives) < 1 - np.exp(-increment * np.exp(log_hr)))
        retires = present & ~fails & (retire_day == day)
        for ix in np.flatnonzero(fails | retires):
            reason = "retired" if retires[ix] else ("proactive" if rng.uniform() < 0.2 else "failed")
            when = START + pd.Timedelta(days=day, hours=int(rng.integers(4, 60)))
            removals.append((serial[ix], when, reason))
        alive &= ~(fails | retires)
        last_day[fails | retires] = day
    frame = pd.DataFrame(removals, columns=["serial", "removed_at", "reason"])
    frame["note"] = ""
    frame["source_file"] = "bench-removals.csv"
    frame["day"] = frame["removed_at"].dt.strftime("%Y-%m-%d")
    for day, part in frame.groupby("day"):
        out = root / "removals" / f"day={day}"
        out.mkdir(parents=True, exist_ok=True)
        table = pa.Table.from_pandas(part.drop(columns="day"), schema=REMOVALS, preserve_index=False)
        pq.write_table(table, out / "part-bench.parquet", compression="zstd")
    # the parts above are batch "bench": record it, or readers (manifest-aware) see no rows
    with (root / "_manifest.jsonl").open("w", encoding="utf-8") as fh:
        fh.write(json.dumps({"batch": "bench", "committed_at": START.isoformat(), "files": [], "rows": {},
                             "quarantined": 0}) + "\n")
    return {"drives": n_drives, "days": days, "removals": len(frame),
            "failures": int(frame["reason"].isin(["failed", "proactive"]).sum())}


def write_day(snap_dir, day, rows, serial, model_ix, bus, poh, temperature, reallocated, pending,
              uncorrectable, minute):
    n = len(rows)
    nvme = bus[rows] == "nvme"
    ata_mask = nvme  # mask = null where True
    taken = (START + pd.Timedelta(days=day)).value // 1000 + minute[rows] * 60_000_000
    names = np.array([m[0] for m in MODELS], dtype=object)
    zeros = np.zeros(n, dtype=np.int64)

    def ints(values, mask=None, type_=pa.int64()):
        return pa.array(np.asarray(values).astype(np.int64 if type_ == pa.int64() else np.int32),
                        type=type_, mask=mask)

    columns = {
        "serial": pa.array(serial[rows], type=pa.string()),
        "model": pa.array(names[model_ix[rows]], type=pa.string()),
        "firmware": pa.array(np.where(nvme, "CN21", "QF12").astype(object), type=pa.string()),
        "bus": pa.array(bus[rows].astype(object), type=pa.string()),
        "user_capacity_bytes": ints(np.array([m[2] for m in MODELS])[model_ix[rows]]),
        "rotation_rpm": ints(np.array([m[3] for m in MODELS])[model_ix[rows]], type_=pa.int32()),
        "wwn": pa.nulls(n, pa.string()),
        "host": pa.array([f"ash-stor{i % 400:03d}" for i in rows], type=pa.string()),
        "device": pa.array(np.where(nvme, "/dev/nvme0n1", "/dev/sda").astype(object), type=pa.string()),
        "slot": pa.array((rows % 24).astype(str).astype(object), type=pa.string()),
        "group": pa.array([f"ash-pool{i // 12:05d}" for i in rows], type=pa.string()),
        "taken_at": pa.array(taken, type=pa.timestamp("us", tz="UTC")),
        "power_on_hours": ints(poh[rows]),
        "temperature_c": ints(temperature[rows], type_=pa.int32()),
        "reallocated_sectors": ints(reallocated[rows], ata_mask),
        "reallocation_events": ints(np.minimum(reallocated[rows], 50), ata_mask),
        "pending_sectors": ints(pending[rows], ata_mask),
        "offline_uncorrectable": ints(uncorrectable[rows], ata_mask),
        "reported_uncorrectable": ints(zeros, ata_mask),
        "command_timeouts": ints(zeros, ata_mask),
        "crc_errors": ints(zeros, ata_mask),
        "spin_retries": ints(zeros, ata_mask),
        "threshold_tripped": pa.array(np.zeros(n, dtype=bool)),
        "prefail_tripped": pa.array(np.zeros(n, dtype=bool)),
        "power_cycles": ints(np.full(n, 40)),
        "nvme_critical_warning": ints(zeros, ~nvme, pa.int32()),
        "nvme_spare_pct": ints(np.full(n, 100), ~nvme, pa.int32()),
        "nvme_spare_threshold_pct": ints(np.full(n, 10), ~nvme, pa.int32()),
        "nvme_used_pct": ints(np.full(n, 3), ~nvme, pa.int32()),
        "nvme_media_errors": ints(np.where(nvme, uncorrectable[rows], 0), ~nvme),
        "nvme_unsafe_shutdowns": ints(np.full(n, 2), ~nvme),
        "nvme_error_log_entries": ints(zeros, ~nvme),
        "data_written_bytes": ints(poh[rows] * 10**9),
        "source_file": pa.array(np.full(n, f"bench-{day:03d}.jsonl.gz", dtype=object), type=pa.string()),
        "counters_clamped": pa.array(np.zeros(n, dtype=bool)),
    }
    table = pa.Table.from_arrays([columns[f.name] for f in SNAPSHOTS], schema=SNAPSHOTS)
    out = snap_dir / f"day={(START + pd.Timedelta(days=day)):%Y-%m-%d}"
    out.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, out / "part-bench.parquet", compression="zstd")


# -- measured steps (each in its own process) --------------------------------------------------

def measure_fit(root: Path) -> dict:
    from triage.store.dataset import Store
    from triage.survival.run import fit_store

    store = Store(root)
    reading = {"seconds": 0.0}
    original = store.read

    def timed_read(*args, **kwargs):
        t = time.perf_counter()
        try:
            return original(*args, **kwargs)
        finally:
            reading["seconds"] += time.perf_counter() - t

    store.read = timed_read
    marks = []
    start = time.perf_counter()
    model, path = fit_store(store, say=lambda message: marks.append((time.perf_counter() - start, message)))
    total = time.perf_counter() - start
    marks.append((total, "done"))
    phases = [(marks[i][1], marks[i + 1][0] - marks[i][0]) for i in range(len(marks) - 1)]
    return {"seconds": total, "peak_rss_mb": peak_rss_mb(), "read_seconds": reading["seconds"],
            "phases": phases, "window": model.data_window_,
            "holdout": model.holdout_, "coefficients": model.coefficients()["rate_ratio"].round(3).to_dict()}


def measure_naive(root: Path) -> dict:
    """Whole-table read, one Cox row per snapshot interval, lifelines' time-varying fitter."""
    import warnings

    from lifelines import CoxTimeVaryingFitter

    from triage.store.dataset import Store
    from triage.survival.observations import FEATURES, covariate_features

    start = time.perf_counter()
    store = Store(root)
    snaps = store.read("snapshots").sort_values(["serial", "taken_at"])
    removals = store.read("removals")
    features = covariate_features(snaps)
    rows = pd.concat([snaps[["serial", "model", "power_on_hours"]].reset_index(drop=True),
                      features.reset_index(drop=True)], axis=1)
    rows["stop"] = rows.groupby("serial")["power_on_hours"].shift(-1)
    last = rows["stop"].isna()
    rows.loc[last, "stop"] = rows.loc[last, "power_on_hours"] + 24
    events = removals[removals["reason"].isin(["failed", "proactive"])]["serial"]
    rows["event"] = last & rows["serial"].isin(set(events))
    rows = rows[rows["stop"] > rows["power_on_hours"]]
    used = [f for f in FEATURES if rows[f].nunique() > 1]
    data = rows[["serial", "model", "power_on_hours", "stop", "event", *used]]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        CoxTimeVaryingFitter(penalizer=0.01).fit(data, id_col="serial", event_col="event",
                                                 start_col="power_on_hours", stop_col="stop", strata=["model"])
    return {"seconds": time.perf_counter() - start, "peak_rss_mb": peak_rss_mb(), "rows": int(len(data))}


def peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux reports KiB


def child(kind: str, root: Path) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", kind, str(root)], capture_output=True, text=True)
    if out.returncode:
        raise SystemExit(f"{kind} on {root} failed:\n{out.stderr}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--drives", type=int, default=100_000)
    parser.add_argument("--days", type=int, default=90)
    parser.add_argument("--keep", type=Path, help="generate into / reuse this folder instead of a temporary one")
    parser.add_argument("--no-naive", action="store_true", help="skip the naive baseline")
    parser.add_argument("--child", nargs=2, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        kind, root = args.child
        result = measure_fit(Path(root)) if kind == "fit" else measure_naive(Path(root))
        print(json.dumps(result, default=str))
        return

    work = args.keep or Path(tempfile.mkdtemp(prefix="triage-fit-bench-"))
    big, small = work / "large", work / "small"
    try:
        for root, drives in ((big, args.drives), (small, max(args.drives // 10, 1000))):
            if not (root / "snapshots").is_dir():
                t = time.perf_counter()
                counts = generate_store(root, drives, args.days)
                print(f"generated {root.name}: {counts} in {time.perf_counter() - t:.0f} s", file=sys.stderr)
            shutil.rmtree(root / "models", ignore_errors=True)
        print(f"machine: {os.cpu_count()} cores visible")
        ours_small = child("fit", small)
        ours_big = child("fit", big)
        report("triage fit, large store", ours_big)
        report("triage fit, 1/10 store", ours_small)
        print(f"scaling large / small: time {ours_big['seconds'] / ours_small['seconds']:.1f}x, "
              f"memory {ours_big['peak_rss_mb'] / ours_small['peak_rss_mb']:.1f}x  (10x the drives)")
        print(f"targets: < 60 s -> {'met' if ours_big['seconds'] < 60 else 'MISSED'}; "
              f"< 3 GB -> {'met' if ours_big['peak_rss_mb'] < 3072 else 'MISSED'}")
        if not args.no_naive:
            naive = child("naive", small)
            print(f"naive on the 1/10 store ({naive['rows']:,} Cox rows): {naive['seconds']:.1f} s, "
                  f"peak {naive['peak_rss_mb']:.0f} MB -> triage fit is {naive['seconds'] / ours_small['seconds']:.1f}x "
                  f"faster and uses {naive['peak_rss_mb'] / ours_small['peak_rss_mb']:.1f}x less memory "
                  f"(and also fits AFR, Weibull, curves and the held-out check)")
    finally:
        if args.keep is None:
            shutil.rmtree(work, ignore_errors=True)


def report(title: str, result: dict) -> None:
    window = result["window"]
    print(f"{title}: {window['snapshots']:,} snapshots, {window['drives']:,} drives, {window['failures']} failures, "
          f"{window['excluded_drives']} excluded")
    print(f"  wall {result['seconds']:.1f} s, peak RSS {result['peak_rss_mb']:.0f} MB, "
          f"of which Parquet reads {result['read_seconds']:.1f} s")
    for message, seconds in result["phases"]:
        print(f"    {seconds:6.1f} s  {message}")
    print(f"  held-out {result['holdout']}")
    print(f"  coefficients {result['coefficients']}")


if __name__ == "__main__":
    main()
