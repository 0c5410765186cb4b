"""Store format 2: a store written by format 1 (old column names) is converted with nothing lost."""

from __future__ import annotations

import json

import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest

from triage.store.dataset import FORMAT_FILE, MANIFEST, Store, StoreFormatError
from triage.store.schema import ATTRIBUTES, RENAMED_SINCE, SNAPSHOTS, STORE_FORMAT

OLD = RENAMED_SINCE[2]


def old_schema(schema: pa.Schema, table: str) -> pa.Schema:
    """The format-1 schema of a table: today's columns under their old names."""
    back = {new: old for old, new in OLD[table].items()}
    return pa.schema([pa.field(back.get(f.name, f.name), f.type) for f in schema])


def attribute_rows() -> pd.DataFrame:
    """Invented rows covering the edges: a null threshold, a 48-bit raw value, flag words."""
    return pd.DataFrame({
        "serial": ["QHM7A001", "QHM7A001", "QHM7A001", "QHM7A002", "QHM7A002"],
        "taken_at": pd.to_datetime(["2026-11-01T02:00:00Z"] * 3 + ["2026-11-02T02:10:00Z"] * 2, utc=True),
        "attribute_id": [5, 9, 197, 5, 194],
        "status_flags": [0x33, 0x32, 0x22, 0x33, 0x22],
        "normalized": [100, 88, 200, 1, 64],
        "worst_normalized": [100, 88, 199, 1, 41],
        "threshold": [10, 0, None, 36, 0],
        "raw_value": [8, (7 << 32) | 20_000, 3, 2**48 - 1, 36],
    }).astype({"threshold": "Int64"})


def snapshot_rows() -> pd.DataFrame:
    return pd.DataFrame({
        "serial": ["QHM7A001", "QHM7A002"],
        "model": ["QH-HD8T-A", "QH-HD8T-A"],
        "bus": ["ata", "ata"],
        "user_capacity_bytes": [8_001_563_222_016, None],
        "taken_at": pd.to_datetime(["2026-11-01T02:00:00Z", "2026-11-02T02:10:00Z"], utc=True),
        "pending_sectors": [3, None],
    }).astype({"user_capacity_bytes": "Int64", "pending_sectors": "Int64"})


def write_format_1(root, table: str, schema: pa.Schema, rows: pd.DataFrame) -> None:
    """Lay the rows out as format 1 did: Hive day partitions, old column names, no _format.json.

    Written with pyarrow alone, so the test does not lean on the code it checks."""
    old = old_schema(schema, table)
    back = {new: old_name for old_name, new in OLD[table].items()}
    for day, part in rows.groupby(rows["taken_at"].dt.strftime("%Y-%m-%d")):
        arrays = [pa.array(part[f.name], type=f.type, from_pandas=True) if f.name in part
                  else pa.nulls(len(part), f.type) for f in schema]
        names = [back.get(f.name, f.name) for f in schema]
        folder = root / table / f"day={day}"
        folder.mkdir(parents=True)
        pq.write_table(pa.Table.from_arrays(arrays, names=names).cast(old), folder / "part-20261102T030000Z-0a1b2c3d.parquet")


@pytest.fixture
def old_store(tmp_path):
    root = tmp_path / "store"
    write_format_1(root, "attributes", ATTRIBUTES, attribute_rows())
    write_format_1(root, "snapshots", SNAPSHOTS, snapshot_rows())
    (root / MANIFEST).write_text(json.dumps({"batch": "20261102T030000Z-0a1b2c3d", "files": [],
                                             "rows": {"attributes": 5, "snapshots": 2}}) + "\n")
    return root


def test_a_store_without_a_format_file_but_with_tables_is_format_1(old_store):
    assert Store(old_store).format_version() == 1
    assert Store(old_store.parent / "empty").format_version() is None


def test_reading_a_format_1_store_gives_every_attribute_value_under_the_new_names(old_store):
    got = Store(old_store).read("attributes").sort_values(["serial", "attribute_id"]).reset_index(drop=True)
    want = attribute_rows().sort_values(["serial", "attribute_id"]).reset_index(drop=True)
    assert list(got.columns) == ATTRIBUTES.names
    for column in ATTRIBUTES.names:
        assert got[column].astype(object).where(got[column].notna(), None).tolist() == \
            want[column].astype(object).where(want[column].notna(), None).tolist(), column


def test_the_capacity_keeps_its_values_under_its_new_name(old_store):
    got = Store(old_store).read("snapshots", columns=["serial", "user_capacity_bytes", "pending_sectors"])
    got = got.sort_values("serial")
    assert got["user_capacity_bytes"].tolist()[0] == 8_001_563_222_016
    assert pd.isna(got["user_capacity_bytes"].tolist()[1])
    assert got["pending_sectors"].tolist()[0] == 3


def test_conversion_rewrites_the_files_records_format_2_and_keeps_the_manifest(old_store):
    manifest = (old_store / MANIFEST).read_text()
    Store(old_store).upgrade()
    assert json.loads((old_store / FORMAT_FILE).read_text()) == {"store_format": STORE_FORMAT}
    assert (old_store / MANIFEST).read_text() == manifest
    # another engine reading the layout directly sees the new names and every row
    table = ds.dataset(old_store / "attributes", format="parquet", partitioning="hive").to_table()
    assert table.num_rows == 5
    assert {"attribute_id", "status_flags", "normalized", "worst_normalized", "raw_value"} <= set(table.schema.names)
    assert not {"id", "flags", "value", "worst", "raw"} & set(table.schema.names)
    assert not list(old_store.rglob(".*.tmp"))


def test_a_conversion_cut_short_is_finished_by_the_next_run(old_store):
    # a crash after one file was rewritten: format 1 is still recorded, one file has new names
    first = sorted((old_store / "attributes").rglob("part-*.parquet"))[0]
    table = pq.read_table(first, partitioning=None)
    pq.write_table(table.rename_columns([OLD["attributes"].get(n, n) for n in table.schema.names]), first)
    assert Store(old_store).format_version() == 1
    got = Store(old_store).read("attributes")
    assert len(got) == 5 and got["attribute_id"].notna().all() and got["raw_value"].notna().all()


def test_stored_attribute_keys_still_deduplicate_after_conversion(old_store):
    store = Store(old_store)
    assert store.append("attributes", attribute_rows()) == 0


def test_a_store_from_a_newer_triage_is_refused(old_store):
    (old_store / FORMAT_FILE).write_text(json.dumps({"store_format": STORE_FORMAT + 1}))
    with pytest.raises(StoreFormatError, match=f"store format {STORE_FORMAT + 1} is newer"):
        Store(old_store).read("snapshots")


def test_a_new_store_is_written_as_the_current_format(tmp_path):
    store = Store(tmp_path / "new")
    store.append("attributes", attribute_rows())
    assert store.format_version() == STORE_FORMAT
