"""`triage rank` at fleet scale: wall time and peak memory of the whole command, and how they grow.

Issue target (100,000 drives, 2 cores): the real `triage rank` command, process start included,
under 1.5 s wall and 600 MB peak; rank on 180 nights of history / rank on 30 nights <= 1.2.

Stores are generated with the simulation of ``benchmarks/fit.py`` (invented models, nightly
captures; one batch recorded in the manifest), one model is fitted on the 100k x 30 store and
copied into the others so that every run scores P(fail). Each measurement runs the command in a
fresh process (``os.wait4`` gives that process's own peak RSS), three times; the median is shown.

Each store is ranked two ways: as on-call runs it after the night's commit, when the night's
ranking was saved by the rank before (nightly, or the first hand run), and computed with no saved
ranking (the first rank after a commit, or with another rule set). Baselines measured in the
same run:

  * ``old``   -- the same command from the code before the current-state table (``--old REV``,
                 default the commit this work started from), which scans the day partitions;
  * ``start`` -- a fresh process that imports the command line (what no command can avoid);
  * ``floor`` -- a fresh process that imports the command line and reads the state's files
                 (what no ranking computed afresh can avoid).

A filtered rank (``--site ash --severity replace-soon``) is measured too: it reads the filter
columns of every saved row rather than the first rows only.

The 1,000,000-drive store (``--million``) is written directly as a current-state table (the
recent window of 9 nights and every drive's sighting), with no partitions behind it.

    .venv/bin/python benchmarks/rank_scale.py [--keep DIR] [--million] [--old REV]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tarfile
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parent))
from fit import MODELS, generate_store, write_day  # noqa: E402  (the benchmark's own generator)

from triage.store import current  # noqa: E402
from triage.store.schema import REMOVALS, SNAPSHOTS  # noqa: E402

REPO = Path(__file__).resolve().parent.parent
TIME = shutil.which("time", path="/usr/bin:/bin")  # GNU time, to read each command's own peak RSS
#: The last commit before the current-state table: the partition-scanning rank.
OLD_REV = "21ef913"
RUNS = 3
#: What no ranking can avoid: start, import the command line, load the rules, read the state's
#: files for the window and columns rank asks for.
FLOOR = ("import sys\nimport triage.cli\nfrom triage.rules import load_rules\n"
         "from triage.risk.rank import MODEL_COLUMNS, _history_columns\nfrom triage.store.dataset import Store\n"
         "rules = load_rules([], include_defaults=True)\n"
         "columns = sorted(set(_history_columns(rules, None)) | set(MODEL_COLUMNS))\n"
         "state, note = Store(sys.argv[1]).current_state(columns=columns, days_back=rules.window_days)\n"
         "assert note is None, note\n")


def register(root: Path) -> None:
    """Record the generated files as one committed batch, in the current store format."""
    (root / "_manifest.jsonl").write_text(json.dumps({"batch": "bench", "files": [], "rows": {}}) + "\n")
    (root / "_format.json").write_text('{"store_format": 2}\n')


def run(argv: list[str], env: dict | None = None) -> tuple[float, float, int, float]:
    """(wall seconds, peak RSS in MB, exit code, CPU seconds) of one fresh process (output dropped)."""
    start = time.perf_counter()
    # Linux carries the peak RSS of the process that forked into the child's across exec, so the
    # command is started by GNU time (a small process) when there is one, which reports its peak.
    report = Path(tempfile.mkstemp(prefix="rank-bench-rss-")[1])
    launcher = [TIME, "-q", "-f", "%M", "-o", str(report)] if TIME else []
    # cwd: not the repository, whose ./triage would shadow the package on PYTHONPATH
    proc = subprocess.Popen([*launcher, *argv], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env,
                            cwd=tempfile.gettempdir())
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    peak_kb = int(report.read_text().split()[-1]) if TIME and report.read_text().strip() else usage.ru_maxrss
    report.unlink()
    return wall, peak_kb / 1024, os.waitstatus_to_exitcode(status), usage.ru_utime + usage.ru_stime


def measure(argv: list[str], env: dict | None = None, runs: int = RUNS, before=None) -> dict:
    """Median wall and CPU, highest peak of ``runs`` runs; ``before()`` runs before each."""
    results = []
    for _ in range(runs):
        if before is not None:
            before()
        results.append(run(argv, env))
    bad = [r[2] for r in results if r[2] not in (0, 8)]  # 8: the generated fleet's captures are old
    if bad:
        raise SystemExit(f"{' '.join(argv)} exited {bad[0]}")
    return {"seconds": statistics.median(r[0] for r in results), "peak_mb": max(r[1] for r in results),
            "cpu": statistics.median(r[3] for r in results)}


#: The console script's body: ``triage`` as a fresh process, from whichever package is on the path.
ENTRY = "import sys; from triage.cli import main; sys.argv[0] = 'triage'; sys.exit(main())"


def rank_argv(python: str, root: Path, *filters: str) -> list[str]:
    return [python, "-c", ENTRY, "rank", "--store", str(root), "--top", "25", "--format", "csv", *filters]


#: A filter on-call types: one site's drives of one tier.
FILTERED = ("--site", "ash", "--severity", "replace-soon")


def forget_rankings(root: Path) -> None:
    """Delete the saved rankings (triage/risk/saved.py): the next rank computes its own."""
    shutil.rmtree(root / "derived", ignore_errors=True)


def old_code(rev: str, into: Path) -> dict | None:
    """The package as of ``rev`` unpacked into ``into``; the environment that runs it."""
    archive = subprocess.run(["git", "-C", str(REPO), "archive", rev, "triage"], capture_output=True)
    if archive.returncode:
        print(f"(no old-code baseline: git archive {rev} failed)", file=sys.stderr)
        return None
    into.mkdir(parents=True, exist_ok=True)
    tar = into / "old.tar"
    tar.write_bytes(archive.stdout)
    with tarfile.open(tar) as fh:
        fh.extractall(into, filter="data")
    env = {**os.environ, "PYTHONPATH": str(into)}
    where = subprocess.run([sys.executable, "-c", "import triage; print(triage.__file__)"], env=env,
                           cwd=tempfile.gettempdir(), capture_output=True, text=True).stdout.strip()
    if not where.startswith(str(into)):
        raise SystemExit(f"the old code did not load ({where}): check PYTHONPATH handling")
    return env


def commit_cost(root: Path) -> tuple[float, float, int]:
    """(seconds of a commit of one more night, of which the state update, rows) on ``root``."""
    from triage.store.dataset import Store

    store = Store(root)
    newest = store.days("snapshots")[-1]
    night = pq.read_table(next((root / "snapshots" / f"day={newest}").glob("part-*.parquet")), schema=SNAPSHOTS)
    later = pa.compute.add(night["taken_at"], pa.scalar(pd.Timedelta(days=1).to_pytimedelta(), pa.duration("us")))
    night = night.set_column(night.schema.get_field_index("taken_at"), "taken_at", later.cast(night["taken_at"].type))
    spent = {"state": 0.0}
    update = store._update_current

    def timed(parts):
        t = time.perf_counter()
        update(parts)
        spent["state"] += time.perf_counter() - t

    store._update_current = timed
    manifest = (root / "_manifest.jsonl").read_text()
    t = time.perf_counter()
    store.commit({"snapshots": night})
    seconds = time.perf_counter() - t
    added = pc_day(later)  # put the store back as generated
    shutil.rmtree(root / "snapshots" / f"day={added}")
    (root / "_manifest.jsonl").write_text(manifest)
    shutil.rmtree(root / current.CURRENT_DIR, ignore_errors=True)
    return seconds, spent["state"], night.num_rows


def pc_day(stamps: pa.ChunkedArray) -> str:
    return pd.Timestamp(pa.compute.min(stamps).as_py()).strftime("%Y-%m-%d")


def million_state(root: Path, n_drives: int = 1_000_000, nights: int = 9, seed: int = 11) -> None:
    """A store holding only a current-state table: ``nights`` of captures of ``n_drives``."""
    rng = np.random.default_rng(seed)
    model_ix = rng.choice(len(MODELS), size=n_drives)
    bus = np.array([m[1] for m in MODELS])[model_ix]
    serial = np.array([f"QHM{i:07d}" for i in range(n_drives)], dtype=object)
    age0 = rng.integers(0, 6 * 8766, size=n_drives).astype(float)
    temp_mean = np.where(bus == "nvme", rng.normal(44, 5, n_drives), rng.normal(36, 4, n_drives))
    reallocated = np.where(rng.uniform(size=n_drives) < 0.06, rng.integers(1, 200, n_drives), 0).astype(float)
    pending = np.where(rng.uniform(size=n_drives) < 0.01, rng.integers(1, 20, n_drives), 0).astype(float)
    uncorrectable = np.zeros(n_drives)
    minute = rng.integers(0, 90, n_drives)
    rows = np.arange(n_drives)
    folder = root / current.CURRENT_DIR
    scratch = root / "scratch"
    folder.mkdir(parents=True)
    names = {"recent": {}, "sightings": "sightings-1-bench.parquet", "removals": "removals-1-bench.parquet"}
    for night in range(nights):  # one file per night, as Store.commit keeps them
        grow = (pending > 0) & (rng.uniform(size=n_drives) < 0.1)
        pending[grow] += 3
        temperature = np.round(temp_mean + rng.normal(0, 1.2, n_drives))
        write_day(scratch, night, rows, serial, model_ix, bus, age0 + 24.0 * night, temperature, reallocated,
                  pending, uncorrectable, minute)
        day = next(scratch.glob("day=*/part-bench.parquet"))
        table = pq.read_table(day, schema=SNAPSHOTS)
        table = table.take(pa.compute.sort_indices(table, sort_keys=[("taken_at", "ascending"), ("serial", "ascending")]))
        name = f"recent-{day.parent.name[4:]}-bench.parquet"
        pq.write_table(table, folder / name, compression="lz4")
        names["recent"][day.parent.name[4:]] = name
        shutil.rmtree(day.parent)
    pq.write_table(table.select(current.SIGHTING_COLUMNS), folder / names["sightings"])
    pq.write_table(REMOVALS.empty_table(), folder / names["removals"])
    shutil.rmtree(scratch, ignore_errors=True)
    newest = pd.Timestamp(pa.compute.max(table["taken_at"]).as_py())
    meta = {"state_version": current.STATE_VERSION, "recent_days": current.RECENT_DAYS, "batch": "bench",
            "batches": 1, "newest": newest.isoformat(), "ceiling": pd.Timestamp.now(tz="UTC").isoformat(),
            "next_future": None, "files": names}
    (folder / current.STATE_FILE).write_text(json.dumps(meta) + "\n")
    register(root)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--keep", type=Path, help="generate into / reuse this folder instead of a temporary one")
    parser.add_argument("--million", action="store_true", help="also rank 1,000,000 drives (a state-only store)")
    parser.add_argument("--old", default=OLD_REV, help="git revision of the baseline code (default %(default)s)")
    parser.add_argument("--generate", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.generate:
        root, drives, nights = Path(args.generate[0]), int(args.generate[1]), int(args.generate[2])
        if nights:
            print(generate_store(root, drives, nights), file=sys.stderr)
            register(root)
        else:
            million_state(root, drives)
        return
    work = args.keep or Path(tempfile.mkdtemp(prefix="triage-rank-bench-"))
    python = sys.executable
    stores = {"10k x 30": (10_000, 30), "100k x 30": (100_000, 30), "100k x 180": (100_000, 180)}
    try:
        for label, (drives, nights) in stores.items():
            root = work / label.replace(" ", "")
            if not (root / "snapshots").is_dir():  # in a child, so that this process stays small
                t = time.perf_counter()
                subprocess.run([python, __file__, "--generate", str(root), str(drives), str(nights)], check=True)
                print(f"generated {label} in {time.perf_counter() - t:.0f} s", file=sys.stderr)
        model_home = work / "100kx30" / "models"
        if not model_home.is_dir():
            t = time.perf_counter()
            subprocess.run([python, "-c", ENTRY, "fit", "--store", str(work / "100kx30")], check=True,
                           capture_output=True)
            print(f"fitted the model in {time.perf_counter() - t:.0f} s", file=sys.stderr)
        for label in ("10k x 30", "100k x 180"):
            target = work / label.replace(" ", "") / "models"
            if not target.is_dir():
                shutil.copytree(model_home, target)
        if args.million and not (work / "1Mx9" / current.CURRENT_DIR).is_dir():
            t = time.perf_counter()
            subprocess.run([python, __file__, "--generate", str(work / "1Mx9"), "1000000", "0"], check=True)
            print(f"generated the 1M-drive state in {time.perf_counter() - t:.0f} s", file=sys.stderr)
            shutil.copytree(model_home, work / "1Mx9" / "models")

        print(f"machine: {os.cpu_count()} cores visible; load {os.getloadavg()[0]:.1f}; median of {RUNS} runs")
        old_env = old_code(args.old, work / "old-code")
        start = measure([python, "-c", "import triage.cli"])
        print(f"start (a fresh process importing the command line): {start['seconds']:.2f} s, {start['peak_mb']:.0f} MB")
        figures = {}
        for label in stores:
            root = work / label.replace(" ", "")
            shutil.rmtree(root / current.CURRENT_DIR, ignore_errors=True)
            rebuild = run(rank_argv(python, root))  # the first rank builds the state from the history
            run(rank_argv(python, root))  # ... and the second, with a state to name it by, saves its ranking
            figures[label] = new = measure(rank_argv(python, root))  # the night's ranking, saved by the run above
            filtered = measure(rank_argv(python, root, *FILTERED))
            computed = measure(rank_argv(python, root), before=lambda: forget_rankings(root))
            figures[label]["computed"] = computed
            floor = measure([python, "-c", FLOOR, str(root)])
            line = (f"{label:>11}: rank {new['seconds']:.2f} s ({new['cpu']:.2f} s CPU), {new['peak_mb']:.0f} MB | "
                    f"filtered {filtered['seconds']:.2f} s, {filtered['peak_mb']:.0f} MB | "
                    f"computed (no saved ranking) {computed['seconds']:.2f} s ({computed['cpu']:.2f} s CPU), "
                    f"{computed['peak_mb']:.0f} MB | floor (import + read the "
                    f"state) {floor['seconds']:.2f} s ({floor['cpu']:.2f} s CPU), {floor['peak_mb']:.0f} MB | first rank, state built from "
                    f"the history: {rebuild[0]:.1f} s, {rebuild[1]:.0f} MB")
            if old_env is not None:
                old = measure(rank_argv(python, root), old_env)
                figures[label]["old"] = old
                line += (f" | old partition scan {old['seconds']:.2f} s ({old['cpu']:.2f} s CPU), {old['peak_mb']:.0f} MB "
                         f"({old['seconds'] / new['seconds']:.1f}x the time)")
            print(line)
        if args.million:
            million = work / "1Mx9"
            computed = measure(rank_argv(python, million), runs=1, before=lambda: forget_rankings(million))
            figures["1M x 9"] = big = measure(rank_argv(python, million), runs=1)  # reads what the run above saved
            floor = measure([python, "-c", FLOOR, str(million)], runs=1)
            print(f"     1M x 9: rank {big['seconds']:.2f} s ({big['cpu']:.2f} s CPU), {big['peak_mb']:.0f} MB | computed "
                  f"{computed['seconds']:.2f} s, {computed['peak_mb']:.0f} MB | floor "
                  f"{floor['seconds']:.2f} s, {floor['peak_mb']:.0f} MB (one run each; state only, no partitions)")
        small, mid, long = figures["10k x 30"], figures["100k x 30"], figures["100k x 180"]
        # the two histories alternately, so that a change in the machine's load hits both alike
        pairs = [(run(rank_argv(python, work / "100kx30")), run(rank_argv(python, work / "100kx180")))
                 for _ in range(5)]
        wall = statistics.median(b[0] for _, b in pairs) / statistics.median(a[0] for a, _ in pairs)
        cpu = statistics.median(b[3] for _, b in pairs) / statistics.median(a[3] for a, _ in pairs)
        print(f"history: 180 nights / 30 nights = {long['seconds'] / mid['seconds']:.2f}; alternating 5 pairs: "
              f"{wall:.2f} wall, {cpu:.2f} CPU (target <= 1.2)")

        def computed_pair():
            for label in ("100k x 30", "100k x 180"):
                forget_rankings(work / label.replace(" ", ""))
            return run(rank_argv(python, work / "100kx30")), run(rank_argv(python, work / "100kx180"))

        pairs = [computed_pair() for _ in range(3)]
        wall = statistics.median(b[0] for _, b in pairs) / statistics.median(a[0] for a, _ in pairs)
        print(f"computed (no saved ranking): 180 nights / 30 nights = "
              f"{long['computed']['seconds'] / mid['computed']['seconds']:.2f}; alternating 3 pairs: {wall:.2f} wall")
        growth = f"growth 10k -> 100k drives: {mid['seconds'] / small['seconds']:.1f}x time, " \
                 f"{mid['peak_mb'] / small['peak_mb']:.1f}x memory"
        if args.million:
            growth += (f"; 100k -> 1M: {figures['1M x 9']['seconds'] / mid['seconds']:.1f}x time, "
                       f"{figures['1M x 9']['peak_mb'] / mid['peak_mb']:.1f}x memory")
        print(growth)
        print(f"targets at 100k: < 1.5 s -> {'met' if mid['seconds'] < 1.5 else 'MISSED'}; "
              f"< 600 MB -> {'met' if mid['peak_mb'] < 600 else 'MISSED'}")
        seconds, state, rows = commit_cost(work / "100kx30")  # last: this process reads a night's rows
        print(f"commit of one more night ({rows:,} captures) to 100k x 30: {seconds:.1f} s, of which the "
              f"state update {state:.1f} s")
    finally:
        if args.keep is None:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
