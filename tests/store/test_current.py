"""The current-state table (triage/store/current.py): kept at each commit, equal to a rebuild from
the history, never trusted when stale or unreadable.

The reference throughout is the history itself, read back with ``Store.read`` / ``last_times`` /
``last_rows`` (the partition scans ranking used before the state existed)."""

from __future__ import annotations

import json
import random
from datetime import datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from triage.store import current
from triage.store.dataset import MANIFEST, Store

START = datetime(2026, 10, 1, 2, 0, tzinfo=timezone.utc)
NOW = START + timedelta(days=40)
SERIALS = [f"QMH{i:04d}" for i in range(12)]


def fixed_clock():
    return NOW


def history(seed: int, days: int = 30) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Invented captures: 12 drives over ``days`` nights, some missing nights, moves between
    slots and groups, null places, and a few removals."""
    rng = np.random.default_rng(seed)
    rows = []
    for day in range(days):
        for i, serial in enumerate(SERIALS):
            if rng.uniform() < 0.15:  # a missed night
                continue
            rows.append({
                "serial": serial, "taken_at": START + timedelta(days=day, minutes=int(rng.integers(0, 50))),
                "model": "Quillmere QX-8" if i % 2 else "Quillmere QN-2",
                "host": None if rng.uniform() < 0.05 else f"qh-r1-n{i % 3:02d}",
                "slot": f"bay{(i + day // 10) % 6:02d}",
                "group": None if i == 11 else f"qh-g{i % 4}",
                "power_on_hours": 1000 * i + 24 * day,
                "pending_sectors": int(rng.integers(0, 3)) if i % 5 == 0 else 0,
            })
    snapshots = pd.DataFrame(rows)
    snapshots["taken_at"] = pd.to_datetime(snapshots["taken_at"], utc=True)
    removals = pd.DataFrame({
        "serial": [SERIALS[3], SERIALS[7]],
        "removed_at": pd.to_datetime([START + timedelta(days=9, hours=5), START + timedelta(days=days - 2, hours=9)],
                                     utc=True),
        "reason": ["failed", "retired"], "note": ["", ""], "source_file": ["removals.csv"] * 2,
    })
    return snapshots, removals


def in_random_commits(store: Store, snapshots: pd.DataFrame, removals: pd.DataFrame, rng: random.Random) -> None:
    """Commit the rows in random chunks, days shuffled: late files for older days included."""
    days = sorted(snapshots["taken_at"].dt.floor("D").unique())
    rng.shuffle(days)
    chunks = [days[i:i + rng.randint(1, 5)] for i in range(0, len(days), 3)]
    removal_chunk = rng.randrange(len(chunks))
    for number, chunk in enumerate(chunks):
        rows = snapshots[snapshots["taken_at"].dt.floor("D").isin(chunk)]
        frames = {"snapshots": rows}
        if number == removal_chunk:
            frames["removals"] = removals
        store.commit(frames)


def table_frame(table, keys) -> pd.DataFrame:
    return table.to_pandas().sort_values(keys).reset_index(drop=True)


def assert_same_state(a: current.CurrentState, b: current.CurrentState) -> None:
    pd.testing.assert_frame_equal(table_frame(a.recent, ["serial", "taken_at"]), table_frame(b.recent, ["serial", "taken_at"]))
    pd.testing.assert_frame_equal(table_frame(a.sightings, ["serial"]), table_frame(b.sightings, ["serial"]))
    pd.testing.assert_frame_equal(table_frame(a.removals, ["serial", "removed_at"]),
                                  table_frame(b.removals, ["serial", "removed_at"]))
    assert (a.newest, a.next_future, a.batch, a.batches) == (b.newest, b.next_future, b.batch, b.batches)


@pytest.mark.parametrize("seed", range(6))
def test_kept_at_each_commit_in_any_order_equals_a_rebuild(tmp_path, seed):
    snapshots, removals = history(seed)
    store = Store(tmp_path, now=fixed_clock)
    in_random_commits(store, snapshots, removals, random.Random(seed))
    kept, note = store.current_state()
    assert note is None  # the commits kept it: nothing to rebuild
    assert_same_state(kept, current.build(store))


def test_it_holds_what_the_partition_scans_give(tmp_path):
    snapshots, removals = history(1)
    store = Store(tmp_path, now=fixed_clock)
    in_random_commits(store, snapshots, removals, random.Random(1))
    state, _ = store.current_state()
    floor = current.window_start(state.newest, current.RECENT_DAYS)
    scanned = store.read("snapshots", since=floor).sort_values(["serial", "taken_at"]).reset_index(drop=True)
    pd.testing.assert_frame_equal(table_frame(state.recent, ["serial", "taken_at"]), scanned)
    columns = current.SIGHTING_COLUMNS[2:]
    last = store.last_rows("snapshots", "serial", columns).sort_values("serial").reset_index(drop=True)
    pd.testing.assert_frame_equal(table_frame(state.sightings, ["serial"]), last[current.SIGHTING_COLUMNS])
    assert len(state.removals) == len(store.read("removals"))
    assert state.newest == store.read("snapshots")["taken_at"].max().to_pydatetime()


def test_rows_older_than_the_window_leave_it_but_stay_sighted(tmp_path):
    snapshots, removals = history(2, days=30)
    store = Store(tmp_path, now=fixed_clock)
    store.commit({"snapshots": snapshots, "removals": removals})
    state, _ = store.current_state()
    floor = current.window_start(state.newest, current.RECENT_DAYS)
    assert state.recent.to_pandas()["taken_at"].min() >= floor
    assert set(state.sightings.to_pandas()["serial"]) == set(SERIALS)


def test_narrowing_to_fewer_days_and_columns_reads_only_those(tmp_path):
    snapshots, _ = history(3)
    store = Store(tmp_path, now=fixed_clock)
    store.commit({"snapshots": snapshots})
    state, _ = store.current_state(columns=["serial", "taken_at", "pending_sectors"], days_back=3)
    rows = state.recent.to_pandas()
    assert list(rows.columns) == ["serial", "taken_at", "pending_sectors"]
    since = current.window_start(state.newest, 3)
    expected = store.read("snapshots", columns=["serial", "taken_at", "pending_sectors"], since=since)
    assert len(rows) == len(expected) and rows["taken_at"].min() >= since


def test_a_missing_state_is_rebuilt_with_a_note(tmp_path):
    snapshots, removals = history(4)
    store = Store(tmp_path, now=fixed_clock)
    store.commit({"snapshots": snapshots, "removals": removals})
    kept, _ = store.current_state()
    for entry in (tmp_path / current.CURRENT_DIR).iterdir():  # a store written by an older triage
        entry.unlink()
    rebuilt, note = store.current_state()
    assert "rebuilt" in note
    assert_same_state(kept, rebuilt)
    assert store.current_state()[1] is None  # saved again: the next reader trusts it


@pytest.mark.parametrize("damage", ["json", "parquet", "missing-file", "version"])
def test_an_unreadable_or_foreign_state_is_never_trusted(tmp_path, damage):
    snapshots, removals = history(5)
    store = Store(tmp_path, now=fixed_clock)
    store.commit({"snapshots": snapshots, "removals": removals})
    kept, _ = store.current_state()
    folder = tmp_path / current.CURRENT_DIR
    meta = json.loads((folder / current.STATE_FILE).read_text())
    if damage == "json":
        (folder / current.STATE_FILE).write_text("{not json")
    elif damage == "parquet":
        newest_day = max(meta["files"]["recent"])
        (folder / meta["files"]["recent"][newest_day]).write_bytes(b"PAR1 this is not parquet PAR1")
    elif damage == "missing-file":
        (folder / meta["files"]["sightings"]).unlink()
    else:
        meta["recent_days"] = current.RECENT_DAYS + 1
        (folder / current.STATE_FILE).write_text(json.dumps(meta))
    rebuilt, note = store.current_state()
    assert note.startswith("current state rebuilt from the history")
    assert_same_state(kept, rebuilt)


def test_a_commit_that_died_before_the_state_makes_it_stale(tmp_path):
    """A crash after the manifest line but before the state: the state names the batch before."""
    snapshots, _ = history(6)
    store = Store(tmp_path, now=fixed_clock)
    first = snapshots[snapshots["taken_at"] < START + timedelta(days=20)]
    store.commit({"snapshots": first})
    folder = tmp_path / current.CURRENT_DIR
    saved = {p.name: p.read_bytes() for p in folder.iterdir()}
    store.commit({"snapshots": snapshots[snapshots["taken_at"] >= START + timedelta(days=20)]})
    for entry in folder.iterdir():  # put the old state back, as if the second update never ran
        entry.unlink()
    for name, data in saved.items():
        (folder / name).write_bytes(data)
    state, note = store.current_state()
    assert "the manifest ends at" in note
    assert state.newest == snapshots["taken_at"].max().to_pydatetime()


def test_a_batch_the_manifest_never_recorded_is_not_in_the_state(tmp_path):
    """A state written for a batch whose manifest line was lost (torn) is stale, not trusted."""
    snapshots, _ = history(7)
    store = Store(tmp_path, now=fixed_clock)
    store.commit({"snapshots": snapshots[snapshots["taken_at"] < START + timedelta(days=20)]})
    store.commit({"snapshots": snapshots[snapshots["taken_at"] >= START + timedelta(days=20)]})
    lines = (tmp_path / MANIFEST).read_text().splitlines()
    (tmp_path / MANIFEST).write_text(lines[0] + "\n")  # the second commit never happened
    state, note = store.current_state()
    assert "rebuilt" in note
    assert state.newest < START + timedelta(days=20)


def test_a_capture_stored_in_the_future_counts_once_the_clock_reaches_it(tmp_path):
    snapshots, _ = history(8, days=10)
    ahead = snapshots.iloc[[0]].assign(taken_at=pd.Timestamp(NOW + timedelta(days=2)))
    clock = {"now": NOW}
    store = Store(tmp_path, now=lambda: clock["now"])
    store.commit({"snapshots": pd.concat([snapshots, ahead])})
    state, note = store.current_state()
    assert note is None and state.newest == snapshots["taken_at"].max().to_pydatetime()
    clock["now"] = NOW + timedelta(days=3)
    later, note = store.current_state()
    assert "another clock" in note
    assert later.newest == ahead["taken_at"].iloc[0].to_pydatetime()


def test_a_reader_that_cannot_take_the_lock_still_gets_the_rebuilt_state(tmp_path):
    snapshots, _ = history(9)
    store = Store(tmp_path, now=fixed_clock)
    store.commit({"snapshots": snapshots})
    (tmp_path / current.CURRENT_DIR / current.STATE_FILE).unlink()
    with Store(tmp_path).lock():  # an ingest is running
        state, note = Store(tmp_path, now=fixed_clock).current_state()
    assert "rebuilt" in note and state.sightings.num_rows == len(SERIALS)
    assert not (tmp_path / current.CURRENT_DIR / current.STATE_FILE).exists()  # nothing written unlocked


def test_a_state_that_cannot_be_written_never_fails_the_commit(tmp_path):
    """The commit is its manifest line; the state is kept after it, and rebuilt when it could not be."""
    snapshots, _ = history(10)
    store = Store(tmp_path, now=fixed_clock)
    (tmp_path / current.CURRENT_DIR).write_text("a file where the folder should be")
    assert store.commit({"snapshots": snapshots})["snapshots"] == len(snapshots)
    state, note = store.current_state()
    assert "rebuilt" in note and state.sightings.num_rows == len(SERIALS)


def test_utc_days_are_the_calendar_days_of_the_times():
    """Against Python's own calendar (datetime.date of each UTC time), nulls left out, times
    before 1970 and at the last microsecond of a day included."""
    rng = np.random.default_rng(3)
    micros = rng.integers(-20 * 365 * 86_400 * 10**6, 80 * 365 * 86_400 * 10**6, size=2_000).tolist()
    micros += [-1, 0, 86_400 * 10**6 - 1, 86_400 * 10**6]
    moments = [datetime(1970, 1, 1, tzinfo=timezone.utc) + timedelta(microseconds=m) for m in micros]
    stamps = pa.array([*moments, None], pa.timestamp("us", tz="UTC"))
    assert current.utc_days(stamps) == sorted({m.date().isoformat() for m in moments})
    assert current.utc_days(pa.chunked_array([], pa.timestamp("us", tz="UTC"))) == []
