"""Ingest: good lines stored with the right values, bad lines quarantined with their reason."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from tests.ingest.lines import ata_line, nvme_line
from triage.ingest import ingest_paths
from triage.store.dataset import Store


def test_ata_capture_becomes_one_snapshot_with_decoded_counters(tmp_path, write_capture):
    store = Store(tmp_path / "store")
    ingest_paths(store, [write_capture("ash-2026-11-01.jsonl.gz", [ata_line()])])
    row = store.read("snapshots").iloc[0]
    assert row["serial"] == "QHA0000001" and row["model"] == "QH-HD8T-A" and row["firmware"] == "QF01"
    # 48-bit LBA count x 512-byte sectors (ACS-3 IDENTIFY words 100-103)
    assert row["user_capacity_bytes"] == 15_628_053_168 * 512
    assert row["rotation_rpm"] == 7200
    # attribute 9: low 32 bits of raw (common practice, no source); 194: low byte (common practice)
    assert row["power_on_hours"] == 20_000
    assert row["temperature_c"] == 36
    assert (row["reallocated_sectors"], row["pending_sectors"], row["crc_errors"]) == (8, 3, 12)
    assert bool(row["threshold_tripped"]) is False
    assert row["taken_at"] == pd.Timestamp("2026-11-01T02:10:00Z")
    assert pd.isna(row["nvme_used_pct"])


def test_attribute_table_keeps_every_attribute_with_its_threshold(tmp_path, write_capture):
    store = Store(tmp_path / "store")
    ingest_paths(store, [write_capture("a.jsonl.gz", [ata_line()])])
    attrs = store.read("attributes").sort_values("attribute_id")
    assert attrs["attribute_id"].tolist() == [5, 9, 194, 197, 199]
    assert attrs.set_index("attribute_id").loc[5, "threshold"] == 10
    assert attrs.set_index("attribute_id").loc[9, "raw_value"] == (7 << 32) | 20_000


def test_capture_without_thresholds_has_null_threshold_fields(tmp_path, write_capture):
    store = Store(tmp_path / "store")
    ingest_paths(store, [write_capture("a.jsonl.gz", [ata_line(thresholds=...)])])
    row = store.read("snapshots").iloc[0]
    assert row["threshold_tripped"] is None and row["prefail_tripped"] is None


def test_prefail_attribute_at_threshold_trips_both_flags(tmp_path, write_capture):
    from triage.formats.ata_smart import SmartAttribute, build_smart_data
    from tests.ingest import lines as conftest

    worn = [a if a.id != 5 else SmartAttribute(5, 0x33, 10, 10, 900) for a in conftest.ATTRS]
    store = Store(tmp_path / "store")
    ingest_paths(store, [write_capture("a.jsonl.gz", [ata_line(smart=build_smart_data(worn).hex())])])
    row = store.read("snapshots").iloc[0]
    # SFF-8035i: value at or below a non-zero threshold = threshold exceeded; flag bit 0 = pre-failure
    assert bool(row["threshold_tripped"]) and bool(row["prefail_tripped"])


def test_nvme_capture_converts_kelvin_and_data_units(tmp_path, write_capture):
    store = Store(tmp_path / "store")
    ingest_paths(store, [write_capture("b.jsonl", [nvme_line()], compress=False)])
    row = store.read("snapshots").iloc[0]
    assert row["bus"] == "nvme" and row["rotation_rpm"] == 0
    assert row["temperature_c"] == 311 - 273  # NVMe 2.0 log 02h bytes 1-2 are kelvin
    assert row["data_written_bytes"] == 2_000_000 * 1000 * 512  # one data unit = 1000 x 512 bytes
    assert (row["nvme_critical_warning"], row["nvme_used_pct"], row["nvme_media_errors"]) == (4, 12, 1)
    assert row["taken_at"] == pd.Timestamp("2026-11-01T02:10:00Z")  # +01:00 normalised to UTC
    assert pd.isna(row["pending_sectors"])


def flip_last_byte(hex_text: str) -> str:
    data = bytearray.fromhex(hex_text)
    data[-1] ^= 0xFF
    return data.hex()


BAD_LINES = {
    "bad JSON": ('{"capture": 1, "host": ', None),
    "bad hex": (ata_line(smart="zz" * 512), "smart"),
    "wrong length": (ata_line(smart="00" * 511), "smart"),
    "checksum mismatch": (ata_line(smart=flip_last_byte(json.loads(ata_line())["smart"])), "smart"),
    "missing field": (ata_line(host=...), "host"),
    "bad timestamp": (ata_line(taken_at="2026-11-01 02:10"), "taken_at"),
    "impossible date": (ata_line(taken_at="2026-13-01T02:10:00Z"), "taken_at"),
    "unknown bus": (ata_line(bus="scsi"), "bus"),
}


@pytest.mark.parametrize("kind", BAD_LINES)
def test_bad_line_is_quarantined_and_good_lines_are_kept(tmp_path, write_capture, kind):
    bad, field = BAD_LINES[kind]
    path = write_capture("mixed.jsonl.gz", [ata_line("QHA1"), bad, ata_line("QHA2")])
    store = Store(tmp_path / "store")
    report = ingest_paths(store, [path])
    assert sorted(store.read("snapshots")["serial"]) == ["QHA1", "QHA2"]
    assert len(report.rejected) == 1
    rejected = report.rejected[0]
    assert (rejected.line, rejected.field) == (2, field)
    stored = [json.loads(l) for f in store.quarantine_dir.glob("*.jsonl") for l in f.read_text().splitlines()]
    assert stored == [rejected.as_record()] and stored[0]["text"] == bad


def test_unknown_extra_keys_are_ignored(tmp_path, write_capture):
    line = json.loads(ata_line())
    line["rack_note"] = "row 4"
    store = Store(tmp_path / "store")
    report = ingest_paths(store, [write_capture("a.jsonl.gz", [json.dumps(line)])])
    assert not report.rejected and len(store.read("snapshots")) == 1


def test_same_file_twice_adds_nothing(tmp_path, write_capture):
    path = write_capture("a.jsonl.gz", [ata_line(), nvme_line()])
    store = Store(tmp_path / "store")
    ingest_paths(store, [path])
    again = ingest_paths(store, [path])
    assert again.files_skipped == 1 and again.new_rows == 0
    assert len(store.read("snapshots")) == 2


def test_same_capture_in_another_file_adds_nothing(tmp_path, write_capture):
    store = Store(tmp_path / "store")
    ingest_paths(store, [write_capture("a.jsonl.gz", [ata_line()])])
    report = ingest_paths(store, [write_capture("copy.jsonl.gz", [ata_line(), ata_line(taken_at="2026-11-02T02:10:00Z")])])
    assert report.stored["snapshots"] == 1
    assert len(store.read("snapshots")) == 2


def test_removal_log_stores_rows_and_rejects_unknown_reason(tmp_path):
    log = tmp_path / "removals.csv"
    log.write_text(
        "serial,removed_at,reason,note\r\n"
        "QHA1,2026-11-03T10:00:00Z,failed,\"did not spin up, replaced\"\r\n"
        "QHA2,2026-11-04,proactive,\r\n"
        "QHA3,2026-11-05,lost-in-mail,\r\n"
    )
    store = Store(tmp_path / "store")
    report = ingest_paths(store, [log])
    removals = store.read("removals").sort_values("serial")
    assert removals["reason"].tolist() == ["failed", "proactive"]
    assert removals["note"].iloc[0] == "did not spin up, replaced"  # RFC 4180 quoted comma
    assert [(r.line, r.field) for r in report.rejected] == [(4, "reason")]


def test_missing_input_path_is_a_clear_error(tmp_path):
    with pytest.raises(FileNotFoundError, match="nothing-here"):
        ingest_paths(Store(tmp_path / "s"), [tmp_path / "nothing-here"])
