"""`triage backtest` over many demo fleets (does the combined score beat the drive's own verdict, and
does the forecast interval cover?) and its speed on the demo and on a large store.

* ``--seeds N``: N demo fleets (1,200 drives x 120 nights each, written straight into a store from
  the generator's ground truth), each backtested with the defaults (H = 30 days, false alarms
  within 1 %). Reported: recall and false-alarm rate of the combined score and of the drive's own
  verdict, pooled over fleets (caught / failures summed), the ratio of the recalls, the median
  lead times, and the forecast interval's coverage.
* ``--large DRIVES``: a store of DRIVES x 90 nights from ``benchmarks/fit.py``'s generator, one
  backtest in a child process: wall time and peak memory (issue target: 100k drives x 90 nights
  in under 15 minutes on 2 cores; the demo in under a minute).

    .venv/bin/python benchmarks/backtest.py [--seeds 20] [--large 100000]
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from triage.demo import FleetSpec, generate_fleet  # noqa: E402
from triage.demo.truth import ground_truth  # noqa: E402
from triage.risk.backtest import backtest_store  # noqa: E402
from triage.rules import load_rules  # noqa: E402
from triage.store.dataset import Store  # noqa: E402


def demo_store(seed: int, root: Path) -> Store:
    truth = ground_truth(generate_fleet(FleetSpec(seed=seed)))
    store = Store(root)
    store.append("snapshots", truth.snapshots.assign(source_file="demo"))
    store.append("removals", truth.removals.assign(source_file="demo"))
    return store


def many_seeds(seeds: int) -> dict:
    rules = load_rules([], include_defaults=True)
    pooled = {"combined": [0, 0, 0, 0], "drive-self-assessment": [0, 0, 0, 0]}  # caught, failures, fa, scored
    leads = {"combined": [], "drive-self-assessment": []}
    inside, forecasts, seconds = 0, 0, []
    for seed in range(seeds):
        with tempfile.TemporaryDirectory() as tmp:
            store = demo_store(seed, Path(tmp))
            started = time.perf_counter()
            result = backtest_store(store, rules)
            seconds.append(time.perf_counter() - started)
        methods = result.methods.set_index("method")
        for name in pooled:
            row = methods.loc[name]
            pooled[name][0] += int(row["caught"])
            pooled[name][1] += int(row["failures"])
            pooled[name][2] += int(row["false_alarm_drives"])
            pooled[name][3] += int(row["scored_drives"])
            if row["lead_days_median"] is not None and np.isfinite(row["lead_days_median"]):
                leads[name].append(float(row["lead_days_median"]))
        inside += int(result.forecasts["inside"].sum()) if len(result.forecasts) else 0
        forecasts += len(result.forecasts)
        c, b = methods.loc["combined"], methods.loc["drive-self-assessment"]
        print(f"seed {seed}: combined {int(c['caught'])}/{int(c['failures'])} (fa {c['false_alarm_rate']:.2%}), "
              f"own verdict {int(b['caught'])}/{int(b['failures'])} (fa {b['false_alarm_rate']:.2%}), "
              f"{seconds[-1]:.1f} s", file=sys.stderr, flush=True)
    report = {"seeds": seeds, "seconds_median": float(np.median(seconds))}
    for name, (caught, failures, fa, scored) in pooled.items():
        report[name] = {"caught": caught, "failures": failures, "recall": caught / max(failures, 1),
                        "false_alarm_rate": fa / max(scored, 1),
                        "lead_days_median": float(np.median(leads[name])) if leads[name] else None}
    report["recall_ratio"] = report["combined"]["recall"] / max(report["drive-self-assessment"]["recall"], 1e-9)
    report["forecast_coverage"] = inside / forecasts if forecasts else None
    report["forecasts"] = forecasts
    return report


def large(drives: int, days: int = 90) -> dict:
    """Generate the store, then time one backtest in a fresh child (its own peak RSS)."""
    from benchmarks.fit import generate_store

    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "store"
        counts = generate_store(root, drives, days)
        child = subprocess.run([sys.executable, __file__, "--child", str(root)], capture_output=True, text=True)
        if child.returncode:
            raise SystemExit(child.stderr)
        timing = json.loads(child.stdout.strip().splitlines()[-1])
    return {**counts, **timing}


def child(root: str) -> None:
    started = time.perf_counter()
    result = backtest_store(Store(Path(root)), load_rules([], include_defaults=True))
    print(json.dumps({"seconds": round(time.perf_counter() - started, 1),
                      "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024),
                      "scored_nights": (result.last_night - result.first_night).days + 1}))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--large", type=int, default=0, help="drives in the large store (0: skip)")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--out", type=Path, default=Path("benchmarks/out"))
    args = parser.parse_args(argv)
    if args.child:
        child(args.child)
        return 0
    report = {"demo": many_seeds(args.seeds) if args.seeds else None,
              "large": large(args.large) if args.large else None}
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "backtest.json").write_text(json.dumps(report, indent=2) + "\n")
    print(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
