"""`triage fit` and `triage backtest` on each engine, on the same store: wall time, peak memory,
and whether every engine gives the same bytes.

Variants, each in a fresh child process (so each peak RSS is that run's alone):

  * ``inline``  -- no engine: every map step in the command's process (the code path of the
                   library default, i.e. the run before engines existed);
  * ``local``   -- ``LocalEngine`` with one worker process per core (``--engine local``);
  * ``dask``    -- ``DaskEngine`` on a ``dask.distributed.LocalCluster`` of 2 worker processes,
                   1 thread each, loopback only, started by the run (its start-up is counted);
  * ``main``    -- with ``--baseline-src DIR``: the same call made by the code in DIR (e.g. the
                   main checkout), the baseline of "today's speed".

Every variant prints a digest of its result (the landmark model's coefficients and covariance,
the cohort table, the exclusions; the backtest's tables): the digests must all be equal.
Figures are ratios against ``inline`` in the same run; absolute times depend on the machine's
load, so the CPU seconds (the command and its workers together) say what the work cost.
Peak memory is the command's process and, separately, its largest worker.

    .venv/bin/python benchmarks/dask_engine.py [--drives 100000] [--days 90] [--keep DIR]
        [--backtest-drives 20000] [--backtest-days 150] [--baseline-src /work/main] [--skip-fit|--skip-backtest]
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# appended, not prepended: a "main" child takes triage from $PYTHONPATH (the baseline checkout)
sys.path.append(str(Path(__file__).resolve().parent.parent))

VARIANTS = ("inline", "local", "dask")


def open_variant(variant: str):
    from triage.engine import DaskEngine, LocalEngine

    if variant == "local":
        return LocalEngine()
    if variant == "dask":
        return DaskEngine(None, workers=2)
    return None


def digest(*parts: str) -> str:
    return hashlib.sha256("\n".join(parts).encode()).hexdigest()[:16]


def measure_fit(root: Path, variant: str) -> dict:
    import shutil

    from triage.store.dataset import Store
    from triage.survival.run import fit_store

    shutil.rmtree(root / "models", ignore_errors=True)
    start = time.perf_counter()
    engine = open_variant(variant)
    started = time.perf_counter() - start
    try:
        kwargs = {} if engine is None else {"engine": engine}
        model, _ = fit_store(Store(root), **kwargs)
    finally:
        if engine is not None:
            engine.close()
    seconds = time.perf_counter() - start
    shutil.rmtree(root / "models", ignore_errors=True)
    result = digest(json.dumps(model.landmark_.to_dict(), sort_keys=True),
                    model.cohort_table_.to_csv(), model.exclusions_.to_csv())
    return {"seconds": seconds, "engine_start_seconds": started, **peaks(), "digest": result, "source": source()}


def measure_backtest(root: Path, variant: str) -> dict:
    from triage.risk.backtest import backtest_store
    from triage.rules import load_rules
    from triage.store.dataset import Store

    start = time.perf_counter()
    engine = open_variant(variant)
    started = time.perf_counter() - start
    try:
        kwargs = {} if engine is None else {"engine": engine}
        result = backtest_store(Store(root), load_rules([], include_defaults=True), **kwargs)
    finally:
        if engine is not None:
            engine.close()
    seconds = time.perf_counter() - start
    result_digest = digest(result.methods.to_csv(), result.curve.to_csv(), result.forecasts.to_csv(),
                           json.dumps(result.operating_point, sort_keys=True), "|".join(result.refits),
                           "|".join(result.notes))
    return {"seconds": seconds, "engine_start_seconds": started, **peaks(), "digest": result_digest,
            "source": source()}


def source() -> str:
    import triage

    return str(Path(triage.__file__).resolve().parent.parent)


def peaks() -> dict:
    """Peak memory of this process and of its largest worker; CPU seconds of both (workers are
    counted once they have exited: the engine is closed before this is called)."""
    me, workers = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return {"peak_rss_mb": me.ru_maxrss / 1024, "worker_peak_rss_mb": workers.ru_maxrss / 1024,
            "cpu_seconds": me.ru_utime + me.ru_stime + workers.ru_utime + workers.ru_stime}


def child(kind: str, variant: str, root: Path, baseline_src: Path | None) -> dict:
    env = dict(os.environ)
    if variant == "main":
        env["PYTHONPATH"] = str(baseline_src)
    out = subprocess.run([sys.executable, __file__, "--child", kind, "inline" if variant == "main" else variant,
                          str(root)], capture_output=True, text=True, env=env)
    if out.returncode:
        raise SystemExit(f"{kind} / {variant} on {root} failed:\n{out.stderr}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def compare(kind: str, root: Path, variants: list[str], baseline_src: Path | None) -> None:
    results = {v: child(kind, v, root, baseline_src) for v in variants}
    base = results["inline"]
    print(f"{kind} on {root.name}:")
    for variant, r in results.items():
        print(f"  {variant:7s} wall {r['seconds']:6.1f} s ({r['seconds'] / base['seconds']:.2f}x inline; engine start "
              f"{r['engine_start_seconds']:.1f} s), CPU {r['cpu_seconds']:.0f} s, peak RSS {r['peak_rss_mb']:.0f} MB, largest worker "
              f"{r['worker_peak_rss_mb']:.0f} MB, digest {r['digest']}, code {r['source']}")
    same = len({r["digest"] for r in results.values()}) == 1
    print(f"  identical results on every engine: {'yes' if same else 'NO'}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--drives", type=int, default=100_000)
    parser.add_argument("--backtest-drives", type=int, default=20_000)
    parser.add_argument("--days", type=int, default=90)
    parser.add_argument("--backtest-days", type=int, default=150,
                        help="nights of the backtest's store (150: three refit blocks of scored nights)")
    parser.add_argument("--keep", type=Path, help="generate into / reuse this folder")
    parser.add_argument("--baseline-src", type=Path, help="also run the code in this checkout (PYTHONPATH)")
    parser.add_argument("--skip-fit", action="store_true")
    parser.add_argument("--skip-backtest", action="store_true")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        kind, variant, root = args.child
        measure = measure_fit if kind == "fit" else measure_backtest
        print(json.dumps(measure(Path(root), variant), default=str))
        return

    from benchmarks.fit import generate_store

    work = args.keep or Path(tempfile.mkdtemp(prefix="triage-engine-bench-"))
    variants = [*VARIANTS, *(["main"] if args.baseline_src else [])]
    print(f"machine: {os.cpu_count()} cores visible, load {os.getloadavg()[0]:.1f}")
    for kind, drives, days, skip in (("fit", args.drives, args.days, args.skip_fit),
                                     ("backtest", args.backtest_drives, args.backtest_days, args.skip_backtest)):
        if skip:
            continue
        root = work / f"{drives}-drives-{days}-days"
        if not (root / "snapshots").is_dir():
            t = time.perf_counter()
            counts = generate_store(root, drives, days)
            print(f"generated {root.name}: {counts} in {time.perf_counter() - t:.0f} s", file=sys.stderr)
        compare(kind, root, variants, args.baseline_src)


if __name__ == "__main__":
    main()
