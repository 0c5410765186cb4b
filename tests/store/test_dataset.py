"""The store's commit, de-duplication, crash-recovery and read contract."""

from __future__ import annotations

import json
import os
from datetime import datetime, timezone

import pandas as pd
import pyarrow.dataset as ds
import pytest

from triage.store.dataset import Store, StoreLocked
from triage.store.schema import SNAPSHOTS


def frame(rows):
    df = pd.DataFrame(rows, columns=["serial", "taken_at", "power_on_hours"])
    df["taken_at"] = pd.to_datetime(df["taken_at"], utc=True)
    return df


NIGHTS = frame([
    ("QHA0001", "2026-11-01T02:00:00Z", 100),
    ("QHA0002", "2026-11-01T02:05:00Z", 200),
    ("QHA0001", "2026-11-02T02:00:00Z", 124),
])


def test_rows_land_in_one_hive_partition_per_utc_day(tmp_path):
    store = Store(tmp_path)
    assert store.append("snapshots", NIGHTS) == 3
    assert store.days("snapshots") == ["2026-11-01", "2026-11-02"]
    # Another engine reads the layout with plain Hive partitioning (the public contract).
    table = ds.dataset(tmp_path / "snapshots", format="parquet", partitioning="hive").to_table()
    assert table.num_rows == 3
    assert set(table.schema.names) >= set(SNAPSHOTS.names)


def test_same_serial_and_time_again_adds_nothing(tmp_path):
    store = Store(tmp_path)
    store.append("snapshots", NIGHTS)
    assert store.append("snapshots", NIGHTS) == 0
    assert len(store.read("snapshots")) == 3


def test_duplicates_inside_one_batch_are_stored_once(tmp_path):
    store = Store(tmp_path)
    assert store.append("snapshots", pd.concat([NIGHTS, NIGHTS])) == 3


def test_read_since_returns_only_later_rows(tmp_path):
    store = Store(tmp_path)
    store.append("snapshots", NIGHTS)
    later = store.read("snapshots", columns=["serial", "power_on_hours"],
                       since=datetime(2026, 11, 2, tzinfo=timezone.utc))
    assert later.to_dict("records") == [{"serial": "QHA0001", "power_on_hours": 124}]


def test_read_serials_returns_only_those_drives(tmp_path):
    store = Store(tmp_path)
    store.append("snapshots", NIGHTS)
    one = store.read("snapshots", columns=["serial", "power_on_hours"], serials=["QHA0001"])
    assert sorted(one["power_on_hours"]) == [100, 124] and set(one["serial"]) == {"QHA0001"}
    assert store.read("snapshots", serials=["QHA9999"]).empty


def test_reading_an_empty_store_gives_the_schema_columns(tmp_path):
    empty = Store(tmp_path).read("snapshots")
    assert list(empty.columns) == SNAPSHOTS.names and empty.empty


def test_crash_before_rename_leaves_only_whole_files_and_rerun_completes(tmp_path, monkeypatch):
    store = Store(tmp_path)
    real_replace = os.replace
    calls = {"n": 0}

    def crash_on_second(src, dst):
        calls["n"] += 1
        if calls["n"] == 2:
            raise KeyboardInterrupt("simulated crash")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", crash_on_second)
    with pytest.raises(KeyboardInterrupt):
        store.append("snapshots", NIGHTS)
    monkeypatch.setattr(os, "replace", real_replace)
    # Readable after the crash, and nothing of the unrecorded commit is visible, although one
    # day's file was renamed into place: readers go through the manifest.
    assert store.read("snapshots").empty and store.days("snapshots") == []
    assert list(tmp_path.glob("snapshots/day=*/part-*.parquet"))  # the leftover is there...
    assert store.append("snapshots", NIGHTS) == 3  # ...and the next commit sweeps it away
    assert len(store.read("snapshots")) == 3
    assert len(list(tmp_path.glob("snapshots/day=*/*"))) == 2 and not list(tmp_path.rglob(".part-*"))


