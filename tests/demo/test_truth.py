"""The ground truth says exactly what the written files say, decoded by the format parsers."""

from __future__ import annotations

from datetime import datetime, timezone

import pandas as pd

from triage.formats.ata_identify import parse_ata_identify
from triage.formats.ata_smart import parse_smart_data
from triage.formats.ata_thresholds import parse_smart_thresholds
from triage.formats.nvme_health import parse_nvme_health
from triage.formats.nvme_identify import parse_nvme_identify
from triage.store.schema import ATA_COUNTER_ATTRIBUTES, SNAPSHOTS

ATA_ONLY = list(ATA_COUNTER_ATTRIBUTES.values())
ATA_ONLY.remove("power_cycles")  # both buses report power cycles
NVME_ONLY = ["nvme_critical_warning", "nvme_spare_pct", "nvme_spare_threshold_pct",
             "nvme_used_pct", "nvme_media_errors", "nvme_unsafe_shutdowns",
             "nvme_error_log_entries", "data_written_bytes"]


def decode(obj: dict) -> dict:
    """One capture line -> snapshot columns, following the meanings in store/schema.py."""
    row = {
        "host": obj["host"], "device": obj["device"], "slot": obj["slot"], "group": obj["group"],
        "bus": obj["bus"],
        "taken_at": datetime.fromisoformat(obj["taken_at"]).astimezone(timezone.utc),
    }
    if obj["bus"] == "ata":
        ident = parse_ata_identify(bytes.fromhex(obj["identify"]))
        smart = parse_smart_data(bytes.fromhex(obj["smart"]))
        by_id = {a.id: a for a in smart.attributes}
        row.update(serial=ident.serial, model=ident.model, firmware=ident.firmware,
                   user_capacity_bytes=ident.user_capacity_bytes, rotation_rpm=ident.rotation_rpm,
                   wwn=ident.wwn)
        # attribute 9: low 32 bits of the raw value; 194: low byte (common practice, no source)
        row["power_on_hours"] = by_id[9].raw & 0xFFFFFFFF
        row["temperature_c"] = by_id[194].raw & 0xFF
        for attr, name in ATA_COUNTER_ATTRIBUTES.items():
            row[name] = by_id[attr].raw if attr in by_id else None
        if "thresholds" in obj:
            thresholds = parse_smart_thresholds(bytes.fromhex(obj["thresholds"]))
            # SFF-8035i: tripped = value at or below a non-zero threshold
            tripped = [a for a in smart.attributes if thresholds.get(a.id, 0) and a.value <= thresholds[a.id]]
            row["threshold_tripped"] = bool(tripped)
            row["prefail_tripped"] = any(a.prefailure for a in tripped)
        else:
            row["threshold_tripped"] = row["prefail_tripped"] = None
        for name in NVME_ONLY:
            row[name] = None
    else:
        ident = parse_nvme_identify(bytes.fromhex(obj["identify"]))
        health = parse_nvme_health(bytes.fromhex(obj["health"]))
        row.update(serial=ident.serial, model=ident.model, firmware=ident.firmware,
                   user_capacity_bytes=ident.total_capacity_bytes, rotation_rpm=0, wwn=None,
                   power_on_hours=health.power_on_hours,
                   temperature_c=health.composite_temperature_k - 273,
                   power_cycles=health.power_cycles,
                   nvme_critical_warning=health.critical_warning,
                   nvme_spare_pct=health.available_spare_pct,
                   nvme_spare_threshold_pct=health.spare_threshold_pct,
                   nvme_used_pct=health.percentage_used,
                   nvme_media_errors=health.media_errors,
                   nvme_unsafe_shutdowns=health.unsafe_shutdowns,
                   nvme_error_log_entries=health.error_log_entries,
                   # NVMe Base 2.0, log 02h: one data unit = 1000 x 512 bytes
                   data_written_bytes=health.data_units_written * 512_000,
                   threshold_tripped=None, prefail_tripped=None)
        for name in ATA_ONLY:
            row[name] = None
    return row


def _plain(value):
    return None if value is None or value is pd.NA or (isinstance(value, float) and value != value) else value


def test_truth_has_the_snapshot_schema_columns_in_order(small_truth):
    expected = [name for name in SNAPSHOTS.names if name != "source_file"]
    assert list(small_truth.snapshots.columns) == expected


def test_truth_timestamps_are_utc(small_truth):
    assert str(small_truth.snapshots["taken_at"].dt.tz) == "UTC"
    assert str(small_truth.removals["removed_at"].dt.tz) == "UTC"


def test_truth_has_one_row_per_capture_line(small_truth, small_lines):
    assert len(small_truth.snapshots) == len(small_lines)


def test_every_truth_value_equals_what_the_parsers_decode_from_the_files(small_truth, small_lines):
    truth = small_truth.snapshots.set_index(["serial", "taken_at"])
    for name, number, obj in small_lines:
        row = decode(obj)
        expected = truth.loc[(row["serial"], pd.Timestamp(row["taken_at"]))]
        for column, value in row.items():
            if column in ("serial", "taken_at"):
                continue
            assert _plain(expected[column]) == value, (name, number, column)


def test_nvme_columns_are_null_for_ata_and_ata_counters_null_for_nvme(small_truth):
    s = small_truth.snapshots
    ata, nvme = s[s["bus"] == "ata"], s[s["bus"] == "nvme"]
    assert len(ata) and len(nvme)
    assert ata[NVME_ONLY].isna().all().all()
    assert nvme[ATA_ONLY + ["threshold_tripped", "prefail_tripped", "wwn"]].isna().all().all()
