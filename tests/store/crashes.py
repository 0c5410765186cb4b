"""Kill a real ``triage`` run with SIGKILL and check what it left: the crash harness.

Shared by ``tests/store/test_crash.py`` (a few kill points per command, seconds) and
``benchmarks/crash.py`` (many, with counts). A run is started in its own session so that both
kinds of death can be dealt: the main process alone (what the out-of-memory killer does) or its
whole process group (what ``kill -9 -- -PGID`` or a cgroup stop does).

After each kill, ``check_store`` asserts the promises: the store opens, no key is stored twice,
neither lock is held, no process of the killed run is left alive, and a ticket file, if any, is
whole. ``converged`` compares a store finished after the kills with one that was never killed.
"""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

from triage.risk.nightly import NIGHTLY_LOCK
from triage.store.dataset import Store

#: Exit codes of a run that finished its work: OK, INPUT_REJECTED, NEW_FLAGS, NOT_REPORTING (the
#: invented fleet's captures are months old, so the data is stale) -- triage/exitcodes.py.
COMPLETED = (0, 3, 4, 8)

TRIAGE = [sys.executable, "-c", "import sys; from triage.cli import main; sys.exit(main())"]


@dataclass
class Killed:
    delay: float  # seconds after the start
    whole_group: bool
    finished: bool  # the run ended before the signal
    leftovers: list[int]  # processes of the killed run still alive afterwards


def run(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    """Run ``triage args`` to the end."""
    return subprocess.run([*TRIAGE, *args], cwd=cwd, capture_output=True, text=True, timeout=600)


def seed_store(cwd: Path, captures: str, store: str) -> None:
    """A store holding the first capture file only: ``nightly`` needs an existing store (only
    ``ingest`` creates one), and then takes in the rest."""
    first = sorted((cwd / captures).rglob("*.jsonl.gz"))[0]
    done = run(["ingest", str(first.relative_to(cwd)), "--store", store], cwd)
    assert done.returncode == 0, done.stderr


def timed(args: list[str], cwd: Path) -> float:
    """Seconds a whole run of ``triage args`` takes (to place the kill points)."""
    start = time.monotonic()
    done = run(args, cwd)
    assert done.returncode in COMPLETED, done.stderr
    return time.monotonic() - start


def run_and_kill(args: list[str], cwd: Path, delay: float, whole_group: bool) -> Killed:
    """Start ``triage args``, SIGKILL it (or its process group) after ``delay`` seconds."""
    proc = subprocess.Popen([*TRIAGE, *args], cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    try:
        proc.wait(timeout=delay)
        finished = True
    except subprocess.TimeoutExpired:
        finished = False
        if whole_group:
            os.killpg(proc.pid, signal.SIGKILL)
        else:
            proc.send_signal(signal.SIGKILL)
        proc.wait()
    return Killed(delay, whole_group, finished, _session_survivors(proc.pid))


def _session_survivors(session: int, patience: float = 5.0) -> list[int]:
    """Processes still in ``session`` after up to ``patience`` seconds (workers dying with it)."""
    deadline = time.monotonic() + patience
    while True:
        alive = [pid for pid in _pids() if _session_of(pid) == session]
        if not alive or time.monotonic() > deadline:
            for pid in alive:  # clean up after a failing check, so nothing outlives the test
                try:
                    os.kill(pid, signal.SIGKILL)
                except ProcessLookupError:
                    pass
            return alive
        time.sleep(0.05)


def _pids() -> list[int]:
    return [int(name) for name in os.listdir("/proc") if name.isdigit()]


def _session_of(pid: int) -> int | None:
    """Field 6 (session) of /proc/<pid>/stat (proc(5)); the name in parentheses may hold spaces."""
    try:
        text = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = text[text.rindex(")") + 2:].split()
    return int(fields[3]) if fields[0] != "Z" else None  # a zombie holds nothing


def check_store(root: Path, tickets: Path | None = None) -> None:
    """The promises that hold after any kill (see module docstring)."""
    store = Store(root)
    snapshots = store.read("snapshots", columns=["serial", "taken_at"])
    assert not snapshots.duplicated().any(), "a snapshot key is stored twice"
    attributes = store.read("attributes", columns=["serial", "taken_at", "attribute_id"])
    assert not attributes.duplicated().any(), "an attribute key is stored twice"
    for name in ("_lock", NIGHTLY_LOCK):
        with store.lock(name):  # raises StoreLocked if a dead run's process still held it
            pass
    if tickets is not None and tickets.exists():
        text = tickets.read_bytes()
        assert text.startswith(b"key,state,") and text.endswith(b"\r\n"), "a half-written ticket file"
        with tickets.open(newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
        assert all(len(row) == len(rows[0]) for row in rows)


def store_rows(root: Path) -> tuple[list, int, int]:
    """(sorted snapshot keys, attribute rows, removal rows) of a store, to compare two stores."""
    store = Store(root)
    snapshots = store.read("snapshots", columns=["serial", "taken_at"]).sort_values(["serial", "taken_at"])
    return (list(snapshots.itertuples(index=False, name=None)), len(store.read("attributes", columns=["attribute_id"])),
            len(store.read("removals", columns=["serial"])))


def open_ticket_keys(path: Path) -> set[str]:
    with path.open(newline="", encoding="utf-8") as fh:
        return {row["key"] for row in csv.DictReader(fh) if row["state"] in ("new", "ongoing")}
