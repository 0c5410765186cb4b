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
    # Readable after the crash, and only whole days visible: the day whose rename went through
    # (days are written in parallel, so either one) has all its rows, the other none.
    visible = store.read("snapshots")
    per_day = visible.groupby(visible["taken_at"].dt.strftime("%Y-%m-%d")).size().to_dict()
    assert per_day in ({"2026-11-01": 2}, {"2026-11-02": 1})
    assert store.append("snapshots", NIGHTS) == 3 - len(visible)
    assert len(store.read("snapshots")) == 3


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