def test_torn_manifest_line_is_ignored(tmp_path):
    store = Store(tmp_path)
    store.append("snapshots", NIGHTS)
    with (tmp_path / "_manifest.jsonl").open("a") as fh:
        fh.write('{"batch": "half')
    assert len(store.manifest()) == 1
    store.append("snapshots", frame([("QHA0003", "2026-11-03T02:00:00Z", 5)]))
    entries = store.manifest()
    assert len(entries) == 2 and all(json.dumps(e) for e in entries)


def test_second_writer_is_refused_while_the_lock_is_held(tmp_path):
    store = Store(tmp_path)
    with store.lock():
        with pytest.raises(StoreLocked):
            with Store(tmp_path).lock():
                pass


def test_existing_refuses_a_missing_folder_and_a_folder_without_a_manifest(tmp_path):
    from triage.store.dataset import StoreMissing

    with pytest.raises(StoreMissing, match="no such store"):
        Store.existing(tmp_path / "typo")
    with pytest.raises(StoreMissing, match="not a triage store"):
        Store.existing(tmp_path)
    assert not (tmp_path / "typo").exists()
    Store(tmp_path / "s").append("snapshots", pd.DataFrame({
        "serial": ["QS1"], "taken_at": pd.to_datetime(["2026-11-01T02:00Z"])}))
    assert Store.existing(tmp_path / "s").root == tmp_path / "s"


def test_last_rows_gives_each_serial_its_newest_capture_over_all_days(tmp_path):
    store = Store(tmp_path / "s")
    store.append("snapshots", pd.DataFrame({
        "serial": ["QS1", "QS1", "QS2", "QS1"],
        "host": ["ash-1", "ash-2", "ash-1", "ash-3"],
        "taken_at": pd.to_datetime(["2026-10-01T02:00Z", "2026-10-20T02:00Z", "2026-10-05T02:00Z",
                                    "2026-10-20T01:00Z"])}))
    rows = store.last_rows("snapshots", "serial", ["host"]).sort_values("serial")
    assert list(zip(rows["serial"], rows["host"])) == [("QS1", "ash-2"), ("QS2", "ash-1")]
    times = store.last_times("snapshots", "serial").set_index("serial")["taken_at"]
    assert times["QS2"] == pd.Timestamp("2026-10-05T02:00Z")


