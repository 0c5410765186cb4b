"""``triage ingest`` on Dask: a real ``dask.distributed.LocalCluster`` (processes, 2 workers,
loopback only) decodes, this process commits, and the store comes out identical to a local run --
small gzip files, a file with bad lines, a large plain file cut into byte ranges, removal logs.
A scheduler nobody answers at is one line and an untouched store; a worker that dies is retried,
or the run stops with one line and nothing half-committed."""

from __future__ import annotations

import os
import shutil
import socket
from datetime import datetime, timezone
from functools import partial
from pathlib import Path

import pytest
from typer.testing import CliRunner

from tests.clusters import local_cluster
from tests.ingest.lines import ata_line, nvme_line
from tests.ingest.stores import store_contents
from triage.cli import app
from triage.exitcodes import Exit
from triage.engine import DaskEngine, EngineError, LocalEngine
from triage.ingest import captures, ingest_paths
from triage.ingest.captures import InputNotVisible
from triage.store.dataset import Store

distributed = pytest.importorskip("distributed")

NOW = datetime(2026, 11, 2, 12, 0, tzinfo=timezone.utc)
SAMPLE = Path(__file__).resolve().parents[2] / "sample_data"


cluster = pytest.fixture(scope="module")(local_cluster)


@pytest.fixture
def inputs(tmp_path, write_capture, monkeypatch):
    """A night as operators hand it over: per-host gzip files (one with bad lines), a removal log,
    and one large plain file of captures concatenated (cut into ranges: the sizes are patched in
    this process, where the tasks are planned)."""
    monkeypatch.setattr(captures, "MIN_RANGE_BYTES", 8192)
    monkeypatch.setattr(captures, "RANGE_BYTES", 8192)
    folder = tmp_path / "night"
    folder.mkdir()
    for name in ("ash-2026-08-01.jsonl.gz", "birch-2026-08-01.jsonl.gz", "cedar-2026-08-02.jsonl.gz", "removals.csv"):
        shutil.copy(SAMPLE / name, folder / name)
    bad = [ata_line("QHD0001"), '{"capture": 1, "host": ', ata_line("QHD0002", smart="00" * 512),
           ata_line("QHD0003", taken_at="2026-11-01T02:11:00Z"), nvme_line("CND0001")]
    write_capture("night/dusk-2026-11-01.jsonl.gz", bad)
    big = []
    for i in range(60):
        big.append(ata_line(f"QHE{i:04d}", taken_at=f"2026-11-01T03:{i % 60:02d}:00Z"))
        if i % 17 == 3:
            big += ["", "not json at all", nvme_line(f"CNE{i:04d}")]
    big.append(ata_line("QHE0004", taken_at="2026-11-01T03:04:00Z", host="second-copy"))  # first wins
    write_capture("night/all-hosts-2026-11-01.jsonl", big, compress=False)
    return folder


def ingest_into(root: Path, folder: Path, engine) -> Store:
    store = Store(root)
    ingest_paths(store, [folder], now=NOW, engine=engine)
    return store


def test_local_and_dask_ingest_give_identical_stores(tmp_path, inputs, cluster):
    assert len(captures.plan_tasks([inputs / "all-hosts-2026-11-01.jsonl"], 2, NOW, 10)) > 3  # cut into ranges
    with LocalEngine(workers=2) as engine:
        local = ingest_into(tmp_path / "local", inputs, engine)
    with DaskEngine(cluster.scheduler_address) as engine:
        dask_store = ingest_into(tmp_path / "dask", inputs, engine)
    expected, got = store_contents(local), store_contents(dask_store)
    assert got == expected
    assert len(expected["tables"]["snapshots"]) > 60 and len(expected["tables"]["removals"]) > 0
    assert len(expected["quarantine"]) >= 2 + 3  # the bad gzip's two, the plain file's three


# -- workers that die ---------------------------------------------------------------------------

def die_in_a_middle_range(fn, marker: str, always: bool, task):
    """Runs ``fn(task)``, except that a task reading a middle byte range kills its worker: once
    (the marker file says it happened) or every time."""
    if task.pieces[0].start > 0 and task.pieces[0].stop is not None:
        if always or not os.path.exists(marker):
            Path(marker).write_text("died")
            os._exit(1)
    return fn(task)


class DyingWorkers(DaskEngine):
    def __init__(self, address: str, marker: Path, always: bool):
        super().__init__(address)
        self.marker, self.always = str(marker), always

    def _submit(self, fn, item):
        return super()._submit(partial(die_in_a_middle_range, fn, self.marker, self.always), item)


