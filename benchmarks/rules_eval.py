"""How long the default rule set takes over a large invented fleet.

    .venv/bin/python benchmarks/rules_eval.py [--drives 100000] [--days 14]

Builds a history of N drives x D daily captures (three quarters ATA disks, one quarter NVMe; a
few percent with growing counters so rules fire and write evidence), then times
``triage.rules.evaluate`` with the packaged defaults. The baseline in the same run is one pandas
pass that any evaluation needs anyway: sorting the history by (serial, taken_at) and taking each
drive's last row; the ratio says how many such passes the whole rule set costs.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from triage.rules import evaluate, load_rules


def invented_fleet(drives: int, days: int, seed: int = 7) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    serial = np.repeat(np.array([f"QHB{i:07d}" for i in range(drives)], dtype=object), days)
    day = np.tile(np.arange(days), drives)
    start = pd.Timestamp("2031-05-01", tz="UTC")
    taken_at = start + pd.to_timedelta(day, unit="D") + pd.to_timedelta(rng.integers(0, 3600, len(day)), unit="s")
    nvme = np.repeat(rng.random(drives) < 0.25, days)
    growing = np.repeat(rng.random(drives) < 0.03, days)
    counter = np.where(growing, day * rng.integers(0, 5, len(day)), 0).astype(float)
    ata = lambda values: np.where(nvme, np.nan, values)  # noqa: E731
    only_nvme = lambda values: np.where(nvme, values, np.nan)  # noqa: E731
    return pd.DataFrame(
        {
            "serial": serial,
            "taken_at": taken_at,
            "bus": np.where(nvme, "nvme", "ata"),
            "rotation_rpm": np.where(nvme, 0, 7200),
            "temperature_c": rng.integers(25, 64, len(day)),
            "reallocated_sectors": ata(counter),
            "pending_sectors": ata(counter),
            "offline_uncorrectable": ata(np.where(growing, day // 4, 0)),
            "reported_uncorrectable": ata(0),
            "command_timeouts": ata(0),
            "crc_errors": ata(counter),
            "threshold_tripped": pd.array(np.where(nvme, None, False), dtype="boolean"),
            "prefail_tripped": pd.array(np.where(nvme, None, False), dtype="boolean"),
            "nvme_critical_warning": only_nvme(np.where(growing, 1, 0)),
            "nvme_spare_pct": only_nvme(100),
            "nvme_spare_threshold_pct": only_nvme(10),
            "nvme_used_pct": only_nvme(rng.integers(0, 101, len(day))),
            "nvme_media_errors": only_nvme(counter),
        }
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--drives", type=int, default=100_000)
    parser.add_argument("--days", type=int, default=14)
    args = parser.parse_args()
    history = invented_fleet(args.drives, args.days)
    ruleset = load_rules([])

    started = time.perf_counter()
    history.sort_values(["serial", "taken_at"]).groupby("serial").tail(1)
    baseline = time.perf_counter() - started

    started = time.perf_counter()
    flags = evaluate(ruleset, history)
    elapsed = time.perf_counter() - started

    print(f"{args.drives} drives x {args.days} captures = {len(history)} rows, {len(ruleset.rules)} rules")
    print(f"baseline (sort + last row per drive): {baseline:.2f} s")
    print(f"evaluate (default rules): {elapsed:.2f} s, {len(flags)} firings, "
          f"{flags['serial'].nunique()} drives; ratio {elapsed / baseline:.1f}x baseline")


if __name__ == "__main__":
    main()
