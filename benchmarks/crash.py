"""Crash convergence: SIGKILL real ``ingest``, ``nightly`` and ``tickets`` runs at many points.

The long version of ``tests/store/test_crash.py`` (same harness, ``tests/store/crashes.py``).
For each command, ``--kills`` runs, each from a fresh copy of the starting state, are killed at
a delay drawn uniformly over a clean run's duration, half of them the main process alone (as the
out-of-memory killer does), half the whole process group. After every kill the store must open
with no key stored twice, neither lock may be held and no process of the killed run may be
alive; a ticket file, if any, must be whole. Then a rerun finishes and its result is compared
with a store that was never killed. ``finished_first`` counts runs that ended before their kill
(a busy machine can make the clean run slower than the killed ones); each such run shortens the
window the next delays are drawn from by 30 %.
Counts of every broken promise are printed (all should be 0) and written to benchmarks/out/.

    .venv/bin/python benchmarks/crash.py [--kills 20] [--drives 120] [--days 14] [--seed 1]
"""

from __future__ import annotations

import argparse
import json
import random
import shutil
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # the tests' harness

from tests.store.crashes import (  # noqa: E402
    COMPLETED, check_store, open_ticket_keys, run, run_and_kill, seed_store, store_rows, timed)
from triage.demo import FleetSpec, generate_fleet, write_captures  # noqa: E402

COMMANDS = {
    "ingest": (["ingest", "captures", "--store", "store"], None),
    "nightly": (["nightly", "--dumps", "captures", "--out", "tickets.csv", "--store", "store"], "tickets.csv"),
    "tickets": (["tickets", "--out", "tickets.csv", "--store", "store"], "tickets.csv"),
}


def trial(command: str, reference: Path, seconds: float, kills: int, rng: random.Random) -> dict:
    """``kills`` runs of ``command``, each from the clean starting state, killed, checked, rerun."""
    args, ticket_name = COMMANDS[command]
    clean = reference / command
    counts = {"kills": 0, "finished_first": 0, "broken_store": 0, "survivors": 0, "diverged": 0}
    window = seconds
    for i in range(kills):
        work = Path(tempfile.mkdtemp(prefix=f"crash-{command}-"))
        try:
            shutil.copytree(reference / "captures", work / "captures")
            if command == "tickets":  # tickets reads a store that ingest filled
                shutil.copytree(reference / "ingest" / "store", work / "store")
            elif command == "nightly":  # nightly needs an existing store
                shutil.copytree(reference / "seed", work / "store")
            killed = run_and_kill(args, work, rng.uniform(0.0, window), whole_group=bool(i % 2))
            counts["kills"] += 1
            counts["finished_first"] += killed.finished
            if killed.finished:  # the clean run was slowed by a busy machine: aim earlier
                window *= 0.7
            counts["survivors"] += bool(killed.leftovers)
            try:
                check_store(work / "store", work / ticket_name if ticket_name else None)
            except AssertionError as exc:
                counts["broken_store"] += 1
                print(f"  {command}: after a kill at {killed.delay:.2f} s: {exc}", file=sys.stderr)
            finished = run(args, work)
            same = finished.returncode in COMPLETED and store_rows(work / "store") == store_rows(clean / "store")
            if ticket_name:
                same = same and open_ticket_keys(work / ticket_name) == open_ticket_keys(clean / ticket_name)
            counts["diverged"] += int(not same)
        finally:
            shutil.rmtree(work, ignore_errors=True)
    counts["clean_run_seconds"], counts["last_window_seconds"] = round(seconds, 2), round(window, 2)
    return counts


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--kills", type=int, default=20, help="kills per command")
    parser.add_argument("--drives", type=int, default=120)
    parser.add_argument("--days", type=int, default=14)
    parser.add_argument("--seed", type=int, default=1)
    options = parser.parse_args()
    rng = random.Random(options.seed)
    reference = Path(tempfile.mkdtemp(prefix="crash-reference-"))
    try:
        write_captures(generate_fleet(FleetSpec(seed=options.seed, n_drives=options.drives, days=options.days)),
                       reference / "captures")
        seed_store(reference, "captures", "seed")
        seconds = {}
        for command in COMMANDS:  # the clean runs: their stores and durations
            (reference / command).mkdir()
            shutil.copytree(reference / "captures", reference / command / "captures")
            if command == "tickets":
                shutil.copytree(reference / "ingest" / "store", reference / command / "store")
            elif command == "nightly":
                shutil.copytree(reference / "seed", reference / command / "store")
            seconds[command] = timed(COMMANDS[command][0], reference / command)
        results = {}
        for command in COMMANDS:
            results[command] = trial(command, reference, seconds[command], options.kills, rng)
            print(f"{command:8s} {json.dumps(results[command])}")
        out = Path(__file__).parent / "out"
        out.mkdir(exist_ok=True)
        (out / "crash.json").write_text(json.dumps({"options": vars(options), "results": results}, indent=2) + "\n")
    finally:
        shutil.rmtree(reference, ignore_errors=True)


if __name__ == "__main__":
    main()