def test_a_worker_that_dies_once_is_retried_and_the_store_is_the_same(tmp_path, inputs, cluster):
    with LocalEngine(workers=1) as engine:
        expected = store_contents(ingest_into(tmp_path / "local", inputs, engine))
    with DyingWorkers(cluster.scheduler_address, tmp_path / "died", always=False) as engine:
        got = store_contents(ingest_into(tmp_path / "dask", inputs, engine))
    assert (tmp_path / "died").exists()  # a worker did die
    assert got == expected


def test_workers_that_keep_dying_stop_the_run_with_nothing_half_committed(tmp_path, inputs, cluster, monkeypatch):
    from triage.ingest import run

    monkeypatch.setattr(run, "COMMIT_LINES", 10**9)  # one commit for the night: it must not happen
    store = Store(tmp_path / "store")
    with DyingWorkers(cluster.scheduler_address, tmp_path / "died", always=True) as engine:
        with pytest.raises(EngineError, match="workers died") as caught:
            ingest_paths(store, [inputs], now=NOW, engine=engine)
    assert "\n" not in str(caught.value)
    listed = [f["path"] for m in store.manifest() for f in m["files"]]
    assert all(p.endswith(".csv") for p in listed)  # only the removal log's own commit, made before
    assert store.read("snapshots").empty and store.read("attributes").empty
    # the next run (here: local) reads the night whole
    with LocalEngine(workers=1) as engine:
        ingest_paths(store, [inputs], now=NOW, engine=engine)
    with LocalEngine(workers=1) as engine:
        assert store_contents(store)["tables"] == store_contents(ingest_into(tmp_path / "clean", inputs, engine))["tables"]


# -- the command line ---------------------------------------------------------------------------

def tree(root: Path) -> dict:
    """Every file under ``root`` with its size and modification time (None: no folder)."""
    if not root.exists():
        return {}
    return {str(p.relative_to(root)): (p.stat().st_size, p.stat().st_mtime_ns) for p in root.rglob("*")}


def free_port() -> int:
    with socket.socket() as probe:  # a loopback port nobody listens on
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.mark.parametrize("existing", [True, False])
def test_an_unreachable_scheduler_is_one_line_and_the_store_is_untouched(tmp_path, write_capture, monkeypatch, existing):
    monkeypatch.setattr("triage.engine.CONNECT_TIMEOUT_S", 2)
    root = tmp_path / "store"
    if existing:
        ingest_paths(Store(root), [write_capture("a.jsonl.gz", [ata_line("QHU1")])], now=NOW)
    before = tree(root)
    night = write_capture("b.jsonl.gz", [ata_line("QHU2")])
    address = f"tcp://127.0.0.1:{free_port()}"
    result = CliRunner().invoke(app, ["ingest", str(night), "--store", str(root), "--scheduler", address])
    assert result.exit_code != 0
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and f"cannot reach the Dask scheduler at {address}" in lines[0]
    assert tree(root) == before  # not created, not locked, not written


def test_ingest_on_a_named_scheduler_from_the_command_line(tmp_path, inputs, cluster):
    root = tmp_path / "store"
    result = CliRunner().invoke(app, ["ingest", str(inputs), "--store", str(root), "--engine", "dask",
                                      "--scheduler", cluster.scheduler_address])
    assert result.exit_code == Exit.INPUT_REJECTED, result.output  # the bad lines were quarantined
    assert not Store(root).read("snapshots").empty


def test_an_input_the_workers_cannot_see_stops_the_run_instead_of_being_quarantined(tmp_path, write_capture, cluster, monkeypatch):
    from triage.ingest import run

    first = write_capture("a.jsonl.gz", [ata_line("QHV1")])
    hidden = write_capture("b.jsonl.gz", [ata_line("QHV2", taken_at="2026-11-01T02:20:00Z")])
    real = run.file_digest

    def digest_then_hide(path):  # this process saw the file; the workers will not
        digest = real(path)
        if path == hidden:
            path.rename(path.with_suffix(".moved"))
        return digest

    monkeypatch.setattr(run, "file_digest", digest_then_hide)
    store = Store(tmp_path / "store")
    with DaskEngine(cluster.scheduler_address) as engine, pytest.raises(InputNotVisible) as caught:
        ingest_paths(store, [first, hidden], now=NOW, engine=engine)
    message = str(caught.value)
    assert "\n" not in message and str(hidden) in message and "same paths" in message
    assert str(hidden) not in {f["path"] for m in store.manifest() for f in m["files"]}  # read next run