def test_a_lock_is_free_again_once_its_holder_is_killed(tmp_path):
    # The writer lock is a POSIX record lock: the kernel drops it when its holder dies.
    import signal
    import subprocess
    import sys

    holder = subprocess.Popen([sys.executable, "-c", (
        "import sys, time; from triage.store.dataset import Store\n"
        f"with Store({str(tmp_path)!r}).lock():\n"
        "    print('held', flush=True); time.sleep(60)")], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "held"
        with pytest.raises(StoreLocked, match=f"pid {holder.pid}"):
            with Store(tmp_path).lock():
                pass
    finally:
        holder.send_signal(signal.SIGKILL)
        holder.wait()
    with Store(tmp_path).lock():  # taken over at once, no manual clean-up
        pass


def test_a_forked_child_left_behind_does_not_keep_the_store_locked(tmp_path):
    # POSIX.1-2017 fork(): "Record locks set by the parent process shall not be inherited by the
    # child." Kill the holder alone (as the out-of-memory killer does) and leave its forked child
    # running: the lock must be free.
    import os
    import signal
    import subprocess
    import sys

    parent = subprocess.Popen([sys.executable, "-c", (
        "import os, time; from triage.store.dataset import Store\n"
        f"with Store({str(tmp_path)!r}).lock():\n"
        "    child = os.fork()\n"
        "    if child == 0:\n"
        "        time.sleep(60); os._exit(0)\n"
        "    print(child, flush=True); time.sleep(60)")], stdout=subprocess.PIPE, text=True)
    child = int(parent.stdout.readline())
    try:
        parent.send_signal(signal.SIGKILL)
        parent.wait()
        os.kill(child, 0)  # the child is still alive...
        with Store(tmp_path).lock():  # ...and the lock is free
            pass
    finally:
        os.kill(child, signal.SIGKILL)


def test_stray_temporary_files_are_swept_at_the_next_commit(tmp_path):
    store = Store(tmp_path)
    store.append("snapshots", NIGHTS)
    stray = tmp_path / "snapshots" / "day=2026-11-01" / ".part-20261101T000000Z-dead.parquet.tmp"
    stray.write_bytes(b"half a file")
    store.append("snapshots", frame([("QHA0003", "2026-11-03T02:00:00Z", 5)]))
    assert not stray.exists()
    assert len(store.read("snapshots")) == 4


def test_far_future_and_malformed_partitions_never_break_a_reader(tmp_path):
    # Stores written before the ingest date checks may hold these; readers must not fail on them.
    import pyarrow as pa

    store = Store(tmp_path, now=lambda: datetime(2026, 11, 5, tzinfo=timezone.utc))
    store.append("snapshots", NIGHTS)
    odd_times = [datetime(2300, 1, 1, tzinfo=timezone.utc),  # beyond what pandas can hold
                 datetime(2026, 11, 5, 12, tzinfo=timezone.utc),  # later today: the future
                 datetime(1970, 1, 2, tzinfo=timezone.utc)]
    store.commit({"snapshots": pa.Table.from_pylist(
        [{"serial": "QHA0009", "taken_at": t, "power_on_hours": 7} for t in odd_times], schema=SNAPSHOTS)})
    for odd in ("day=10000-01-01", "day=0000-01-01", "day=2026-13-45"):
        (tmp_path / "snapshots" / odd).mkdir()
    # the 2300 and 1970 partitions are left out; today's stays (its rows are filtered one by one)
    assert store.days("snapshots") == ["2026-11-01", "2026-11-02", "2026-11-05"]
    rows = store.read("snapshots")
    assert sorted(rows["serial"]) == ["QHA0001", "QHA0001", "QHA0002"]
    assert rows["taken_at"].max() == pd.Timestamp("2026-11-02T02:00:00Z")


def test_a_full_disk_during_ingest_is_one_line_and_the_store_stays_whole(tmp_path, monkeypatch):
    import errno

    import pyarrow.parquet as pq
    from typer.testing import CliRunner

    from tests.ingest.lines import ata_line
    from triage.cli import app

    store = Store(tmp_path / "store")
    store.append("snapshots", NIGHTS)
    capture = tmp_path / "ash-2026-11-03.jsonl"
    capture.write_text(ata_line() + "\n", encoding="utf-8")

    def no_space(table, where, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(where))

    monkeypatch.setattr(pq, "write_table", no_space)
    result = CliRunner().invoke(app, ["ingest", str(capture), "--store", str(store.root)])
    assert result.exit_code == 1
    assert result.stderr.count("\n") == 1 and "No space left on device" in result.stderr
    assert "Traceback" not in result.output
    monkeypatch.undo()
    assert len(store.read("snapshots")) == 3  # what was stored before is all there
    assert CliRunner().invoke(app, ["ingest", str(capture), "--store", str(store.root)]).exit_code == 0
    assert len(store.read("snapshots")) == 4 and not list(store.root.rglob(".part-*"))


def test_readers_see_none_of_a_commit_until_its_manifest_line_is_written(tmp_path, monkeypatch):
    store = Store(tmp_path)
    store.append("snapshots", NIGHTS)
    seen = {}
    real_append = Store._append_manifest

    def look_then_append(self, entry):
        # every Parquet file of the batch is in place now; only the manifest line is missing
        reader = Store(tmp_path)
        seen["snapshots"], seen["attributes"] = len(reader.read("snapshots")), len(reader.read("attributes"))
        real_append(self, entry)

    monkeypatch.setattr(Store, "_append_manifest", look_then_append)
    later = frame([("QHA0003", "2026-11-03T02:00:00Z", 5)])
    attrs = pd.DataFrame({"serial": ["QHA0003"], "taken_at": pd.to_datetime(["2026-11-03T02:00:00Z"], utc=True),
                          "attribute_id": [5], "raw_value": [0]})
    store.commit({"snapshots": later, "attributes": attrs})
    assert seen == {"snapshots": 3, "attributes": 0}
    assert len(store.read("snapshots")) == 4 and len(store.read("attributes")) == 1
