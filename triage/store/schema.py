"""The store's table schemas: the one place they are defined.

The store is a public contract: other engines read these Hive-partitioned Parquet tables
directly (``<table>/day=YYYY-MM-DD/part-*.parquet``), so a column is never retyped in place, and
renamed only together with a new ``STORE_FORMAT`` and its entry in ``RENAMED_SINCE`` (an older
store is converted when this code first opens it: ``triage.store.dataset``). Add columns at the
end; never reuse a name with a new meaning.

Integers are signed 64-bit even where the standard field is wider (NVMe counters are 128-bit):
values beyond 2**63-1 are saturated at that maximum on ingest, which no real drive reaches
for the counters kept here; such a snapshot has ``counters_clamped`` true.
"""

from __future__ import annotations

import pyarrow as pa

TIMESTAMP = pa.timestamp("us", tz="UTC")

#: Partition key, derived from the row's UTC timestamp; lives in the directory name only.
PARTITION_COLUMN = "day"

SNAPSHOTS = pa.schema(
    [
        ("serial", pa.string()),
        ("model", pa.string()),
        ("firmware", pa.string()),
        ("bus", pa.string()),  # "ata" | "nvme"
        ("user_capacity_bytes", pa.int64()),  # user-addressable capacity (ATA words 100-103; NVMe TNVMCAP)
        ("rotation_rpm", pa.int32()),  # 0 = solid state, null = not reported
        ("wwn", pa.string()),  # 16 hex digits (ATA words 108-111); null when absent / NVMe
        ("host", pa.string()),
        ("device", pa.string()),
        ("slot", pa.string()),
        ("group", pa.string()),
        ("taken_at", TIMESTAMP),
        ("power_on_hours", pa.int64()),
        ("temperature_c", pa.int32()),
        ("reallocated_sectors", pa.int64()),  # ATA attribute 5
        ("reallocation_events", pa.int64()),  # ATA attribute 196
        ("pending_sectors", pa.int64()),  # ATA attribute 197
        ("offline_uncorrectable", pa.int64()),  # ATA attribute 198
        ("reported_uncorrectable", pa.int64()),  # ATA attribute 187
        ("command_timeouts", pa.int64()),  # ATA attribute 188
        ("crc_errors", pa.int64()),  # ATA attribute 199
        ("spin_retries", pa.int64()),  # ATA attribute 10
        ("threshold_tripped", pa.bool_()),  # some attribute with threshold > 0 at/below it
        ("prefail_tripped", pa.bool_()),  # the same, for a pre-failure attribute
        ("power_cycles", pa.int64()),  # ATA attribute 12 / NVMe power cycles
        ("nvme_critical_warning", pa.int32()),  # NVMe log 02h byte 0, bits 0-5
        ("nvme_spare_pct", pa.int32()),
        ("nvme_spare_threshold_pct", pa.int32()),
        ("nvme_used_pct", pa.int32()),
        ("nvme_media_errors", pa.int64()),
        ("nvme_unsafe_shutdowns", pa.int64()),
        ("nvme_error_log_entries", pa.int64()),
        ("data_written_bytes", pa.int64()),
        ("source_file", pa.string()),  # capture file name the row came from (provenance)
        # True when a counter or capacity did not fit int64 and is stored at 2**63-1 (saturated)
        ("counters_clamped", pa.bool_()),
    ]
)

ATTRIBUTES = pa.schema(
    [
        ("serial", pa.string()),
        ("taken_at", TIMESTAMP),
        # SFF-8035i attribute entry fields, by the standard's names in full
        ("attribute_id", pa.int32()),
        ("status_flags", pa.int32()),
        ("normalized", pa.int32()),  # normalized value, 1-253
        ("worst_normalized", pa.int32()),  # worst normalized value the drive has recorded
        ("threshold", pa.int32()),  # null when the capture had no thresholds sector
        ("raw_value", pa.int64()),  # 48-bit raw value, little-endian as stored by the drive
    ]
)

REMOVALS = pa.schema(
    [
        ("serial", pa.string()),
        ("removed_at", TIMESTAMP),
        ("reason", pa.string()),  # see REMOVAL_REASONS
        ("note", pa.string()),
        ("source_file", pa.string()),
    ]
)

#: Our own words for why a drive left the fleet.
#:   failed    - it stopped working or was pulled because it was failing
#:   proactive - pulled on a warning before it failed (counted as a failure by default)
#:   retired   - left healthy (decommissioned, migrated); a censoring, not an event
REMOVAL_REASONS = ("failed", "proactive", "retired")

#: table name -> (schema, timestamp column that decides the day partition, dedup key)
TABLES = {
    "snapshots": (SNAPSHOTS, "taken_at", ("serial", "taken_at")),
    "attributes": (ATTRIBUTES, "taken_at", ("serial", "taken_at", "attribute_id")),
    "removals": (REMOVALS, "removed_at", ("serial", "removed_at", "reason")),
}

#: Version of the store's layout, kept in ``<store>/_format.json``; a store without that file was
#: written by format 1.
STORE_FORMAT = 2

#: format -> {table: {old column: new column}}: the renames that format introduced.
#: 2: the attribute entry fields and the capacity take the standards' names in full.
RENAMED_SINCE = {
    2: {
        "snapshots": {"capacity_bytes": "user_capacity_bytes"},
        "attributes": {
            "id": "attribute_id",
            "flags": "status_flags",
            "value": "normalized",
            "worst": "worst_normalized",
            "raw": "raw_value",
        },
    },
}

#: ATA SMART attribute ids kept as snapshot columns (SFF-8035i ids; meanings are common
#: practice across vendors, not fixed by the ATA standard).
ATA_COUNTER_ATTRIBUTES = {
    5: "reallocated_sectors",
    10: "spin_retries",
    12: "power_cycles",
    187: "reported_uncorrectable",
    188: "command_timeouts",
    196: "reallocation_events",
    197: "pending_sectors",
    198: "offline_uncorrectable",
    199: "crc_errors",
}
ATA_POWER_ON_HOURS_ID = 9
ATA_TEMPERATURE_ID = 194
